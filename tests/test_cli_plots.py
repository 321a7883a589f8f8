"""Pictures from the command line: ``--plot FILE`` on report and edge, ``phase``, ``depth-scales``.

The command is driven in-process (``propcalc.cli.main(argv, out=..., err=...)``) and writes into
pytest's ``tmp_path``. The figures themselves (their numbers, markers and determinism) are
tested in test_plots.py; here: the file exists in the format its extension names (the PNG
signature of the PNG specification, ISO/IEC 15948:2004 section 5.2; SVG parses as XML in the
SVG namespace), the same command gives the same bytes, the CLI hands the right arguments to
propcalc.output.plots, errors are one line with exit status 2, and the help goes to the given stream.
Grids are small so that the whole module runs in a few seconds.
"""

from __future__ import annotations

import io
import json
import sys
import xml.etree.ElementTree as ET

import pytest

pytest.importorskip("matplotlib")

import propcalc  # noqa: E402
from propcalc import cli  # noqa: E402
from propcalc.cli.commands import propagation as propagation_commands  # noqa: E402
from propcalc.output import plots  # noqa: E402
from cli_helpers import run  # noqa: E402

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"  # PNG specification (ISO/IEC 15948:2004), section 5.2
SVG_NAMESPACE = "{http://www.w3.org/2000/svg}"  # SVG 1.1 (W3C 2011), section 1.1
SMALL = ["--grid", "7,5"]


def svg_root(data: bytes) -> ET.Element:
    root = ET.fromstring(data)
    assert root.tag == SVG_NAMESPACE + "svg"
    return root


def has_user_marker(svg: bytes) -> bool:
    """propcalc.output.plots gives the user's marker the gid USER_POINT_GID: an element id in SVG."""
    return any(el.get("id") == plots.USER_POINT_GID for el in svg_root(svg).iter())


@pytest.fixture()
def calls(monkeypatch):
    """Record the keyword arguments the CLI hands to each propcalc.output.plots figure."""
    seen: dict[str, dict] = {}
    for name in ("plot_phase_diagram", "plot_variance_map", "plot_correlation_map",
                 "plot_depth_scales"):
        real = getattr(plots, name)

        def spy(*args, _real=real, _name=name, **kwargs):
            seen[_name] = {"args": args, **kwargs}
            return _real(*args, **kwargs)

        monkeypatch.setattr(plots, name, spy)
    return seen


# ---------------------------------------------------------------------------------------------
# phase
# ---------------------------------------------------------------------------------------------
def test_phase_png_same_bytes_twice(tmp_path, calls):
    a, b = tmp_path / "a.png", tmp_path / "b.PNG"  # the extension is case-insensitive
    code, out, err = run("phase", "tanh", "--plot", str(a), *SMALL)
    assert (code, err) == (0, "")
    assert out.count("\n") == 1 and out.startswith("wrote the phase diagram of tanh to ")
    assert str(a) in out and "(PNG, " in out
    assert run("phase", "tanh", "--plot", str(b), *SMALL)[0] == 0
    data = a.read_bytes()
    assert data.startswith(PNG_SIGNATURE)
    assert b.read_bytes() == data
    kw = calls["plot_phase_diagram"]
    assert kw["n_grid"] == (7, 5) and kw["args"][1] is None
    assert kw["progress"] is None  # tqdm decides: a bar only when stderr is a terminal


def test_phase_svg_with_point_window_and_depth(tmp_path, calls):
    path = tmp_path / "phase.svg"
    code, out, err = run("phase", "tanh", "--plot", str(path), "--grid", "6",
                         "--point", "1.5,0.05", "--sigma-w2-range", "0.5,3",
                         "--sigma-b2-range", "0,0.3", "--depth", "50", "--q-input", "2")
    assert (code, err) == (0, ""), err
    assert "with the point (1.5, 0.05)" in out and "(SVG, " in out
    data = path.read_bytes()
    assert has_user_marker(data)
    kw = calls["plot_phase_diagram"]
    assert kw["args"][1] == (1.5, 0.05) and kw["n_grid"] == (6, 6)
    assert kw["sigma_w2_range"] == (0.5, 3.0) and kw["sigma_b2_range"] == (0.0, 0.3)
    assert kw["depth"] == 50 and kw["q_input"] == 2.0
    # the window given is the window drawn
    again = tmp_path / "again.svg"
    assert run("phase", "tanh", "--plot", str(again), "--grid", "6", "--point", "1.5,0.05",
               "--sigma-w2-range", "0.5,3", "--sigma-b2-range", "0,0.3", "--depth", "50",
               "--q-input", "2")[0] == 0
    assert again.read_bytes() == data


def test_phase_formula_activation_with_param(tmp_path):
    path = tmp_path / "swish.png"
    code, out, err = run("phase", "x * sigmoid(beta * x)", "--param", "beta=1.5",
                         "--plot", str(path), *SMALL)
    assert (code, err) == (0, ""), err
    assert path.read_bytes().startswith(PNG_SIGNATURE)


# ---------------------------------------------------------------------------------------------
# report, edge, depth-scales
# ---------------------------------------------------------------------------------------------
def test_report_plot_is_the_phase_diagram_with_the_point(tmp_path, calls):
    path = tmp_path / "report.svg"
    code, out, err = run("report", "relu", "-w", "2.5", "-b", "0.1", "--depth", "40",
                         "--plot", str(path))
    assert (code, err) == (0, ""), err
    lines = out.splitlines()
    assert lines[0].startswith("activation") and lines[-1].startswith("wrote the phase diagram")
    assert has_user_marker(path.read_bytes())
    kw = calls["plot_phase_diagram"]
    prop = kw["args"][1]
    assert isinstance(prop, propcalc.Propagation)
    assert (prop.sigma_w2, prop.sigma_b2, kw["depth"]) == (2.5, 0.1, 40)


@pytest.mark.parametrize("kind, figure", [("variance-map", "plot_variance_map"),
                                          ("correlation-map", "plot_correlation_map")])
def test_report_plot_kinds(tmp_path, calls, kind, figure):
    path = tmp_path / f"{kind}.png"
    code, out, err = run("report", "tanh", "-w", "2.5", "-b", "0.05", "--plot", str(path),
                         "--plot-kind", kind)
    assert (code, err) == (0, ""), err
    assert out.splitlines()[-1].startswith(f"wrote the {kind.replace('-', ' ')} of tanh at ")
    assert path.read_bytes().startswith(PNG_SIGNATURE)
    prop = calls[figure]["args"][1]
    assert prop.sigma_w2 == 2.5 and prop.phase == "chaotic"


def test_report_json_stays_json_and_the_line_goes_to_stderr(tmp_path, calls):
    path = tmp_path / "v.svg"
    code, out, err = run("report", "tanh", "-w", "1.5", "--json", "--plot", str(path),
                         "--plot-kind", "variance-map")
    assert code == 0
    assert json.loads(out)["sigma_w2"] == 1.5
    assert err.count("\n") == 1 and err.startswith("wrote the variance map of tanh")
    svg_root(path.read_bytes())


def test_edge_plot_marks_the_critical_point(tmp_path, calls):
    path = tmp_path / "edge.png"
    code, out, err = run("edge", "tanh", "--sigma-b2", "0.05", "--plot", str(path), *SMALL)
    assert (code, err) == (0, ""), err
    point = propcalc.edge_of_chaos_at_bias(propcalc.activation("tanh"), 0.05)[0]
    marked = calls["plot_phase_diagram"]["args"][1]
    assert isinstance(marked, propcalc.CriticalPoint) and marked == point
    assert "and the critical point (" in out
    assert out.count("\n") == 4  # header, rule, one row, the line saying where the file went


def test_edge_plot_says_which_points_lie_outside(tmp_path):
    path = tmp_path / "edge.svg"
    code, out, err = run("edge", "tanh", "--plot", str(path), "--grid", "5,4")
    assert (code, err) == (0, ""), err
    # the default window is sigma_w2 in [0.1, 4], sigma_b2 in [0, 0.5]; tanh's edge has
    # sigma_b2 = 0.151 at q* = 1 and 0.98 at q* = 3 (see `propcalc edge tanh`), so the points
    # at q* = 3, 10, 30, 100 of the 9 default q* values lie outside
    assert "note: 4 of the 9 listed points lie outside the picture" in out
    svg_root(path.read_bytes())
    path2 = tmp_path / "wide.svg"
    code, out, err = run("edge", "tanh", "--plot", str(path2), "--grid", "5,4",
                         "--q-star", "0.1,1", "--sigma-w2-range", "0.5,3")
    assert code == 0 and "outside" not in out


def test_depth_scales(tmp_path, calls):
    path = tmp_path / "depth.png"
    code, out, err = run("depth-scales", "tanh", "-b", "0.05", "-w", "1.5", "--points", "15",
                         "--depth", "60", "--sigma-w2-range", "0.5,3", "--plot", str(path))
    assert (code, err) == (0, ""), err
    assert out == (f"wrote the depth scales of tanh at sigma_b2 = 0.05 with the point "
                   f"sigma_w2 = 1.5 to {path} (PNG, {path.stat().st_size} bytes)\n")
    kw = calls["plot_depth_scales"]
    assert kw["args"][1] == (1.5, 0.05) and kw["sigma_b2"] == 0.05
    assert (kw["n_points"], kw["depth"], kw["sigma_w2_range"]) == (15, 60, (0.5, 3.0))
    assert kw["progress"] is None


# ---------------------------------------------------------------------------------------------
# errors: one line, exit 2, nothing written
# ---------------------------------------------------------------------------------------------
PLOT_USAGE_ERRORS = [
    (["phase", "tanh", "--plot", "{tmp}/x.jpg"], "--plot FILE must end in .png or .svg"),
    (["phase", "tanh", "--plot", "{tmp}/x"], "--plot FILE must end in .png or .svg"),
    (["report", "tanh", "-w", "1", "--plot", "{tmp}/x.pdf"], "must end in .png or .svg"),
    (["phase", "tanh", "--plot", "{tmp}/missing/x.png"], "does not exist"),
    (["phase", "tanh"], "the following arguments are required: --plot"),
    (["depth-scales", "tanh"], "the following arguments are required: --plot"),
    (["phase", "tanh", "--plot", "{tmp}/x.png", "--grid", "2"],
     "argument --grid: must be N or NW,NB"),
    (["phase", "tanh", "--plot", "{tmp}/x.png", "--grid", "5,5,5"], "must be N or NW,NB"),
    (["phase", "tanh", "--plot", "{tmp}/x.png", "--sigma-w2-range", "0,4"],
     "argument --sigma-w2-range: must be LO,HI with 0 < LO < HI, got '0,4'"),
    (["phase", "tanh", "--plot", "{tmp}/x.png", "--sigma-b2-range", "0.5,0.1"],
     "must be LO,HI with 0 <= LO < HI"),
    (["phase", "tanh", "--plot", "{tmp}/x.png", "--sigma-b2-range", "nan,1"],
     "must be LO,HI with 0 <= LO < HI"),
    (["phase", "tanh", "--plot", "{tmp}/x.png", "--point=-1,0"],
     "argument --point: must be W,B (sigma_w2, sigma_b2) with W > 0 and B >= 0"),
    (["phase", "tanh", "--plot", "{tmp}/x.png", "--point", "1"], "must be W,B"),
    (["depth-scales", "tanh", "--plot", "{tmp}/x.png", "--points", "3"],
     "--points must be in [5, 20000], got 3"),
    (["depth-scales", "tanh", "--plot", "{tmp}/x.png", "-b", "-1"],
     "--sigma-b2 must be >= 0, got -1"),
    (["depth-scales", "tanh", "--plot", "{tmp}/x.png", "-w", "0"],
     "--sigma-w2 must be > 0, got 0"),
    (["phase", "tanh", "--plot", "{tmp}/x.png", "--depth", "0"],
     "--depth must be >= 1, got 0"),
    (["depth-scales", "tanh", "--plot", "{tmp}/x.png", "--depth", "-3"],
     "--depth must be >= 1, got -3"),
    (["edge", "tanh", "--grid", "5"], "--grid only shape the picture: give --plot FILE too"),
    (["report", "tanh", "-w", "1", "--plot-kind", "variance-map"], "give --plot FILE too"),
    (["report", "tanh", "-w", "1", "--plot", "{tmp}/x.png", "--plot-kind", "cobweb"],
     "argument --plot-kind: invalid choice"),
    # --q-star lists: finite numbers, at least one
    (["edge", "tanh", "--q-star", "1e400"], "argument --q-star: must be finite numbers: item 1 "
                                            "of '1e400' is '1e400'"),
    (["edge", "tanh", "--q-star", "1,inf"], "must be finite numbers: item 2 of '1,inf' is 'inf'"),
    (["edge", "tanh", "--q-star", "nan"], "must be finite numbers: item 1 of 'nan' is 'nan'"),
    (["edge", "tanh", "--q-star", ","], "must be at least one number (comma-separated numbers "
                                        "like 0.5,1,2), got ','"),
    (["edge", "tanh", "--q-star", ""], "must be at least one number"),
]


@pytest.mark.parametrize("argv, needle", PLOT_USAGE_ERRORS,
                         ids=[" ".join(a).replace("{tmp}/", "") for a, _ in PLOT_USAGE_ERRORS])
def test_usage_errors_exit_2_with_one_line(tmp_path, argv, needle):
    code, out, err = run(*(a.replace("{tmp}", str(tmp_path)) for a in argv))
    assert code == 2
    assert out == ""
    assert err.startswith("propcalc: error: ") and err.count("\n") == 1, err
    assert needle in err
    assert list(tmp_path.iterdir()) == []


def test_without_matplotlib_one_line_exit_2_before_any_work(tmp_path, monkeypatch):
    monkeypatch.setitem(sys.modules, "propcalc.output.plots", None)  # importing it now fails

    def no_work(*args, **kwargs):
        raise AssertionError("computed although the picture cannot be drawn")

    monkeypatch.setattr(propagation_commands, "propagation", no_work)
    for argv in (["phase", "tanh"], ["report", "tanh", "-w", "1"], ["edge", "tanh"],
                 ["depth-scales", "tanh"]):
        code, out, err = run(*argv, "--plot", str(tmp_path / "x.png"))
        assert (code, out) == (2, "")
        # from the checkout, as the README's set-up installs it (issue 12 section 4)
        assert err == ('propcalc: error: --plot needs matplotlib, which is not installed: '
                       'python3 -m pip install -e ".[plot]" in the propcalc checkout\n')
    assert list(tmp_path.iterdir()) == []
    # without --plot nothing needs matplotlib
    monkeypatch.undo()
    monkeypatch.setitem(sys.modules, "propcalc.output.plots", None)
    assert run("report", "tanh", "-w", "1")[0] == 0


def test_unwritable_file_is_a_usage_error(tmp_path):
    folder = tmp_path / "taken.png"
    folder.mkdir()  # a directory where the file should go
    code, out, err = run("phase", "relu", "--plot", str(folder), "--grid", "3")
    assert (code, out) == (2, "")
    assert err.startswith(f"propcalc: error: --plot {folder}: cannot write the file: ")
    assert err.count("\n") == 1


# ---------------------------------------------------------------------------------------------
# help: written to the given stream, status 0
# ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("argv", [["-h"], ["phase", "-h"], ["depth-scales", "--help"],
                                  ["report", "-h"], ["edge", "--help"]])
def test_help_goes_to_out_and_returns_0(argv, capsys):
    out, err = io.StringIO(), io.StringIO()
    assert cli.main(argv, out=out, err=err) == 0
    text = out.getvalue()
    assert text.startswith("usage: propcalc") and err.getvalue() == ""
    assert capsys.readouterr().out == ""  # nothing escaped to the real stdout
    if argv[0] != "-h":
        assert "--plot FILE" in text
    if argv[0] == "-h":
        assert "phase" in text and "depth-scales" in text

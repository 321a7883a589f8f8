"""Input the command line used to misread or ignore (issue 12, section 2).

Each case is the issue's failing input; the expected behaviour is the issue's ("refuse both with
the position of the bad item", "every option either takes effect or is refused", "names the
unknown option", "help text for every option"). The wording of the messages is common practice,
no source.
"""

from __future__ import annotations

import argparse

import pytest

from propcalc.cli.program import build_parser

from cli_helpers import run


@pytest.mark.parametrize("text, message", [
    # read as 485126 before
    ("48 512 6", "--widths: must be comma-separated integers like 784,512,10: item 1 of "
                 "'48 512 6' holds a space (is a comma missing?)"),
    # the empty item was dropped before
    ("48,512,,6", "item 3 of '48,512,,6' is empty"),
    ("48,512,6,", "item 4 of '48,512,6,' is empty"),
    ("48,x,6", "item 2 of '48,x,6' is 'x'"),
])
def test_widths_with_a_bad_item_are_refused_with_its_position(text: str, message: str) -> None:
    code, out, err = run("plan", "tanh", "--widths", text)
    assert code == 2 and out == ""
    assert err.startswith("propcalc: error: argument --widths: ") and message in err


def test_widths_with_spaces_around_commas_are_read() -> None:
    code, out, _ = run("plan", "tanh", "--widths", "48, 512 ,6", "--json")
    assert code == 0 and '"depth": 2' in out


@pytest.mark.parametrize("argv, message", [
    (["edge", "tanh", "--q-star", "1 2"], "--q-star: must be comma-separated numbers like 0.5,1,2: item 1 of '1 2' holds a space"),
    (["edge", "tanh", "--q-star", "1,,2"], "item 2 of '1,,2' is empty"),
    (["dropout", "tanh", "-w", "1.5", "--keep-rate", "0.9,nan"],
     "--keep-rate: must be finite numbers: item 2 of '0.9,nan' is 'nan'"),
    (["phase", "tanh", "--plot", "x.png", "--grid", "8 1"],  # read as 81 x 81 before
     "--grid: must be N or NW,NB (points along sigma_w2 and sigma_b2), each in [3, 2000], "
     "got '8 1'"),
])
def test_every_comma_list_refuses_blanks_and_empty_items(argv: list[str], message: str) -> None:
    code, _, err = run(*argv)
    assert code == 2 and message in err


@pytest.mark.parametrize("argv, message", [
    # said "-w/--sigma-w2 required" before
    (["report", "tanh", "--sigma_w2", "1.5"],
     "unrecognized arguments: --sigma_w2 (did you mean --sigma-w2?); see propcalc report "
     "--help"),
    (["report", "tanh", "-w", "1", "--qinput", "2"], "--qinput (did you mean --q-input?)"),
    (["plan", "tanh", "--depth", "3", "--zzz"], "unrecognized arguments: --zzz; see propcalc plan --help"),
    (["plann", "tanh"], "did you mean plan?"),
    (["plan", "tanh", "--depth", "3", "--target", "varience"], "did you mean variance?"),
])
def test_unknown_options_and_choices_are_named_with_the_nearest(argv: list[str],
                                                                  message: str) -> None:
    code, out, err = run(*argv)
    assert code == 2 and out == "" and message in err


def test_option_prefixes_still_work() -> None:
    code, out, _ = run("report", "tanh", "--sigma-w", "1.5", "--json")  # argparse abbreviation
    assert code == 0 and '"sigma_w2": 1.5' in out


def test_a_plan_without_a_size_says_what_to_give() -> None:
    # "depth must be given when neither widths nor layers are, got None" before
    code, _, err = run("plan", "tanh")
    assert code == 2
    assert err == ("propcalc: error: the network's size is missing: give --depth N, --widths "
                   "d0,d1,...,dL or --conv IN:OUT:KERNEL (repeatable)\n")


@pytest.mark.parametrize("argv, message", [
    # printed sigma_b2 = 0 before (the bias variance given was ignored)
    (["plan", "tanh", "--depth", "5", "--target", "variance", "--sigma-b2", "0.1"],
     "sigma_b2 must be absent for target 'variance' (that target plans sigma_b2 = 0; use "
     "target 'bias' to fix sigma_b2), got 0.1"),
    (["plan", "tanh", "--depth", "5", "--target", "variance", "--q-star", "2"],
     "q_star must be absent for target 'variance'"),
    (["plan", "tanh", "--depth", "5", "--sigma-b2", "0.1", "--q-star", "2"],
     "q_star must be absent for target 'bias' (that target takes q* from the sigma_b2 given"),
])
def test_plan_options_that_would_be_ignored_are_refused(argv: list[str], message: str) -> None:
    code, out, err = run(*argv)
    assert code == 2 and out == "" and message in err


def test_every_option_of_every_command_has_help_text() -> None:
    parser = build_parser()
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    missing = [f"{name} {a.option_strings or a.dest}"
               for name, p in sub.choices.items() for a in p._actions
               if a.help is None and "-" in p.prefix_chars]
    assert missing == []


def test_version() -> None:
    code, out, _ = run("--version")
    assert code == 0 and out.startswith("propcalc ")


def test_edge_refuses_q_star_with_sigma_b2() -> None:
    # dropped --q-star before (exit 0); the refusal is the engine's, shared with the service
    import propcalc

    code, out, err = run("edge", "tanh", "--q-star", "1", "--sigma-b2", "0.05")
    assert code == 2 and out == ""
    assert err.startswith("propcalc: error: --q-star: q_star must be absent when sigma_b2 is "
                          "given (sigma_b2 fixes the points; their q* follow from it)")
    with pytest.raises(propcalc.InvalidParameterError, match=r"^q_star must be absent when "
                                                             r"sigma_b2 is given"):
        propcalc.edge_of_chaos_points("tanh", q_star=1.0, sigma_b2=0.05)
    # each alone takes effect, and equals the function it stands for
    at_bias = propcalc.edge_of_chaos_points("tanh", sigma_b2=0.05)
    assert [p.to_dict() for p in at_bias] == [p.to_dict() for p in
                                               propcalc.edge_of_chaos_at_bias("tanh", 0.05)]
    line = propcalc.edge_of_chaos_points("tanh")
    assert [p.q_star for p in line] == list(propcalc.DEFAULT_EDGE_Q_STARS)


def test_zero_inputs_without_a_bias_are_refused_everywhere() -> None:
    # 'report tanh -w 1.5 --q-input 0' said "collapses to 0" at a repelling q = 0 (chi_q = 1.5)
    # and called the phase chaotic with xi_c = inf
    import propcalc

    code, out, err = run("report", "tanh", "-w", "1.5", "--q-input", "0")
    assert code == 2 and out == ""
    assert "q_input must be > 0 when sigma_b2 = 0 (zero inputs and no bias" in err
    for call in (lambda: propcalc.propagation("tanh", 1.5, 0.0, q_input=0.0),
                 lambda: propcalc.variance_fixed_points("relu", 2.0, 0.0, q_input=0.0),
                 lambda: propcalc.sweep("tanh", [1.5], [0.0, 0.1], q_input=0.0, progress=False)):
        with pytest.raises(propcalc.InvalidParameterError, match=r"^q_input must be > 0 when "):
            call()


def test_zero_inputs_with_a_bias_flow_to_the_fixed_point() -> None:
    # with sigma_b2 > 0 the first layer has q = sigma_b2 and flows on: the fixed point solves
    # V(q) = q, V(q) = 1.5 E[tanh(sqrt(q) z)^2] + 0.1 (Poole et al. 2016, eq. 3); reference:
    # scipy.integrate.quad for the expectation and scipy.optimize.brentq for the root
    import math

    from scipy import integrate, optimize

    import propcalc

    def v(q: float) -> float:
        f = lambda z: math.tanh(math.sqrt(q) * z) ** 2 * math.exp(-z * z / 2)  # noqa: E731
        return 1.5 * integrate.quad(f, -math.inf, math.inf, epsabs=0, epsrel=1e-13)[0] \
            / math.sqrt(2 * math.pi) + 0.1

    q_star = optimize.brentq(lambda q: v(q) - q, 0.1, 2.0, xtol=1e-15, rtol=1e-15)
    p = propcalc.propagation("tanh", 1.5, 0.1, q_input=0.0)
    assert p.q_star == pytest.approx(q_star, rel=1e-10)


def test_a_closed_pipe_is_not_a_failure() -> None:
    # 'propcalc report ... | head -2' ended in a BrokenPipeError traceback
    from propcalc import cli

    class Closed:
        def write(self, text: str) -> int:
            raise BrokenPipeError(32, "Broken pipe")

        def flush(self) -> None:
            pass

    assert cli.main(["report", "tanh", "-w", "1.5"], out=Closed()) == 0  # type: ignore[arg-type]


@pytest.mark.parametrize("argv, message", [
    # --second-moment and -b were read but not used without --margin (exit 0)
    (["softmax", "10", "--logit-variance", "1", "--second-moment", "2"],
     "--second-moment: options of the last layer's scale, which need --margin"),
    (["softmax", "10", "--logit-variance", "1", "-b", "0.1", "--fan-in", "64"],
     "--sigma-b2, --fan-in: options of the last layer's scale, which need --margin"),
])
def test_softmax_options_of_the_last_layer_need_margin(argv: list[str], message: str) -> None:
    code, out, err = run(*argv)
    assert code == 2 and out == "" and message in err


def test_softmax_last_layer_options_take_effect_with_margin() -> None:
    # the recommended sigma_w2 scales as 1 / E[phi^2] of the penultimate layer (logit variance
    # = sigma_w2 E[phi^2] + sigma_b2, Result of output_layer_scale)
    import json

    import propcalc

    code, out, _ = run("softmax", "10", "--margin", "--second-moment", "2", "--json")
    assert code == 0
    got = json.loads(out)["output_layer"]["sigma_w2"]
    assert got == propcalc.output_layer_scale(10, 2.0).sigma_w2
    assert got == pytest.approx(propcalc.output_layer_scale(10, 1.0).sigma_w2 / 2, rel=1e-12)


def test_a_current_bias_without_the_current_weights_is_refused_everywhere() -> None:
    # output_layer_scale read current_sigma_b2 and ignored it when current_sigma_w2 was absent;
    # the engine refuses it now, so the CLI and the service (422 at /current_sigma_b2) do too
    import propcalc

    with pytest.raises(propcalc.InvalidParameterError, match=r"^current_sigma_b2 must be absent "
                                                             r"without current_sigma_w2"):
        propcalc.output_layer_scale(10, 1.0, current_sigma_b2=0.1)
    code, _, err = run("softmax", "10", "--margin", "--current-sigma-b2", "0.1")
    assert code == 2 and "current_sigma_b2 must be absent without current_sigma_w2" in err
    pytest.importorskip("flask")
    from propcalc_api import create_app

    r = create_app().test_client().post("/v1/softmax/output-scale",
                                        json={"n_classes": 10, "current_sigma_b2": 0.1})
    assert r.status_code == 422 and r.get_json()["errors"][0]["pointer"] == "/current_sigma_b2"
    both = propcalc.output_layer_scale(10, 1.0, current_sigma_w2=0.5, current_sigma_b2=0.1)
    assert both.to_dict() != propcalc.output_layer_scale(10, 1.0, current_sigma_w2=0.5).to_dict()


@pytest.mark.parametrize("kwargs, field", [(dict(momentum=0.5), "momentum"),
                                           (dict(scale_output=False), "scale_output")])
def test_training_options_without_a_loss_are_refused(kwargs: dict, field: str) -> None:
    # recommend read momentum and scale_output and ignored them when no loss was given
    import propcalc

    with pytest.raises(propcalc.InvalidParameterError, match=rf"^{field} must be .* when no loss "
                                                             r"is given \(give loss=\)"):
        propcalc.recommend("tanh", widths=[4, 4], **kwargs)
    assert propcalc.recommend("tanh", widths=[4, 4], momentum=0.0, scale_output=True).loss is None


@pytest.mark.parametrize("argv, start", [
    # the engine's field names (sigma_w2, keep_rate) are spelled otherwise on the command line
    (["report", "tanh", "-w", "-1"], "propcalc: error: --sigma-w2: sigma_w2 must be > 0, got -1.0"),
    (["dropout", "tanh", "-w", "1", "--keep-rate", "0"],
     "propcalc: error: --keep-rate: keep_rate must be in (0, 1]"),
    (["report", "tanh", "-w", "1", "--depth", "0"],  # same spelling: no prefix
     "propcalc: error: depth must be an integer >= 1, got 0"),
])
def test_engine_refusals_name_the_option_as_typed(argv: list[str], start: str) -> None:
    code, _, err = run(*argv)
    assert code == 2 and err.startswith(start)


@pytest.mark.parametrize("typed, name", [("Gelu", "gelu"), ("leaky-relu", "leaky_relu(slope=0.01)"),
                                         ("Hard-Tanh", "hard_tanh")])
def test_show_reads_builtin_names_in_any_spelling(typed: str, name: str) -> None:
    # 'show Gelu' answered "did you mean elu?", 'show leaky-relu' a formula error about 'leaky'
    code, out, err = run("show", typed)
    assert code == 0 and err == ""
    assert out.splitlines()[0].split() == ["activation", name]


def test_show_suggests_the_nearest_builtin() -> None:
    code, _, err = run("show", "gleu")
    assert code == 2 and "unknown activation 'gleu' (did you mean gelu?)" in err

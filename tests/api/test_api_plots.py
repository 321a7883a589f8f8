"""The image endpoints (/v1/plots/...): formats, negotiation, errors, budget, ETags, determinism.

The figures themselves are propcalc.output.plots' (tested in tests/test_plots.py); here the service
must hand them over faithfully: the body is the PNG or SVG that ``propcalc.output.plots.save_figure``
writes for the same call, chosen by ``format`` or the Accept header (RFC 9110, section 12.5.1),
406 when neither image type is acceptable (RFC 9110, section 15.5.7), strong ETags with 304 on
GET (RFC 9110, section 13.1.2), problem details (RFC 9457) for every error, the work budget
before any drawing, and the same bytes for the same request in any process. PNG files start
with the signature of the PNG specification (ISO/IEC 15948:2004, section 5.2) and carry the
image size in their IHDR chunk (section 11.2.2). Grids are tiny: a few seconds in all.
"""

from __future__ import annotations

import struct
import sys
import threading
import xml.etree.ElementTree as ET

import pytest
import requests

pytest.importorskip("matplotlib")

import propcalc  # noqa: E402
from propcalc.output import plots  # noqa: E402

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
SVG_NAMESPACE = "{http://www.w3.org/2000/svg}"
PROBLEM = "application/problem+json"
PHASE = "/v1/plots/phase-diagram"
SMALL_PHASE = {"activation": "relu", "n_sigma_w2": 5, "n_sigma_b2": 4}


def png_size(data: bytes) -> tuple[int, int]:
    """Width and height from the IHDR chunk (PNG specification, section 11.2.2)."""
    assert data.startswith(PNG_SIGNATURE) and data[12:16] == b"IHDR"
    return struct.unpack(">II", data[16:24])


def svg_ids(data: bytes) -> set[str]:
    root = ET.fromstring(data)
    assert root.tag == SVG_NAMESPACE + "svg"
    return {el.get("id") for el in root.iter() if el.get("id")}


def problem(resp, status: int) -> dict:
    assert resp.status_code == status, resp.get_data(as_text=True)[:500]
    assert resp.mimetype == PROBLEM
    body = resp.get_json(force=True)
    assert body["status"] == status and {"type", "title", "detail", "instance"} <= set(body)
    return body


def entries(body: dict) -> dict[str, str]:
    return {e.get("pointer", e.get("parameter")): e["detail"] for e in body["errors"]}


@pytest.fixture()
def fresh(make_client):
    """A client of an app whose image cache is off: every request draws."""
    return make_client(PLOT_CACHE_ENTRIES=0)


# ---------------------------------------------------------------------------------------------
# formats and negotiation
# ---------------------------------------------------------------------------------------------
def test_png_and_svg_by_format(client):
    png = client.post(PHASE, json={**SMALL_PHASE, "format": "png"})
    assert png.status_code == 200 and png.mimetype == "image/png"
    assert png_size(png.data) == (720, 520)  # 7.2 x 5.2 inches at 100 dpi
    svg = client.post(PHASE, json={**SMALL_PHASE, "format": "svg"})
    assert svg.status_code == 200 and svg.mimetype == "image/svg+xml"
    svg_ids(svg.data)
    for resp, ext in ((png, "png"), (svg, "svg")):
        assert resp.headers["Vary"] == "Accept"
        assert resp.headers["Content-Disposition"] == f'inline; filename="phase-diagram.{ext}"'
        assert resp.headers["ETag"]


@pytest.mark.parametrize("accept, mimetype", [
    (None, "image/png"), ("*/*", "image/png"), ("image/*", "image/png"),
    ("image/svg+xml", "image/svg+xml"), ("image/png", "image/png"),
    ("image/svg+xml;q=0.9, image/png;q=0.5", "image/svg+xml"),
    ("image/png;q=0, */*", "image/svg+xml"),
    ("text/html,application/xhtml+xml,application/xml;q=0.9,*/*;q=0.8", "image/png"),
])
def test_accept_header_chooses_without_format(client, accept, mimetype):
    headers = {} if accept is None else {"Accept": accept}
    resp = client.post(PHASE, json=SMALL_PHASE, headers=headers)
    assert resp.status_code == 200 and resp.mimetype == mimetype


@pytest.mark.parametrize("body, accept, fragment", [
    (SMALL_PHASE, "application/json", "allows neither of the image types"),
    (SMALL_PHASE, "image/webp", "allows neither of the image types"),
    ({**SMALL_PHASE, "format": "png"}, "image/svg+xml", "format 'png' is image/png, which"),
    ({**SMALL_PHASE, "format": "svg"}, "image/png", "format 'svg' is image/svg+xml, which"),
])
def test_406_for_an_unacceptable_accept_header(client, body, accept, fragment):
    resp = client.post(PHASE, json=body, headers={"Accept": accept})
    got = problem(resp, 406)
    assert got["type"] == "about:blank" and fragment in got["detail"]
    assert "image/png, image/svg+xml" in got["detail"]


def test_get_form_same_bytes_as_post_and_304(client):
    url = f"{PHASE}?activation=relu&n_sigma_w2=5&n_sigma_b2=4&format=svg"
    got = client.get(url)
    assert got.status_code == 200 and got.mimetype == "image/svg+xml"
    assert got.headers["Cache-Control"].startswith("public, max-age=")
    post = client.post(PHASE, json={**SMALL_PHASE, "format": "svg", "q_input": 1})
    assert post.data == got.data and post.headers["ETag"] == got.headers["ETag"]
    assert post.headers["X-Propcalc-Cache"] == "hit"  # GET and POST share the cache entry
    again = client.get(url, headers={"If-None-Match": got.headers["ETag"]})
    assert again.status_code == 304 and again.data == b""
    head = client.head(url)
    assert head.status_code == 200 and head.data == b"" and head.headers["ETag"]
    # the Accept header of a GET chooses the format too
    by_accept = client.get(f"{PHASE}?activation=relu&n_sigma_w2=5&n_sigma_b2=4",
                           headers={"Accept": "image/svg+xml"})
    assert by_accept.data == got.data


def test_dpi_sets_png_pixels_and_svg_ignores_it(make_client):
    c = make_client()
    assert png_size(c.post(PHASE, json={**SMALL_PHASE, "dpi": 50}).data) == (360, 260)
    a = c.post(PHASE, json={**SMALL_PHASE, "format": "svg", "dpi": 50})
    b = c.post(PHASE, json={**SMALL_PHASE, "format": "svg", "dpi": 200})
    assert a.data == b.data and b.headers["X-Propcalc-Cache"] == "hit"


# ---------------------------------------------------------------------------------------------
# every image is the engine's figure, and the point is drawn only when given
# ---------------------------------------------------------------------------------------------
def test_bytes_are_the_engines_figure(client):
    act = propcalc.activation("tanh")
    resp = client.post("/v1/plots/variance-map", json={
        "activation": "tanh", "sigma_w2": 1.5, "sigma_b2": 0.05, "n_points": 20,
        "iterations": 3, "format": "svg"})
    prop = propcalc.propagation(act, 1.5, 0.05)
    want = plots.save_figure(plots.plot_variance_map(act, prop, n_points=20, iterations=3),
                             None, "svg")
    assert resp.data == want


@pytest.mark.parametrize("path, body", [
    ("/v1/plots/variance-map", {"activation": "tanh", "sigma_w2": 1.5, "n_points": 20}),
    ("/v1/plots/correlation-map", {"activation": "tanh", "sigma_w2": 2.5, "sigma_b2": 0.05,
                                   "n_points": 9, "c_min": -0.5}),
    ("/v1/plots/depth-scales", {"activation": "relu", "sigma_b2": 0.0, "sigma_w2": 1.5,
                                "n_points": 9, "sigma_w2_min": 0.5, "sigma_w2_max": 3,
                                "depth": 30, "xi_max": 100}),
    (PHASE, {**SMALL_PHASE, "sigma_w2": 2.5, "sigma_b2": 0.1, "depth": 40}),
])
def test_each_image_marks_the_users_point(client, path, body):
    resp = client.post(path, json={**body, "format": "svg"})
    assert resp.status_code == 200, resp.get_data(as_text=True)[:300]
    assert plots.USER_POINT_GID in svg_ids(resp.data)


def test_no_point_no_marker(client):
    resp = client.post(PHASE, json={**SMALL_PHASE, "format": "svg"})
    assert plots.USER_POINT_GID not in svg_ids(resp.data)


def test_formula_activation(client):
    resp = client.post(PHASE, json={"activation": {"formula": "x * sigmoid(beta * x)",
                                                   "params": {"beta": 1.5}},
                                    "n_sigma_w2": 4, "n_sigma_b2": 3})
    assert resp.status_code == 200 and resp.data.startswith(PNG_SIGNATURE)


# ---------------------------------------------------------------------------------------------
# determinism: same request, same bytes, in any app, thread or process
# ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("fmt", ["png", "svg"])
def test_same_request_same_bytes_in_two_apps(make_client, fmt):
    body = {**SMALL_PHASE, "sigma_w2": 2.5, "format": fmt}
    a = make_client(PLOT_CACHE_ENTRIES=0).post(PHASE, json=body)
    b = make_client(PLOT_CACHE_ENTRIES=0).post(PHASE, json=body)
    assert a.headers["X-Propcalc-Cache"] == b.headers["X-Propcalc-Cache"] == "miss"
    assert a.data == b.data and a.headers["ETag"] == b.headers["ETag"]


def test_same_bytes_from_concurrent_threads(fresh):
    body = {"activation": "relu", "sigma_w2": 2.0, "n_points": 12, "format": "svg"}
    out: list[bytes] = []

    def draw() -> None:
        out.append(fresh.application.test_client().post("/v1/plots/variance-map",
                                                        json=body).data)

    threads = [threading.Thread(target=draw) for _ in range(3)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert len(out) == 3 and len(set(out)) == 1 and out[0].lstrip().startswith(b"<?xml")


def test_live_server_same_bytes_as_in_process(live_server, make_client):
    body = {**SMALL_PHASE, "sigma_w2": 2.2, "sigma_b2": 0.05, "format": "png"}
    with requests.Session() as s:
        first = s.post(live_server.url + PHASE, json=body, timeout=30)
        second = s.post(live_server.url + PHASE, json=body, timeout=30)
        url = live_server.url + PHASE + "?activation=relu&n_sigma_w2=5&n_sigma_b2=4&format=svg"
        svg = s.get(url, timeout=30)
        cached = s.get(url, headers={"If-None-Match": svg.headers["ETag"]}, timeout=30)
    assert first.status_code == 200 and first.headers["Content-Type"] == "image/png"
    assert first.content == second.content and first.headers["ETag"] == second.headers["ETag"]
    assert cached.status_code in (200, 304)  # 304 from the same worker, 200 (same ETag) else
    assert cached.headers["ETag"] == svg.headers["ETag"]
    # a gunicorn worker and this process draw the same bytes
    here = make_client(PLOT_CACHE_ENTRIES=0)
    assert here.post(PHASE, json=body).data == first.content
    assert here.get(PHASE + "?activation=relu&n_sigma_w2=5&n_sigma_b2=4&format=svg"
                    ).data == svg.content


# ---------------------------------------------------------------------------------------------
# 422: one entry per bad member
# ---------------------------------------------------------------------------------------------
@pytest.mark.parametrize("path, body, want", [
    (PHASE, {"activation": "relu", "n_sigma_w2": 2, "format": "jpg", "dpi": 1000},
     {"/n_sigma_w2": "must be in [3, 2000], got 2", "/format": "must be one of png, svg",
      "/dpi": "must be in [50, 300], got 1000"}),
    (PHASE, {"activation": "relu", "sigma_b2": 0.1, "sigma_w2_min": 3, "sigma_w2_max": 1,
             "sigma_b2_max": 1},
     {"/sigma_w2": "is required when sigma_b2 is given",
      "/sigma_w2_max": "must be > sigma_w2_min (3), got 1",
      "/sigma_b2_min": "is required when sigma_b2_max is given"}),
    (PHASE, {"activation": "tanhh", "extra": 1},
     {"/activation": "must be one of linear", "/extra": "is not a field here"}),
    ("/v1/plots/variance-map", {"activation": "tanh", "q_max": 0, "iterations": 101},
     {"/sigma_w2": "is required", "/q_max": "must be in (0, 100000000], got 0",
      "/iterations": "must be in [0, 100], got 101"}),
    ("/v1/plots/correlation-map", {"activation": "tanh", "sigma_w2": 1, "c_min": 1},
     {"/c_min": "must be in [-1, 1), got 1"}),
    ("/v1/plots/depth-scales", {"activation": "tanh", "n_points": 4},
     {"/n_points": "must be in [5, 2000], got 4"}),
    # members across fields are checked once every member is valid on its own
    ("/v1/plots/depth-scales", {"activation": "tanh", "sigma_w2_min": 1},
     {"/sigma_w2_max": "is required when sigma_w2_min is given"}),
])
def test_422_points_at_each_bad_member(client, path, body, want):
    got = entries(problem(client.post(path, json=body), 422))
    for pointer, fragment in want.items():
        assert pointer in got and fragment in got[pointer], (pointer, got)


def test_422_on_a_get_form_names_the_parameters(client):
    body = problem(client.get(f"{PHASE}?activation=relu&n_sigma_w2=2&zzz=1"), 422)
    got = entries(body)
    assert "must be in [3, 2000], got 2" in got["n_sigma_w2"]
    assert "is not a field here" in got["zzz"]
    # formulas need the POST form
    got = entries(problem(client.get(f"{PHASE}?activation=x"), 422))
    assert got["activation"].startswith("must be one of linear")


# ---------------------------------------------------------------------------------------------
# the work budget (docs/service.md: the image 300 units, 1 per grid point, 5 with a jump,
# 200 for a point, formulas double; the correlation map 200 + k(q*) per sample)
# ---------------------------------------------------------------------------------------------
def test_budget_refuses_a_grid_before_drawing(make_client, monkeypatch):
    def no_drawing(*args, **kwargs):
        raise AssertionError("drew although the request is over the budget")

    monkeypatch.setattr(plots, "plot_phase_diagram", no_drawing)
    c = make_client(WORK_BUDGET=319.0)  # a 5 x 4 grid costs 300 + 20 = 320
    body = problem(c.post(PHASE, json=SMALL_PHASE), 422)
    assert body["type"].endswith("work-budget-exceeded")
    assert body["limit"] == {"name": "WORK_BUDGET", "value": 319.0}
    assert body["estimated_cost"] == 320.0
    assert entries(body) == {"/n_sigma_w2": "too much work for one request (a phase diagram of "
                                            "5 x 4 grid points): ask for at most 19 grid points "
                                            "(n_sigma_w2 x n_sigma_b2), e.g. 4 x 4"}
    # step jumps: 5 units a point; a point adds 200; a formula doubles everything
    c = make_client(WORK_BUDGET=1e6)
    cost = {"activation": "step", "sigma_w2": 1.0, "n_sigma_w2": 2000, "n_sigma_b2": 2000}
    assert problem(c.post(PHASE, json=cost), 422)["estimated_cost"] == 300 + 200 + 5 * 4e6
    formula = {"activation": {"formula": "tanh(x)"}, "n_sigma_w2": 2000, "n_sigma_b2": 2000}
    assert problem(c.post(PHASE, json=formula), 422)["estimated_cost"] == 2 * (300 + 4e6)


def test_budget_of_the_other_images(make_client):
    c = make_client()  # WORK_BUDGET 3000
    body = problem(c.post("/v1/plots/correlation-map", json={
        "activation": "tanh", "sigma_w2": 1.5, "n_points": 2000}), 422)
    # q* = 0.287 < 1, so k(q*) = 6: 300 + 200 + 6 * 2000
    assert body["estimated_cost"] == 12500.0
    assert entries(body)["/n_points"].endswith("ask for at most 416 samples")
    body = problem(c.post("/v1/plots/depth-scales", json={"activation": "step",
                                                          "n_points": 2000}), 422)
    assert body["estimated_cost"] == 300 + 150 + 5 * (2000 + 28)
    assert "/n_points" in entries(body)


def test_png_above_100_dpi_costs_more(make_client):
    c = make_client(WORK_BUDGET=1.0)
    assert problem(c.post(PHASE, json={**SMALL_PHASE, "dpi": 300}),
                   422)["estimated_cost"] == 300 + 40 * 8 + 20
    assert problem(c.post(PHASE, json={**SMALL_PHASE, "format": "svg", "dpi": 300}),
                   422)["estimated_cost"] == 320.0


# ---------------------------------------------------------------------------------------------
# caching, matplotlib missing, the document
# ---------------------------------------------------------------------------------------------
def test_image_cache_is_bounded_in_bytes(make_client):
    c = make_client(PLOT_CACHE_BYTES=120_000)
    sizes = []
    for sw in (1.5, 2.5, 3.5):
        resp = c.post(PHASE, json={**SMALL_PHASE, "sigma_w2": sw, "format": "svg"})
        assert resp.headers["X-Propcalc-Cache"] == "miss"
        sizes.append(len(resp.data))
    assert sum(sizes) > 120_000
    st = c.application.extensions["propcalc_api"]
    stats = st.images.stats()
    assert stats.bytes <= 120_000 and 1 <= stats.entries < 3
    assert st.results.stats().entries == 0  # images do not go into the JSON cache


def test_501_without_matplotlib(make_client, monkeypatch):
    monkeypatch.setitem(sys.modules, "propcalc.output.plots", None)  # importing it now fails
    c = make_client()
    body = problem(c.post(PHASE, json=SMALL_PHASE), 501)
    # from the checkout, as the README's set-up installs it (issue 12 section 4)
    assert 'python3 -m pip install -e ".[plot]" in the propcalc checkout' in body["detail"]
    assert c.post("/v1/propagation", json={"activation": "tanh", "sigma_w2": 1}
                  ).status_code == 200  # the JSON endpoints do not need it


def test_openapi_documents_the_images(client, strict_json):
    doc = strict_json(client.get("/openapi.json").data)
    for path in ("phase-diagram", "variance-map", "correlation-map", "depth-scales"):
        ops = doc["paths"][f"/v1/plots/{path}"]
        assert set(ops) == {"get", "post"}
        for op in ops.values():
            ok = op["responses"]["200"]
            assert ok["content"]["image/png"]["schema"] == {
                "type": "string", "format": "binary", "contentMediaType": "image/png"}
            assert ok["content"]["image/svg+xml"]["schema"]["contentMediaType"] == "image/svg+xml"
            assert {"ETag", "Vary", "X-Propcalc-Cache"} <= set(ok["headers"])
            assert {"406", "422", "500", "501"} <= set(op["responses"])
        post = ops["post"]
        ref = post["requestBody"]["content"]["application/json"]["schema"]["$ref"]
        schema = doc["components"]["schemas"][ref.rsplit("/", 1)[1]]
        assert schema["properties"]["format"]["enum"] == ["png", "svg"]
        assert schema["properties"]["dpi"]["maximum"] == 300
        names = {p["name"] for p in ops["get"]["parameters"] if "name" in p}
        assert {"activation", "format", "dpi"} <= names
    props = doc["components"]["schemas"]["PhaseDiagramPlotRequest"]["properties"]
    assert props["n_sigma_w2"]["maximum"] == 2000 and props["n_sigma_w2"]["default"] == 41
    assert doc["info"]["x-limits"]["ranges"]["plot_dpi_max"] == 300

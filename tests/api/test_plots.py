"""Figures: content, not only status. Through a real uvicorn server with the embedded worker.

Reference values come from the JSON routes (``/cv``, ``/path``) and numpy, never from the figure code:
the SVG must name the chosen λ and basis the CV table names, have one series per basis setting (× l1
ratio), and its bands must be mean ± s/√splits with s the sample standard deviation of the split values
(the standard error of a mean; Hastie, Tibshirani & Friedman, ESL 2nd ed., §7.10).
"""

from __future__ import annotations

import copy
import struct
import xml.etree.ElementTree as ET

import httpx
import numpy as np
import pytest

from service.api.rendering import figures as plots

SVG_NS = "{http://www.w3.org/2000/svg}"
UNITS = {"energy_kwh": "kWh", "flow_lps": "L/s", "head_m": "m"}


def _spec(kit) -> dict:
    spec = copy.deepcopy(kit.SPEC)
    spec["units"] = dict(UNITS)
    return spec


@pytest.fixture(scope="module")
def trained(tmp_path_factory, kit):
    """A service with model 'pump-plot' (v1 live, v2 published but not promoted) and 'pump-net' (elastic net)."""
    with kit.service(tmp_path_factory.mktemp("plots"), worker=True) as (base, store, settings):
        jobs = []
        for name, table, spec, promote in (
            ("pump-plot", kit.pump_table(300, seed=1), _spec(kit), "always"),
            ("pump-plot", kit.pump_table(300, seed=2), _spec(kit), "never"),
        ):
            r = httpx.post(f"{base}/v1/models/{name}/trainings", timeout=60,
                           json={"data": {"rows": kit.as_rows(table)}, "spec": spec, "promote": promote})
            assert r.status_code == 202, r.text
            jobs.append(kit.wait_job(base, r.json()["id"]))
        net = _spec(kit)
        net["bases"] = [{"kind": "linear"}, {"kind": "polynomial", "degrees": [2]}]
        net["penalty"] = {"kind": "elastic_net", "strengths": {"min": 1e-3, "max": 10, "count": 6}, "l1_ratios": [0.5, 1.0]}
        r = httpx.post(f"{base}/v1/models/pump-net/trainings", timeout=60,
                       json={"data": {"rows": kit.as_rows(kit.pump_table(200, seed=3))}, "spec": net, "promote": "always"})
        jobs.append(kit.wait_job(base, r.json()["id"]))
        assert [j["state"] for j in jobs] == ["succeeded"] * 3, jobs
        yield base, store


def _svg(base: str, path: str) -> tuple[httpx.Response, ET.Element, str]:
    r = httpx.get(f"{base}{path}", timeout=60)
    assert r.status_code == 200, r.text
    assert r.headers["content-type"].startswith("image/svg+xml")
    root = ET.fromstring(r.content)  # parses as XML
    assert root.tag == f"{SVG_NS}svg"
    text = " ".join(t for t in root.itertext())
    return r, root, text


def _ids(root: ET.Element, prefix: str) -> list[str]:
    return sorted({el.get("id") for el in root.iter() if el.get("id") and el.get("id").startswith(prefix)})


def _basis_words(basis: dict) -> str:
    # Independent of service.api.plots: what a reader must find for each basis kind.
    if basis["kind"] == "polynomial":
        return f"degree {basis['degree']}"
    if basis["kind"] == "rbf":
        return f"width {basis['width']:g}"
    return "linear"


def test_cv_svg_names_the_chosen_point_and_draws_one_series_per_basis_setting(trained):
    base, _ = trained
    cv = httpx.get(f"{base}/v1/models/pump-plot/versions/1/cv?view=all").json()
    chosen = cv["chosen"]
    settings = {tuple(sorted(row["basis"].items())) for row in cv["table"]}
    assert len(settings) == 3  # linear, polynomial 2 and 3 in the spec

    r, root, text = _svg(base, "/v1/models/pump-plot/versions/1/plots/cv")
    assert len(_ids(root, "cv-series-")) == len(settings)
    assert len(_ids(root, "cv-band-")) == len(settings)
    strength = f"λ = {chosen['penalty']['strength']:.3g}"
    assert strength in text and _basis_words(chosen["basis"]) in text
    assert _ids(root, "chosen-point") == ["chosen-point"]
    # The titled element carries the choice too (tooltip and screen readers).
    desc = root.find(f"{SVG_NS}desc").text
    assert strength in desc and _basis_words(chosen["basis"]) in desc
    assert "pump-plot" in root.find(f"{SVG_NS}title").text
    # Axis labels carry the units from the spec.
    assert "CV RMSE (kWh)" in text and "penalty strength λ" in text


def test_cv_one_standard_error_choice_is_marked_when_it_differs(trained):
    base, store = trained
    body = plots.engine_body(store.get_manifest("pump-plot", 1))
    onese, chosen = body["one_standard_error"], body["chosen"]
    # Precondition of this fixture (noise 2 kWh on 300 rows): the rule picks a larger λ than the minimum.
    assert onese["penalty"]["strength"] > chosen["penalty"]["strength"]
    _, root, text = _svg(base, "/v1/models/pump-plot/versions/1/plots/cv")
    assert _ids(root, "one-se-point") == ["one-se-point"]
    assert f"λ = {onese['penalty']['strength']:.3g}" in text
    # When the two coincide, there is no second marker.
    same = {**body, "one_standard_error": {**chosen}}
    fig = plots.cv_figure(same)
    assert not [a for a in fig.axes[0].get_children() if a.get_gid() == "one-se-point"]


def test_cv_series_and_bands_match_the_table(trained):
    base, store = trained
    table = httpx.get(f"{base}/v1/models/pump-plot/versions/1/cv?view=all").json()["table"]
    body = plots.engine_body(store.get_manifest("pump-plot", 1))
    fig = plots.cv_figure(body)
    ax = fig.axes[0]
    lines = {ln.get_label(): ln for ln in ax.get_lines() if (ln.get_gid() or "").startswith("cv-series-")}
    bands = {c.get_gid(): c for c in ax.collections if (c.get_gid() or "").startswith("cv-band-")}
    by_basis: dict[str, list[dict]] = {}
    for row in table:
        by_basis.setdefault(_basis_words(row["basis"]), []).append(row)
    assert len(lines) == len(by_basis) == len(bands)
    for label, line in lines.items():
        rows = sorted(next(v for k, v in by_basis.items() if k in label), key=lambda r: r["strength"])
        np.testing.assert_allclose(line.get_xdata(), [r["strength"] for r in rows], rtol=0, atol=0)
        np.testing.assert_allclose(line.get_ydata(), [r["mean"] for r in rows], rtol=0, atol=0)
        i = line.get_gid().removeprefix("cv-series-")
        verts = bands[f"cv-band-{i}"].get_paths()[0].vertices
        for r in rows:
            # the standard error the engine recorded for the row (the one its one-SE rule uses):
            # sample standard deviation (ddof = 1) of the split values over √splits (ESL §7.10)
            se = np.std(r["split_values"], ddof=1) / np.sqrt(len(r["split_values"]))
            assert r["se"] == pytest.approx(se, rel=1e-12)
            ys = verts[np.isclose(verts[:, 0], r["strength"], rtol=1e-12), 1]
            np.testing.assert_allclose([ys.min(), ys.max()], [r["mean"] - se, r["mean"] + se], rtol=1e-9)


def test_elastic_net_has_one_series_per_setting_and_l1_ratio(trained):
    base, store = trained
    cv = httpx.get(f"{base}/v1/models/pump-net/versions/1/cv?view=all").json()
    combos = {(tuple(sorted(r["basis"].items())), r["l1_ratio"]) for r in cv["table"]}
    assert len(combos) == 2 * 2
    _, root, text = _svg(base, "/v1/models/pump-net/versions/1/plots/cv")
    assert len(_ids(root, "cv-series-")) == 4
    assert "l1 ratio 0.5" in text and "l1 ratio 1" in text
    # Read in greyscale: within a basis setting the l1 ratios differ by line style; across settings by marker.
    fig = plots.cv_figure(plots.engine_body(store.get_manifest("pump-net", 1)))
    lines = [ln for ln in fig.axes[0].get_lines() if (ln.get_gid() or "").startswith("cv-series-")]
    for basis in ("linear", "polynomial degree 2"):
        mine = [ln for ln in lines if ln.get_label().startswith(basis + ",")]
        assert len(mine) == 2 and len({ln.get_linestyle() for ln in mine}) == 2
        assert len({ln.get_marker() for ln in mine}) == 1
    assert len({ln.get_marker() for ln in lines}) == 2


def test_path_figure_marks_the_chosen_strength_and_names_the_largest_terms(trained):
    base, _ = trained
    path = httpx.get(f"{base}/v1/models/pump-plot/versions/1/path").json()
    lam = path["chosen"]["penalty"]["strength"]
    p = path["path"]
    _, root, text = _svg(base, "/v1/models/pump-plot/versions/1/plots/path")
    assert f"chosen λ = {lam:.3g}" in text
    assert _ids(root, "chosen-strength") == ["chosen-strength"]
    assert len(_ids(root, "path-term-")) == len(p["terms"])
    # The largest terms at the chosen strength, found here with numpy, are named in the legend.
    strengths = np.asarray(p["strengths"])
    at = int(np.argmin(np.abs(np.log(strengths) - np.log(lam))))
    coef = np.abs(np.asarray(p["coefficients"])[at])
    for j in np.argsort(-coef)[:3]:
        assert p["terms"][j] in text
    assert "(kWh)" in text


def test_residual_figure_draws_every_sampled_row(trained):
    base, store = trained
    from service.store import artifact

    manifest = store.get_manifest("pump-plot", 1)
    arrays, _ = artifact.read_arrays(store.root / "pump-plot" / "1", manifest, name="pump-plot", version=1)
    pred, obs = arrays["oof_predicted"], arrays["oof_observed"]
    assert pred.size == 300
    fig = plots.residuals_figure(plots.engine_body(manifest), pred, obs)
    left, right = fig.axes[:2]
    pts = next(c for c in left.collections if c.get_gid() == "residuals-scatter-observed").get_offsets()
    np.testing.assert_array_equal(np.asarray(pts), np.column_stack([obs, pred]))
    res = next(c for c in right.collections if c.get_gid() == "residuals-scatter-predicted").get_offsets()
    np.testing.assert_allclose(np.asarray(res)[:, 1], obs - pred, rtol=0, atol=0)
    _, root, text = _svg(base, "/v1/models/pump-plot/versions/1/plots/residuals")
    assert {"identity-line", "residual-trend"} <= set(_ids(root, ""))
    rmse = float(np.sqrt(np.mean((obs - pred) ** 2)))
    assert f"RMSE of the chosen setting {rmse:.4g} kWh" in text
    assert "observed energy_kwh (kWh)" in text


def test_history_marks_the_live_version_among_all_versions(trained):
    base, _ = trained
    versions = httpx.get(f"{base}/v1/models/pump-plot/versions").json()
    assert versions["live_version"] == 1 and len(versions["versions"]) == 2
    _, root, text = _svg(base, "/v1/models/pump-plot/plots/history")
    assert _ids(root, "live-version") == ["live-version"]
    assert "live: v1" in text
    for v in versions["versions"]:
        assert f"history-version-{v['version']}" in _ids(root, "history-version-")
        chosen = v["summary"]["chosen"]
        assert f"v{v['version']}: " in root.find(f"{SVG_NS}desc").text
        assert f"λ = {chosen['penalty']['strength']:.3g}" in root.find(f"{SVG_NS}desc").text


def test_png_on_request(trained):
    base, _ = trained
    for kind in ("cv", "path", "residuals"):
        r = httpx.get(f"{base}/v1/models/pump-plot/versions/1/plots/{kind}", params={"format": "png"}, timeout=60)
        assert r.status_code == 200 and r.headers["content-type"] == "image/png"
        assert r.content[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (PNG specification, section 5.2)
        width, height = struct.unpack(">II", r.content[16:24])  # IHDR chunk comes first (section 11.2.2)
        assert width > 400 and height > 300
    r = httpx.get(f"{base}/v1/models/pump-plot/plots/history?format=PNG")
    assert r.status_code == 200 and r.content[:4] == b"\x89PNG"


def test_unknown_format_is_a_problem_naming_the_allowed_values(trained):
    base, _ = trained
    r = httpx.get(f"{base}/v1/models/pump-plot/versions/1/plots/cv", params={"format": "gif"})
    assert r.status_code == 422
    assert r.headers["content-type"] == "application/problem+json"
    body = r.json()
    assert body["allowed"] == ["svg", "png"] and body["received"] == "gif"
    assert "'gif'" in body["detail"] and "format=svg" in body["detail"] and "format=png" in body["detail"]
    assert body["errors"][0]["field"] == "query.format"
    r = httpx.get(f"{base}/v1/models/pump-plot/plots/history", params={"format": "jpeg"})
    assert r.status_code == 422 and r.json()["allowed"] == ["svg", "png"]


def test_unknown_version_or_model_is_a_404_problem(trained):
    base, _ = trained
    r = httpx.get(f"{base}/v1/models/pump-plot/versions/7/plots/cv")
    assert r.status_code == 404 and r.headers["content-type"] == "application/problem+json"
    assert r.json()["type"] == "/problems/not-found"
    assert "no version 7" in r.json()["detail"] and "newest version number is 2" in r.json()["detail"]
    r = httpx.get(f"{base}/v1/models/no-such-pump/plots/history")
    assert r.status_code == 404 and "no-such-pump" in r.json()["detail"]
    r = httpx.get(f"{base}/v1/models/pump-plot/versions/0/plots/path")
    assert r.status_code == 422


def test_rendered_figures_are_reused_and_revalidated(trained):
    base, _ = trained
    url = f"{base}/v1/models/pump-plot/versions/2/plots/cv"
    a = httpx.get(url)
    b = httpx.get(url)
    assert a.content == b.content and a.headers["etag"] == b.headers["etag"]
    assert httpx.get(url, headers={"If-None-Match": a.headers["etag"]}).status_code == 304
    assert httpx.get(url + "?format=png").headers["etag"] != a.headers["etag"]
    # Version 2 is a different fit: its figure differs from version 1's.
    assert httpx.get(f"{base}/v1/models/pump-plot/versions/1/plots/cv").content != a.content


def test_concurrent_requests_get_the_same_figure(trained):
    base, _ = trained
    from concurrent.futures import ThreadPoolExecutor

    url = f"{base}/v1/models/pump-net/versions/1/plots/residuals"
    with ThreadPoolExecutor(8) as pool:
        answers = list(pool.map(lambda _: httpx.get(url, timeout=120), range(8)))
    assert [a.status_code for a in answers] == [200] * 8
    assert len({a.content for a in answers}) == 1


def test_same_inputs_give_the_same_bytes(trained):
    _, store = trained
    body = plots.engine_body(store.get_manifest("pump-plot", 1))
    a = plots.render(plots.cv_figure(body), "svg", title="t", description="d")
    b = plots.render(plots.cv_figure(body), "svg", title="t", description="d")
    assert a == b  # no date and no random ids in the SVG, so an ETag stays valid across processes
    assert plots.render(plots.cv_figure(body), "png", title="t", description="d") == \
        plots.render(plots.cv_figure(body), "png", title="t", description="d")


def test_format_values_are_documented(trained):
    base, _ = trained
    doc = httpx.get(f"{base}/openapi.json").json()
    params = doc["paths"]["/v1/models/{name}/versions/{version}/plots/cv"]["get"]["parameters"]
    fmt = next(p for p in params if p["name"] == "format")
    named = fmt["schema"]["$ref"].rsplit("/", 1)[1]  # one named enum shared by every figure route
    assert named == "PlotFormat" and fmt["schema"]["default"] == "svg"
    assert doc["components"]["schemas"][named]["enum"] == ["svg", "png"]


def test_plot_cache_is_bounded():
    from service.api.routes.plots import PlotCache

    cache = PlotCache(max_bytes=10)
    made = []
    for key in ("a", "b", "c"):
        cache.get_or_render((key,), lambda k=key: made.append(k) or b"12345")
    assert made == ["a", "b", "c"]
    cache.get_or_render(("c",), lambda: made.append("again") or b"x")
    assert made == ["a", "b", "c"] and cache.hits == 1
    cache.get_or_render(("a",), lambda: made.append("a2") or b"12345")  # "a" was dropped to stay under 10 bytes
    assert made[-1] == "a2"


def test_plots_need_a_read_key_when_keys_exist(tmp_path, kit):
    with kit.service(tmp_path, worker=True) as (base, store, _):
        r = httpx.post(f"{base}/v1/models/pump-key/trainings", timeout=60,
                       json={"data": {"rows": kit.as_rows(kit.pump_table(150, seed=4))}, "spec": _spec(kit)})
        assert kit.wait_job(base, r.json()["id"])["state"] == "succeeded"
        _, reader = store.keys.create(["predict"], "dashboard")
        url = f"{base}/v1/models/pump-key/versions/1/plots/cv"
        r = httpx.get(url)
        assert r.status_code == 401 and r.headers["content-type"] == "application/problem+json"
        assert "Authorization: Bearer" in r.json()["detail"]
        assert httpx.get(url, headers={"Authorization": "Bearer wrong"}).status_code == 401
        assert httpx.get(url, headers={"Authorization": f"Bearer {reader}"}).status_code == 200
        # The overview's sign-in cookie works for reads (the page embeds these figures) ...
        assert httpx.get(url, cookies={"tikhon_key": reader}).status_code == 200
        assert httpx.get(f"{base}/v1/models/pump-key/plots/history", cookies={"tikhon_key": reader}).status_code == 200
        assert httpx.get(url, cookies={"tikhon_key": "wrong"}).status_code == 401
        # ... and never for a change: a cookie alone cannot start a training job.
        r = httpx.post(f"{base}/v1/models/pump-key/trainings", cookies={"tikhon_key": reader},
                       json={"data": {"rows": kit.as_rows(kit.pump_table(50, seed=5))}})
        assert r.status_code == 401

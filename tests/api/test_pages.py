"""The HTML overview over a real uvicorn server: what it shows, that it escapes, and its sign-in."""

from __future__ import annotations

import copy
import html
from html.parser import HTMLParser

import httpx
import pytest

UNITS = {"energy_kwh": "kWh", "flow_lps": "L/s", "head_m": "m"}
EVIL = '<script>alert("x")</script> & "quotes"'


class _Collect(HTMLParser):
    """Parses the page (fails the test on nothing, but collects tags so checks can look at real elements)."""

    def __init__(self):
        super().__init__()
        self.tags: list[tuple[str, dict]] = []
        self.scripts: list[str] = []
        self._in_script = False

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))
        self._in_script = tag == "script"

    def handle_data(self, data):
        if self._in_script and data.strip():
            self.scripts.append(data)

    def handle_endtag(self, tag):
        self._in_script = False


def parse(text: str) -> _Collect:
    p = _Collect()
    p.feed(text)
    return p


@pytest.fixture(scope="module")
def open_service(tmp_path_factory, kit):
    """No keys; model 'pump-page' with v1 (live) and v2 made live by hand with a reason full of markup."""
    with kit.service(tmp_path_factory.mktemp("pages"), worker=True) as (base, store, _):
        spec = copy.deepcopy(kit.SPEC)
        spec["units"] = dict(UNITS)
        spec["bases"] = [{"kind": "linear"}, {"kind": "polynomial", "degrees": [2, 3]}]
        # v2's grid holds only strong penalties (100 to 10^4 on standardized terms), so its smallest strength
        # wins and the engine warns that the optimum is on the edge of the grid.
        edge = copy.deepcopy(spec)
        edge["penalty"] = {"kind": "l2", "strengths": {"min": 100.0, "max": 1e4, "count": 5}}
        for seed, promote, sp in ((1, "always", spec), (2, "never", edge)):
            r = httpx.post(f"{base}/v1/models/pump-page/trainings", timeout=60,
                           json={"data": {"rows": kit.as_rows(kit.pump_table(250, seed=seed))}, "spec": sp,
                                 "promote": promote})
            assert kit.wait_job(base, r.json()["id"])["state"] == "succeeded"
        r = httpx.put(f"{base}/v1/models/pump-page/live", json={"version": 2, "reason": EVIL})
        assert r.status_code == 200, r.text
        yield base, store


def test_overview_lists_models_live_version_and_jobs(open_service):
    base, store = open_service
    r = httpx.get(f"{base}/")
    assert r.status_code == 200 and r.headers["content-type"].startswith("text/html")
    assert "script-src 'self'" in r.headers["content-security-policy"]
    page = parse(r.text)
    assert not page.scripts, "no inline script (the CSP forbids it)"
    links = [a.get("href") for t, a in page.tags if t == "a"]
    assert "/models/pump-page" in links
    live = store.get_version("pump-page", 2)["summary"]["chosen"]
    assert f"λ = {live['penalty']['strength']:.3g}" in r.text  # the live version's chosen point
    assert "<td>v2</td>" in r.text
    jobs = store.jobs.list(name="pump-page")
    assert len(jobs) == 2
    for j in jobs:
        assert f'data-job="{j["id"]}"' in r.text
    assert r.text.count("state-succeeded") >= 2
    # The table that the script refreshes says where it polls.
    assert ("section", {"class": "panel", "id": "jobs", "data-source": "/v1/trainings", "data-limit": "15",
                        "data-model": "", "data-deleted": "[]"}) in page.tags


def test_model_page_shows_choice_warnings_figures_and_history(open_service):
    base, store = open_service
    r = httpx.get(f"{base}/models/pump-page")
    assert r.status_code == 200
    manifest = store.get_manifest("pump-page", 2)["training"]
    chosen = manifest["chosen"]
    assert "live: v2" in r.text
    assert f"λ = {chosen['penalty']['strength']:.3g}" in r.text
    exact = chosen["penalty"]["strength"]
    if float(f"{exact:.3g}") != exact:  # the exact value too, only when the rounded one differs from it
        assert f"(exactly {exact!r})" in r.text
    else:
        assert "(exactly " not in r.text
    assert "energy_kwh (kWh)" in r.text and "flow_lps (L/s)" in r.text
    # v2's grid: 5 strengths from 100 to 10^4, bases linear and polynomial 2 and 3 (the fixture's spec).
    assert "λ from 100 to 1e+04 (5 values) × 3 basis settings" in r.text
    links = [a.get("href") for t, a in parse(r.text).tags if t == "a"]
    for href in ("/v1/models/pump-page/versions/2", "/v1/models/pump-page/versions/2/cv",
                 "/v1/models/pump-page/versions/2/path"):
        assert href in links and httpx.get(f"{base}{href}").status_code == 200
    imgs = [a["src"] for t, a in parse(r.text).tags if t == "img"]
    assert imgs == [f"/v1/models/pump-page/versions/2/plots/{k}" for k in ("cv", "path", "residuals")] + [
        f"/v1/models/pump-page/plots/{k}?version=2" for k in ("drift", "outside-range", "live-error")] + [
        "/v1/models/pump-page/plots/history"]
    assert manifest["warnings"] and all(w in html.unescape(r.text) for w in manifest["warnings"])
    # Promotions with their reasons, escaped: the markup in the reason is shown as text, never run.
    assert EVIL in html.unescape(r.text)
    assert "<script>alert" not in r.text
    assert "the model had no live version" in r.text  # the worker's reason for v1


def test_model_page_warns_about_an_edge_of_the_grid(open_service):
    base, store = open_service
    edge = store.get_manifest("pump-page", 2)["training"]
    assert edge["chosen"]["penalty"]["strength"] == 100.0
    page = httpx.get(f"{base}/models/pump-page?version=2").text
    warn = page[page.index('id="warnings"'):page.index("</section>", page.index('id="warnings"'))]
    assert 'class="panel warn"' in page
    assert "the chosen strength 100 is the smallest in the grid; widen the grid downwards" in warn
    for v in (1, 2):
        manifest = store.get_manifest("pump-page", v)["training"]
        page = httpx.get(f"{base}/models/pump-page?version={v}").text
        current = [a["href"] for t, a in parse(page).tags if t == "a" and a.get("aria-current") == "page"]
        assert current == [f"/models/pump-page?version={v}"]
        assert [w for w in manifest["warnings"] if w in html.unescape(page)] == manifest["warnings"]
        if not manifest["warnings"]:
            assert "None: the chosen point lies inside the grid" in page


def test_unknown_model_or_version_is_an_html_404(open_service):
    base, _ = open_service
    r = httpx.get(f"{base}/models/no-such-pump")
    assert r.status_code == 404 and r.headers["content-type"].startswith("text/html")
    assert "no model named 'no-such-pump' exists" in html.unescape(r.text) and "closest" not in r.text
    r = httpx.get(f"{base}/models/pump-page?version=9")
    assert r.status_code == 404 and "has no version 9; it has 1, 2" in r.text
    r = httpx.get(f"{base}/models/pump-page?version=two")
    assert r.status_code == 404 and "whole numbers" in r.text
    r = httpx.get(f"{base}/models/Bad%20Name")
    assert r.status_code == 422 and r.headers["content-type"].startswith("text/html")


def test_assets_are_served_and_nothing_else(open_service):
    base, _ = open_service
    css = httpx.get(f"{base}/assets/tikhon.css")
    js = httpx.get(f"{base}/assets/tikhon.js")
    assert css.status_code == 200 and css.headers["content-type"].startswith("text/css") and ".panel" in css.text
    assert js.status_code == 200 and "fetch(source" in js.text and "innerHTML" not in js.text
    r = httpx.get(f"{base}/assets/..%2Fpages.py")
    assert r.status_code == 404


def test_sign_in_with_keys(tmp_path, kit):
    with kit.service(tmp_path, worker=False) as (base, store, _):
        _, reader = store.keys.create(["predict"], "dashboard")
        # a browser posting this server's own form sends its Origin (Fetch standard)
        with httpx.Client(base_url=base, headers={"Origin": base}) as c:
            r = c.get("/models/x?version=1")
            assert r.status_code == 303 and r.headers["location"] == "/login?next=%2Fmodels%2Fx%3Fversion%3D1"
            form = c.get("/login", params={"next": "/models/x"})
            assert 'name="next" value="/models/x"' in form.text and 'type="password"' in form.text

            bad = c.post("/login", data={"key": "nope", "next": "/"})
            assert bad.status_code == 401 and "unknown or revoked" in bad.text
            assert "tikhon_key" not in c.cookies
            empty = c.post("/login", data={"key": "", "next": "/"})
            assert empty.status_code == 400

            ok = c.post("/login", data={"key": reader, "next": "/"})
            assert ok.status_code == 303 and ok.headers["location"] == "/"
            cookie = ok.headers["set-cookie"].lower()
            assert "tikhon_key=" in cookie and "httponly" in cookie and "samesite=strict" in cookie and "path=/" in cookie
            page = c.get("/")
            assert page.status_code == 200 and "Sign out" in page.text
            assert c.get("/v1/trainings").status_code == 200  # what the page polls
            # The cookie never authorizes a change.
            assert c.post("/v1/models/pump/trainings", json={"data": {"rows": [{"a": 1}]}}).status_code == 401

            out = c.post("/logout")
            assert out.status_code == 303 and "tikhon_key" not in c.cookies
            assert c.get("/").status_code == 303


def test_sign_in_refuses_other_sites_and_open_redirects(tmp_path, kit):
    with kit.service(tmp_path, worker=False) as (base, store, _):
        _, reader = store.keys.create(["predict"], "dashboard")
        with httpx.Client(base_url=base) as c:
            r = c.post("/login", data={"key": reader}, headers={"Origin": "https://elsewhere.example"})
            assert r.status_code == 403 and "another site" in r.text and "tikhon_key" not in c.cookies
            for target in ("//elsewhere.example/x", "https://elsewhere.example/", "/\\elsewhere.example", "models"):
                r = c.post("/login", data={"key": reader, "next": target}, headers={"Origin": base})
                assert r.status_code == 303 and r.headers["location"] == "/", target


def test_without_keys_the_page_is_open_and_shows_no_sign_out(tmp_path, kit):
    with kit.service(tmp_path, worker=False) as (base, _, _s):
        r = httpx.get(f"{base}/")
        assert r.status_code == 200 and "Sign out" not in r.text
        assert "No models yet" in r.text and "No training jobs yet" in r.text

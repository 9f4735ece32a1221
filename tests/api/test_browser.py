"""The overview page in a real headless Chromium (Debian's ``chromium``, driven by Playwright's Python
package through ``executable_path``; Playwright's own browser download is never used).

A real uvicorn server with the embedded worker, API keys in use, and the invented pump-station demo
model trained through the normal job path. The browser signs in with a ``predict`` key, opens the model,
checks that the CV and path figures load as images with a nonzero natural size, then follows a second
training job on the page (no reload) until it ends. Screenshots go to the test's ``tmp_path``.

Locally the test skips, with the reason, when chromium or playwright is missing; under ``.ci/run``
(``TIKHON_CI_FULL=1``) a missing browser is a failure.
"""

from __future__ import annotations

import copy
import os
import shutil

import httpx

from service.demo import DEMO_SPEC, pump_stations

from headless import ARGS, CHROMIUM, WAIT_MS  # tests/headless.py
from headless import browser_or_skip as _browser_or_skip


def _demo_request(n: int, seed: int, *, full: bool) -> dict:
    """The demo scenario: a small grid for the first version, the demo's whole grid for the job followed on
    the page (9 basis settings × 5 folds, so its progress moves in 45 steps)."""
    cols = pump_stations(n, seed=seed)
    rows = [dict(zip(cols, vals)) for vals in zip(*(cols[k].tolist() for k in cols))]
    spec = copy.deepcopy(DEMO_SPEC)
    if not full:
        spec["bases"] = [{"kind": "linear"}, {"kind": "polynomial", "degrees": [2, 3]},
                         {"kind": "rbf", "widths": [1.0], "centers": 30}]
        spec["penalty"] = {"kind": "l2", "strengths": {"min": 1e-4, "max": 1e3, "count": 20}}
    return {"data": {"rows": rows}, "spec": spec, "promote": "always"}


def test_overview_in_headless_chromium(tmp_path, kit):
    _browser_or_skip()
    from playwright.sync_api import sync_playwright

    shots = tmp_path / "screenshots"
    shots.mkdir()
    with kit.service(tmp_path / "svc", worker=True) as (base, store, _):
        _, admin = store.keys.create(["admin"], "operator")
        _, viewer = store.keys.create(["predict"], "dashboard")
        ops = {"Authorization": f"Bearer {admin}"}
        first = httpx.post(f"{base}/v1/models/pump-energy/trainings", json=_demo_request(800, 0, full=False),
                           headers=ops, timeout=60)
        assert first.status_code == 202, first.text
        done = kit.wait_job(base, first.json()["id"], headers=ops)
        assert done["state"] == "succeeded", done
        cv = httpx.get(f"{base}/v1/models/pump-energy/versions/1/cv", headers=ops).json()
        chosen_strength = cv["chosen"]["penalty"]["strength"]

        with sync_playwright() as pw:
            browser = pw.chromium.launch(executable_path=CHROMIUM, args=ARGS)
            try:
                page = browser.new_page(viewport={"width": 1280, "height": 900})
                page.set_default_timeout(WAIT_MS)

                # Keys exist, so the overview first asks for one.
                page.goto(f"{base}/")
                assert page.url.startswith(f"{base}/login"), page.url
                page.screenshot(path=str(shots / "01-sign-in.png"))
                page.fill("#key", "not-a-key")
                page.click("button[type=submit]")
                alert = page.inner_text("[role=alert]")
                assert "unknown or revoked" in alert and "Authorization" not in alert and "tikhon keys list" in alert
                page.fill("#key", viewer)
                page.click("button[type=submit]")
                page.wait_for_url(f"{base}/")
                assert page.inner_text("h1") == "Models"
                assert "pump-energy" in page.inner_text("table.models")
                page.screenshot(path=str(shots / "02-overview.png"), full_page=True)
                cookies = {c["name"]: c for c in page.context.cookies()}
                assert cookies["tikhon_key"]["httpOnly"] is True
                assert cookies["tikhon_key"]["sameSite"] == "Strict"

                # The model page: figures load as images with a nonzero natural size.
                page.click("a.model-link")
                page.wait_for_url(f"{base}/models/pump-energy")
                assert "live: v1" in page.inner_text("h1")
                for fig in ("figure-cv", "figure-path", "figure-residuals", "figure-history"):
                    img = page.locator(f"#{fig} img")
                    img.scroll_into_view_if_needed()
                    page.wait_for_function(
                        "sel => { const i = document.querySelector(sel); return i && i.complete && i.naturalWidth > 0; }",
                        arg=f"#{fig} img")
                    w, h = img.evaluate("i => [i.naturalWidth, i.naturalHeight]")
                    assert w > 100 and h > 100, (fig, w, h)
                headline = page.inner_text("#chosen .headline")
                assert f"λ = {chosen_strength:.3g}" in headline, headline
                page.screenshot(path=str(shots / "03-model.png"), full_page=True)

                # A second job, submitted through the API, followed on the open page without a reload.
                page.evaluate("window.__sameDocument = true")
                second = httpx.post(f"{base}/v1/models/pump-energy/trainings", json=_demo_request(2000, 1, full=True),
                                    headers=ops, timeout=60)
                assert second.status_code == 202, second.text
                jid = second.json()["id"]
                row = f"#jobs tr[data-job='{jid}']"
                page.wait_for_selector(row)
                snap = ("sel => { const r = document.querySelector(sel);"
                        " return r ? r.dataset.state + ' | ' + r.cells[2].innerText.trim() : ''; }")
                seen = [page.evaluate(snap, row)]
                page.locator("#jobs").scroll_into_view_if_needed()
                page.screenshot(path=str(shots / "04-job-submitted.png"))
                # Follow the row: every change of state or progress text, until the job ends.
                while seen[-1].split(" | ")[0] not in ("succeeded", "failed", "cancelled"):
                    page.wait_for_function(f"([sel, prev]) => ({snap})(sel) !== prev", arg=[row, seen[-1]])
                    seen.append(page.evaluate(snap, row))
                    if seen[-1].startswith("running") and not (shots / "05-job-running.png").exists():
                        page.screenshot(path=str(shots / "05-job-running.png"))
                seen = [x for x in seen if x]
                assert seen[-1].startswith("succeeded"), (seen, httpx.get(f"{base}/v1/trainings/{jid}", headers=ops).json())
                progress = page.inner_text(f"{row} td:nth-child(3)")
                total = httpx.get(f"{base}/v1/trainings/{jid}", headers=ops).json()["progress"]["total"]
                assert f"{total}/{total} (100%)" in progress, progress
                page.wait_for_selector("#jobs [data-notice]:not([hidden])")
                assert "published version 2" in page.inner_text("#jobs [data-notice]")
                assert page.evaluate("window.__sameDocument === true"), "the page reloaded"
                print("\nthe job's row on the page went through: " + " -> ".join(seen))
                page.screenshot(path=str(shots / "06-job-done.png"), full_page=True)

                # The notice leads to the new version; the history now shows both.
                page.click("#jobs [data-notice] a")
                page.wait_for_url(f"{base}/models/pump-energy?version=2")
                assert "live: v2" in page.inner_text("h1")
                assert page.locator("#history table.history tbody tr").count() == 2
                assert "went live" in page.inner_text("#history table.history tbody tr:first-child")
                page.screenshot(path=str(shots / "07-version-2.png"), full_page=True)

                # No job runs now: the jobs table checks less and less often (3 s, 6 s, ...), and says so.
                page.wait_for_function("() => Number(document.getElementById('jobs').dataset.nextCheckMs) >= 6000")
                assert "No job is running; next check in" in page.inner_text("#jobs [data-status]")
            finally:
                browser.close()
    names = sorted(p.name for p in shots.iterdir())
    assert {"02-overview.png", "03-model.png", "06-job-done.png"} <= set(names), names
    print(f"\nscreenshots: {shots}")
    # The README's screenshots are these files: TIKHON_README_SCREENSHOTS=docs/screenshots pytest ... copies them.
    target = os.environ.get("TIKHON_README_SCREENSHOTS")
    if target:
        os.makedirs(target, exist_ok=True)
        for src, dst in (("01-sign-in.png", "sign-in.png"), ("02-overview.png", "overview.png"),
                         ("07-version-2.png", "model-page.png")):
            shutil.copyfile(shots / src, os.path.join(target, dst))

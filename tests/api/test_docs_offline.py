"""What people read besides the answers: the interactive API docs work with no internet access (every
file from this server), JSON logs carry no terminal colour codes."""

from __future__ import annotations

import logging
from urllib.parse import urlsplit

import httpx

from headless import ARGS, CHROMIUM, WAIT_MS  # tests/headless.py
from headless import browser_or_skip as _browser_or_skip


def test_docs_page_and_its_assets_come_from_this_server(tmp_path, kit):
    with kit.service(tmp_path / "svc", worker=False) as (base, _, _):
        page = httpx.get(f"{base}/docs")
        assert page.status_code == 200 and "text/html" in page.headers["content-type"]
        html = page.text
        assert "cdn." not in html and "https://" not in html and "http://" not in html
        for asset in ("/docs/assets/swagger-ui-bundle.js", "/docs/assets/swagger-ui.css",
                      "/docs/assets/favicon-32x32.png"):
            assert asset in html
            r = httpx.get(base + asset)
            assert r.status_code == 200 and len(r.content) > 1000, asset
        assert httpx.get(f"{base}/docs/assets/favicon-32x32.png").content[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature
        licence = httpx.get(f"{base}/docs/assets/LICENSE")
        assert licence.status_code == 200 and "Apache License" in licence.text  # Swagger UI's own licence
        assert httpx.get(f"{base}/docs/assets/swagger-editor.js").status_code == 404  # only the files the page uses
        assert httpx.get(f"{base}/docs/assets/..%2Fpyproject.toml").status_code == 404

        # In a real browser with every other host blocked: the page renders the API's operations.
        _browser_or_skip()
        from playwright.sync_api import sync_playwright

        requested: list[str] = []
        with sync_playwright() as pw:
            browser = pw.chromium.launch(executable_path=CHROMIUM, args=ARGS)
            try:
                page = browser.new_page(viewport={"width": 1280, "height": 900})
                page.set_default_timeout(WAIT_MS)
                here = urlsplit(base).netloc

                def gate(route):
                    requested.append(route.request.url)
                    if urlsplit(route.request.url).netloc == here:
                        route.continue_()
                    else:
                        route.abort()

                page.route("**/*", gate)
                page.goto(f"{base}/docs")
                page.wait_for_selector(".swagger-ui .info .title")
                assert "Tikhon" in page.inner_text(".swagger-ui .info .title")
                page.wait_for_selector(".opblock")
                assert page.locator(".opblock").count() > 10
                page.screenshot(path=str(tmp_path / "docs.png"))
            finally:
                browser.close()
        others = [u for u in requested if urlsplit(u).netloc != here]
        assert others == [], others


def test_json_logs_carry_no_terminal_colour_codes():
    from service.logs import JsonFormatter

    record = logging.LogRecord("uvicorn.error", logging.INFO, __file__, 1, "Uvicorn running on %s (Press CTRL+C)",
                               ("\x1b[1mhttp://127.0.0.1:8000\x1b[0m",), None)
    record.color_message = "Uvicorn running on \x1b[1m%s\x1b[0m (Press CTRL+C to quit)"  # as uvicorn passes it
    line = JsonFormatter().format(record)
    assert "\x1b" not in line and "\\u001b" not in line and "color_message" not in line
    assert '"msg":"Uvicorn running on http://127.0.0.1:8000 (Press CTRL+C)"' in line


def test_the_demo_data_folder_is_ignored_by_git():
    from pathlib import Path

    ignored = (Path(__file__).resolve().parents[2] / ".gitignore").read_text().splitlines()
    assert "/data/" in ignored

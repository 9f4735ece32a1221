"""The pages come from Jinja2 templates with autoescaping on: text from callers is shown, never run.

Model names are limited to a safe alphabet by the API, but the page functions take any string, and units,
feature names, labels, reasons and warnings come from whoever trained or promoted the model. Each is given
markup here; the parsed page must hold it as text and contain no element it tried to add. The escaping
rule itself (``<``, ``>``, ``&``, quotes as character references) is HTML's (WHATWG HTML, "character
references"); the check reads the page with the standard library's HTML parser.
"""

from __future__ import annotations

import json
from html.parser import HTMLParser
from urllib.parse import quote

from service.api.rendering import pages

HOSTILE = {
    "name": 'pump"><img src=x onerror=alert(1)>',
    "unit": "<b>kWh</b>",
    "feature": "flow<script>alert(2)</script>",
    "label": "station'><svg onload=alert(3)>",
    "reason": '</td><script>alert(4)</script>',
    "warning": "<iframe src=//elsewhere.example>",
}
# the same pages filled with plain text: the hostile ones must have exactly these elements
PLAIN = {k: f"plain-{k}" for k in HOSTILE}


class _Read(HTMLParser):
    def __init__(self):
        super().__init__()
        self.tags: list[str] = []
        self.text: list[str] = []
        self.attrs: list[str] = []

    def handle_starttag(self, tag, attrs):
        self.tags.append(tag)
        self.attrs.extend(v or "" for _, v in attrs)

    def handle_data(self, data):
        self.text.append(data)


def read(page: str) -> _Read:
    r = _Read()
    r.feed(page)
    r.close()
    return r


def _manifest(v: dict) -> dict:
    chosen = {"basis": {"kind": "linear"}, "penalty": {"kind": "l2", "strength": 0.1}, "mean": 1.5, "se": 0.1,
              "metric": "rmse", "rule": "best"}
    return {"training": {
        "cv_table": [], "chosen": chosen, "cv_summary": {"splits": 5, "scheme": "kfold", "rows": 50, "candidates": 3},
        "spec": {"target": "energy_kwh", "features": [v["feature"]], "categorical": [v["label"]],
                 "units": {"energy_kwh": v["unit"], v["feature"]: v["unit"]}, "penalty": {"strengths": [0.1, 1.0]}},
        "warnings": [v["warning"]],
    }}


def _jobs(v: dict) -> list[dict]:
    return [{"id": "f" * 32, "model": v["name"], "state": "failed", "progress": {"done": 0, "total": None},
             "created_at": "2026-12-01T09:59:00Z", "finished_at": None, "problem": {"detail": v["reason"]}},
            {"id": "e" * 32, "model": v["name"], "state": "succeeded", "version": 2,
             "decision": {"went_live": False, "reason": v["reason"]}, "created_at": "x", "finished_at": None}]


def pages_of(v: dict) -> dict[str, str]:
    chosen = _manifest(v)["training"]["chosen"]
    versions = [{"version": 1, "live": True, "created_at": "2026-12-01T10:00:00Z", "checksum": "ab" * 32,
                 "summary": {"chosen": chosen, "cv_summary": {"splits": 5}}}]
    history = [{"at": "2026-12-01T10:00:01Z", "from_version": None, "to_version": 1, "actor": v["label"],
                "reason": v["reason"], "details": {}}]
    return {
        "model": pages.model_page(v["name"], {"live_version": 1}, versions, history, _jobs(v), 1, _manifest(v),
                                  signed_in=True),
        "overview": pages.overview([{"name": v["name"], "live_version": 1, "versions": 1}],
                                   {v["name"]: {"summary": {"chosen": chosen}}}, _jobs(v), signed_in=False,
                                   deleted={(v["name"], 2)}),
        "login": pages.login_page(v["name"], message=v["reason"]),
        "error": pages.error_page(v["label"], v["warning"], signed_in=False),
    }


def test_the_environment_escapes_every_value_and_each_page_extends_the_layout():
    assert pages._env.autoescape is True
    names = sorted(p.name for p in pages.TEMPLATES.glob("*.html"))
    assert names == ["base.html", "error.html", "login.html", "macros.html", "model.html", "overview.html"]
    for page in ("error.html", "login.html", "model.html", "overview.html"):
        assert (pages.TEMPLATES / page).read_text(encoding="utf-8").startswith('{% extends "base.html" %}')


def test_markup_in_names_units_labels_reasons_and_warnings_is_shown_as_text():
    hostile, plain = pages_of(HOSTILE), pages_of(PLAIN)
    for page in ("model", "overview", "login", "error"):
        seen, baseline = read(hostile[page]), read(plain[page])
        # no element the inputs tried to add: the same elements as with plain text, in the same order
        assert seen.tags == baseline.tags, page
        # and each hostile value is there as text, exactly where the plain one is
        assert "".join(seen.text) == _swap("".join(baseline.text)), page
        # attributes: the value itself, percent-encoded inside a link (RFC 3986 section 2.1), a JSON string
        # inside the list of deleted versions the page's script reads
        assert seen.attrs == [_swap(a, "url" if a.startswith("/") else "json" if a.startswith("[") else "text")
                              for a in baseline.attrs], page
    text = "".join(read(hostile["model"]).text)
    for value in (HOSTILE["name"], HOSTILE["feature"], HOSTILE["label"], HOSTILE["reason"], HOSTILE["warning"],
                  f"energy_kwh ({HOSTILE['unit']})"):
        assert value in text, value
    assert "(since deleted)" in "".join(read(hostile["overview"]).text)
    assert "<script>alert" not in hostile["model"] and "<img src=x" not in hostile["model"]


def _swap(text: str, form: str = "text") -> str:
    shown = {"text": lambda v: v, "url": quote, "json": lambda v: json.dumps(v)[1:-1]}[form]
    for k in HOSTILE:
        text = text.replace(PLAIN[k], shown(HOSTILE[k]))
    return text

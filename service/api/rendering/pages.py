"""The read-only HTML overview: Jinja2 templates (``service/api/rendering/templates/``) filled with store data.

One template per page (``overview.html``, ``model.html``, ``login.html``, ``error.html``) extends the
layout ``base.html``; ``macros.html`` holds the pieces two pages share (the jobs table, times, figures).
The environment autoescapes every inserted value, so a model name, a unit, a reason or a warning is
shown as text whatever characters it holds; markup lives only in the templates. The functions here
turn store rows into the plain values the templates show (texts, numbers, lists), and never build HTML.
There is no inline script or style (the pages send a Content-Security-Policy that forbids them): the
look lives in ``web/tikhon.css`` and the job polling in ``web/tikhon.js``, served under ``/assets/``.
"""

from __future__ import annotations

import json
from datetime import datetime
from pathlib import Path
from typing import Any, Iterable
from urllib.parse import quote

import jinja2

from service.jobstates import FINAL_STATES
from service.api.rendering.figures import basis_label, chosen_se, chosen_text, engine_body, fmt_strength

TEMPLATES = Path(__file__).resolve().parent / "templates"
JOBS_SHOWN = 15  # rows of the jobs table (its data-limit; the page's script keeps the same count)


def _clock(text: Any) -> str | None:
    """An ISO time as ``2024-06-01 10:04`` (UTC), or None when it is not one."""
    try:
        return datetime.fromisoformat(str(text).replace("Z", "+00:00")).strftime("%Y-%m-%d %H:%M")
    except ValueError:
        return None


def _deleted_json(deleted: Iterable[tuple[str, int]]) -> str:
    return json.dumps(sorted(f"{n}@{v}" for n, v in deleted))


_env = jinja2.Environment(
    loader=jinja2.FileSystemLoader(TEMPLATES),
    autoescape=True,  # every {{ value }} is escaped; only the templates' own text is markup
    trim_blocks=True,
    lstrip_blocks=True,
    finalize=lambda value: "" if value is None else value,  # a missing value shows as nothing, not "None"
)
_env.filters.update(clock=_clock, urlpart=lambda text: quote(str(text)), deleted_json=_deleted_json)


def render(template: str, **context: Any) -> str:
    return _env.get_template(template).render(limit=JOBS_SHOWN, **context)


def metric_text(chosen: dict[str, Any] | None, splits: Any = None, unit: str | None = None) -> str:
    if not chosen or chosen.get("mean") is None:
        return "—"
    text = f"CV {str(chosen.get('metric') or 'rmse').upper()} {float(chosen['mean']):.4g}"
    se = chosen_se(chosen, splits) if splits else None
    if se is not None:
        text += f" ± {se:.2g} (1 SE over {int(splits)} folds)"
    if unit:
        text += f" {unit}"
    return text


def grid_text(spec: dict[str, Any], summary: dict[str, Any]) -> str:
    """``λ from 0.0001 to 1000 (30 values) × 7 basis settings`` (× l1 ratios for the elastic net)."""
    pen = spec.get("penalty") or {}
    raw = pen.get("strengths")
    if isinstance(raw, dict):
        lam = f"λ from {fmt_strength(raw.get('min'))} to {fmt_strength(raw.get('max'))} ({raw.get('count')} values)"
    elif isinstance(raw, list) and raw:
        lam = f"λ in {{{', '.join(fmt_strength(x) for x in sorted(raw))}}}"
    else:
        lam = f"{summary.get('strengths', '?')} strengths"
    text = f"{lam} × {summary.get('basis_settings', '?')} basis settings"
    if pen.get("kind") == "elastic_net" and summary.get("l1_ratios"):
        text += f" × {summary.get('l1_ratios')} l1 ratios"
    return text


def _exact_strength(value: Any) -> str | None:
    """The exact penalty strength, shown beside the rounded one only when rounding changed it."""
    try:
        shown, exact = fmt_strength(value), repr(float(value))
    except (TypeError, ValueError):
        return None
    return None if float(shown) == float(exact) else exact


# ----------------------------------------------------------------------------------------------------
# overview

def overview(models: list[dict[str, Any]], live_rows: dict[str, dict[str, Any] | None],
             jobs: list[dict[str, Any]], *, signed_in: bool, deleted: Iterable[tuple[str, int]] = ()) -> str:
    last_job: dict[str, dict[str, Any]] = {}
    active: dict[str, int] = {}
    for j in jobs:  # newest first
        last_job.setdefault(str(j.get("model")), j)
        if j.get("state") not in FINAL_STATES:
            active[str(j.get("model"))] = active.get(str(j.get("model")), 0) + 1
    rows = []
    for m in models:
        name = str(m["name"])
        summary = (live_rows.get(name) or {}).get("summary") or {}
        chosen = summary.get("chosen") or {}
        rows.append({
            "name": name, "live_version": m.get("live_version"), "versions": m.get("versions"),
            "chosen": chosen_text(chosen) if chosen else "—",
            "metric": metric_text(chosen, (summary.get("cv_summary") or {}).get("splits")),
            "last": last_job.get(name), "active": active.get(name, 0),
        })
    return render("overview.html", title="Models", page="overview", signed_in=signed_in, rows=rows, jobs=jobs,
                  deleted=frozenset(deleted))


# ----------------------------------------------------------------------------------------------------
# one model

def _shown_version(manifest: dict[str, Any], row: dict[str, Any]) -> dict[str, Any]:
    """What the model page says about the version it shows: texts for its facts, and its warnings."""
    body = engine_body(manifest)
    spec = body.get("spec") or {}
    units = {str(k): str(v) for k, v in (spec.get("units") or {}).items() if v}
    target = spec.get("target")
    chosen = body.get("chosen") or {}
    summary = body.get("cv_summary") or {}
    splits = summary.get("splits")
    pen = chosen.get("penalty") or {}
    onese = body.get("one_standard_error") or {}
    lowest = body.get("best_mean") or {}
    features = ", ".join(f"{f}" + (f" ({units[f]})" if f in units else "") for f in spec.get("features") or [])

    def differs(point: dict[str, Any]) -> bool:
        return bool(point) and ((point.get("penalty") or {}).get("strength") != pen.get("strength")
                                or point.get("basis") != chosen.get("basis"))

    return {
        "headline": chosen_text(chosen),
        "basis": basis_label(chosen.get("basis")),
        "penalty": f"{pen.get('kind', '?')}, λ = {fmt_strength(pen.get('strength'))}"
                   + (f", l1 ratio {float(pen['l1_ratio']):g}" if pen.get("l1_ratio") is not None else ""),
        "exact": _exact_strength(pen.get("strength")),
        "cv_error": metric_text(chosen, splits, units.get(target or "")),
        "rule": chosen.get("rule") or (spec.get("selection") or {}).get("rule"),
        "cv": f"{summary.get('scheme', '?')}, {splits or '?'} splits, {summary.get('rows', '?')} rows, "
              f"{summary.get('candidates', '?')} candidates",
        "grid": grid_text(spec, summary),
        "target": f"{target}" + (f" ({units[target]})" if target in units else ""),
        "inputs": (features or "—") + (f"; categorical: {', '.join(spec.get('categorical') or [])}"
                                       if spec.get("categorical") else ""),
        "one_se": f"{chosen_text(onese)} ({metric_text(onese, splits)})" if differs(onese) else None,
        "lowest": f"{chosen_text(lowest)} ({metric_text(lowest, splits)})" if differs(lowest) else None,
        "published": row.get("created_at"),
        "checksum": str(row.get("checksum"))[:12],
        "warnings": list(body.get("warnings") or []),
    }


def _history_row(h: dict[str, Any]) -> dict[str, Any]:
    """One history entry: a change of the live version, or a decision that kept it (``details.not_made_live``)."""
    details = h.get("details") if isinstance(h.get("details"), dict) else {}
    not_live = details.get("not_made_live")

    def v(x: Any) -> str:
        return f"v{x}" if x is not None else "—"

    if not_live is None:
        version, decision, live = v(h.get("to_version")), "went live", f"{v(h.get('from_version'))} → {v(h.get('to_version'))}"
    else:
        version, decision, live = v(not_live), "not made live", f"{v(h.get('to_version'))} (unchanged)"
    return {"cls": "went-live" if not_live is None else "kept", "at": h.get("at"), "version": version,
            "decision": decision, "live_change": live, "actor": h.get("actor"), "reason": h.get("reason")}


def model_page(name: str, model: dict[str, Any], versions: list[dict[str, Any]], history: list[dict[str, Any]],
               jobs: list[dict[str, Any]], selected: int | None, manifest: dict[str, Any] | None,
               *, signed_in: bool) -> str:
    alive = {v["version"] for v in versions}
    deleted = frozenset((name, j.get("version")) for j in jobs
                        if j.get("state") == "succeeded" and j.get("version") is not None
                        and j.get("version") not in alive)
    shown = None
    if manifest is not None and selected is not None:
        shown = _shown_version(manifest, next((v for v in versions if v["version"] == selected), {}))
    newest_first = [{
        "version": v["version"], "live": bool(v.get("live")), "created_at": v.get("created_at"),
        "chosen": chosen_text((v.get("summary") or {}).get("chosen")),
        "metric": metric_text((v.get("summary") or {}).get("chosen"),
                              ((v.get("summary") or {}).get("cv_summary") or {}).get("splits")),
        "checksum": str(v.get("checksum"))[:12],
    } for v in reversed(versions)]
    return render("model.html", title=name, page="model", signed_in=signed_in, name=name,
                  live=model.get("live_version"), versions=newest_first, selected=selected, shown=shown,
                  jobs=jobs, deleted=deleted, history=[_history_row(h) for h in reversed(history)])


# ----------------------------------------------------------------------------------------------------
# sign-in and errors

def login_page(next_url: str, *, message: str | None = None) -> str:
    return render("login.html", title="Sign in", page="login", signed_in=False, next_url=next_url, message=message)


def error_page(title: str, detail: str, *, signed_in: bool) -> str:
    return render("error.html", title=title, page="error", signed_in=signed_in, detail=detail)

"""The read-only HTML overview: pure functions from store data to HTML text.

Every value that comes from the store or the request passes through ``esc`` (``html.escape`` with
quotes) before it reaches the page; the markup itself is fixed text in this module. There is no inline
script or style (the pages send a Content-Security-Policy that forbids them): the look lives in
``web/tikhon.css`` and the job polling in ``web/tikhon.js``, served by the app under ``/assets/``.
"""

from __future__ import annotations

import html
import json
from datetime import datetime
from typing import Any, Iterable
from urllib.parse import quote

from service.api.plots import basis_label, chosen_se, chosen_text, engine_body, fmt_strength

FINAL_STATES = ("succeeded", "failed", "cancelled")


def esc(value: Any) -> str:
    return html.escape("" if value is None else str(value), quote=True)


def when(text: Any) -> str:
    """An ISO time as ``2024-06-01 10:04 UTC`` (the full value stays in the ``datetime`` attribute)."""
    if not text:
        return "—"
    try:
        t = datetime.fromisoformat(str(text).replace("Z", "+00:00"))
    except ValueError:
        return esc(text)
    return f'<time datetime="{esc(text)}">{esc(t.strftime("%Y-%m-%d %H:%M"))} UTC</time>'


def _se(chosen: dict[str, Any], splits: Any) -> float | None:
    return chosen_se(chosen, splits)


def _exact_strength(value: Any) -> str:
    """The exact penalty strength next to the rounded one, only when rounding changed it."""
    try:
        shown, exact = fmt_strength(value), repr(float(value))
    except (TypeError, ValueError):
        return ""
    if float(shown) == float(exact):
        return ""
    return f' <span class="muted small" title="exact value">(exactly {esc(exact)})</span>'


def metric_text(chosen: dict[str, Any] | None, splits: Any = None, unit: str | None = None) -> str:
    if not chosen or chosen.get("mean") is None:
        return "—"
    text = f"CV {str(chosen.get('metric') or 'rmse').upper()} {float(chosen['mean']):.4g}"
    se = _se(chosen, splits) if splits else None
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


def layout(title: str, body: str, *, signed_in: bool = False, page: str = "") -> str:
    logout = (
        '<form method="post" action="/logout" class="logout"><button type="submit">Sign out</button></form>'
        if signed_in else ""
    )
    return (
        "<!doctype html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
        "<meta name=\"viewport\" content=\"width=device-width, initial-scale=1\">"
        f"<title>{esc(title)} · Tikhon</title>"
        "<link rel=\"stylesheet\" href=\"/assets/tikhon.css\">"
        "<script src=\"/assets/tikhon.js\" defer></script></head>"
        f"<body data-page=\"{esc(page)}\"><header class=\"bar\"><a class=\"mark\" href=\"/\">Tikhon</a>"
        "<span class=\"tag\">regularized regression models on this server · read-only view</span>"
        f"{logout}</header><main>{body}</main>"
        "<footer>Figures and numbers come from the stored, checksummed versions. "
        "The JSON API is described at <a href=\"/docs\">/docs</a>. Cross-validated figures describe "
        "association in the training data, not cause and effect.</footer></body></html>"
    )


# ----------------------------------------------------------------------------------------------------
# jobs (also rendered again by tikhon.js from /v1/trainings; the two must show the same columns)

def _progress(job: dict[str, Any]) -> str:
    prog = job.get("progress") or {}
    done, total = prog.get("done") or 0, prog.get("total")
    state = job.get("state")
    if total:
        pct = 100.0 * float(done) / float(total)
        return (f'<progress max="{esc(total)}" value="{esc(done)}"></progress> '
                f'<span class="num">{esc(done)}/{esc(total)} ({pct:.0f}%)</span>')
    if state == "queued":
        return '<span class="muted">waiting for a worker</span>'
    if state == "running":
        return '<span class="muted">preparing the data</span>'
    return '<span class="muted">—</span>'


def _outcome(job: dict[str, Any], deleted: frozenset = frozenset()) -> str:
    state = job.get("state")
    if state == "succeeded":
        decision = job.get("decision") or {}
        text = f"version {esc(job.get('version'))}"
        if (str(job.get("model")), job.get("version")) in deleted:
            text += ' <span class="muted">(since deleted)</span>'
        if decision.get("went_live") is True:
            text += " · went live"
        elif decision.get("went_live") is False:
            text += " · not made live"
        if decision.get("reason"):
            text += f'<div class="reason">{esc(decision["reason"])}</div>'
        return text
    if state == "failed":
        problem = job.get("problem") or {}
        return f'<span class="bad">{esc(problem.get("detail") or problem.get("title") or "failed")}</span>'
    if state == "cancelled":
        return '<span class="muted">cancelled</span>'
    return ""


def jobs_table(jobs: list[dict[str, Any]], *, model: str | None, limit: int = 15,
               deleted: Iterable[tuple[str, int]] = ()) -> str:
    """``deleted``: (model, version) pairs of job versions that were deleted since (pruned); the page's
    script keeps saying so when it redraws the table (``data-deleted``)."""
    deleted = frozenset(deleted)
    source = "/v1/trainings" + (f"?model={quote(model)}" if model else "")
    gone = json.dumps(sorted(f"{n}@{v}" for n, v in deleted))
    rows = "".join(
        f'<tr data-job="{esc(j["id"])}" data-state="{esc(j.get("state"))}"><td class="mono">{esc(str(j["id"])[:8])}</td>'
        + ("" if model else f'<td><a href="/models/{esc(quote(str(j.get("model"))))}">{esc(j.get("model"))}</a></td>')
        + f'<td><span class="state state-{esc(j.get("state"))}">{esc(j.get("state"))}</span></td>'
        f"<td>{_progress(j)}</td><td>{when(j.get('created_at'))}</td><td>{when(j.get('finished_at'))}</td>"
        f"<td>{_outcome(j, deleted)}</td></tr>"
        for j in jobs[:limit]
    )
    empty = '<p class="muted empty" data-empty>No training jobs yet.</p>' if not jobs else ""
    model_head = "" if model else "<th>model</th>"
    return (
        f'<section class="panel" id="jobs" data-source="{esc(source)}" data-limit="{limit}" '
        f'data-model="{esc(model or "")}" data-deleted="{esc(gone)}"><h2>Training jobs</h2>'
        '<p class="hint">Progress counts (basis setting × fold) units; this table refreshes itself while '
        'jobs run. <span class="live-status" data-status></span></p>'
        f"<table class=\"grid jobs\"><thead><tr><th>job</th>{model_head}<th>state</th><th>progress</th>"
        f"<th>submitted</th><th>finished</th><th>outcome</th></tr></thead><tbody>{rows}</tbody></table>{empty}"
        '<p class="notice" data-notice hidden></p></section>'
    )


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
    intro = (
        '<section class="intro"><h1>Models</h1><p>Each model below predicts one target from its inputs with a '
        "penalized linear fit. Its <strong>live version</strong> answers predictions. Every version was tuned by "
        "cross-validation over a grid of basis settings (linear, polynomial degree, RBF width) and penalty strengths "
        "λ; open a model to see that grid, the chosen point, how the coefficients shrink, where the residuals go "
        "wrong, and how the model changed from version to version.</p></section>"
    )
    if not models:
        table = (
            '<section class="panel"><h2>No models yet</h2><p>Train one by posting a table and a spec to '
            "<code>POST /v1/models/{name}/trainings</code> (see <a href=\"/docs\">/docs</a>) or with "
            "<code>tikhon train</code>. It appears here when its first version is published.</p></section>"
        )
    else:
        rows = []
        for m in models:
            name = str(m["name"])
            live = m.get("live_version")
            row = live_rows.get(name) or {}
            summary = row.get("summary") or {}
            chosen = summary.get("chosen") or {}
            splits = (summary.get("cv_summary") or {}).get("splits")
            lj = last_job.get(name)
            last = (f'<span class="state state-{esc(lj.get("state"))}">{esc(lj.get("state"))}</span> '
                    f"{when(lj.get('finished_at') or lj.get('created_at'))}") if lj else '<span class="muted">none</span>'
            running = f' <span class="pill">{active[name]} active</span>' if active.get(name) else ""
            live_cell = f"v{esc(live)}" if live else '<span class="muted">none</span>'
            rows.append(
                f'<tr><td><a class="model-link" href="/models/{esc(quote(name))}">{esc(name)}</a></td>'
                f"<td>{live_cell}</td>"
                f"<td>{esc(chosen_text(chosen)) if chosen else '—'}</td>"
                f"<td class=\"num\">{esc(metric_text(chosen, splits))}</td>"
                f"<td class=\"num\">{esc(m.get('versions'))}</td><td>{last}{running}</td></tr>"
            )
        table = (
            '<section class="panel"><h2>Models on this server</h2><table class="grid models"><thead><tr>'
            "<th>model</th><th>live</th><th>chosen point of the live version</th><th>CV error ± 1 standard error</th>"
            f"<th>versions</th><th>last training</th></tr></thead><tbody>{''.join(rows)}</tbody></table></section>"
        )
    return layout("Models", intro + table + jobs_table(jobs, model=None, deleted=deleted), signed_in=signed_in,
                  page="overview")


# ----------------------------------------------------------------------------------------------------
# one model

def _definition(items: Iterable[tuple[str, str]]) -> str:
    return "<dl class=\"facts\">" + "".join(f"<dt>{esc(k)}</dt><dd>{v}</dd>" for k, v in items) + "</dl>"


def _figure(src: str, alt: str, caption: str, gid: str) -> str:
    return (
        f'<figure class="plot" id="{esc(gid)}"><img src="{esc(src)}" alt="{esc(alt)}" loading="eager" '
        f'decoding="async"><figcaption>{caption} <span class="formats"><a href="{esc(src)}">SVG</a> · '
        f'<a href="{esc(src)}{"&" if "?" in src else "?"}format=png">PNG</a></span></figcaption></figure>'
    )


def model_page(name: str, model: dict[str, Any], versions: list[dict[str, Any]], history: list[dict[str, Any]],
               jobs: list[dict[str, Any]], selected: int | None, manifest: dict[str, Any] | None,
               *, signed_in: bool) -> str:
    alive = {v["version"] for v in versions}
    deleted = {(name, j.get("version")) for j in jobs
               if j.get("state") == "succeeded" and j.get("version") is not None and j.get("version") not in alive}
    live = model.get("live_version")
    qn = quote(name)
    head = (
        f'<nav class="crumbs"><a href="/">Models</a> / <span>{esc(name)}</span></nav>'
        f'<h1>{esc(name)} <span class="badge {"badge-live" if live else "badge-none"}">'
        f'{"live: v" + esc(live) if live else "no live version"}</span></h1>'
    )
    current = ' class="vpill on" aria-current="page"'
    pills = "".join(
        f'<a{current if v["version"] == selected else " class=vpill"} href="/models/{esc(qn)}?version={esc(v["version"])}">'
        f'v{esc(v["version"])}{" ●" if v.get("live") else ""}</a>'
        for v in reversed(versions)
    )
    picker = (f'<div class="versions-pick"><span>Showing version</span>{pills}'
              '<span class="muted small">● live</span></div>') if versions else ""

    if manifest is None or selected is None:
        main = '<section class="panel"><p>This model has no published version yet.</p></section>'
    else:
        body = engine_body(manifest)
        spec = body.get("spec") or {}
        units = {str(k): str(v) for k, v in (spec.get("units") or {}).items() if v}
        target = spec.get("target")
        chosen = body.get("chosen") or {}
        summary = body.get("cv_summary") or {}
        splits = summary.get("splits")
        pen = chosen.get("penalty") or {}
        onese = body.get("one_standard_error") or {}
        best = body.get("best_mean") or {}
        features = ", ".join(f"{f}" + (f" ({units[f]})" if f in units else "") for f in spec.get("features") or [])
        facts = [
            ("basis", esc(basis_label(chosen.get("basis")))),
            ("penalty", esc(f"{pen.get('kind', '?')}, λ = {fmt_strength(pen.get('strength'))}"
                            + (f", l1 ratio {float(pen['l1_ratio']):g}" if pen.get("l1_ratio") is not None else ""))
             + _exact_strength(pen.get("strength"))),
            ("CV error", esc(metric_text(chosen, splits, units.get(target or "")))),
            ("selection rule", esc(chosen.get("rule") or (spec.get("selection") or {}).get("rule"))),
            ("cross-validation", esc(f"{summary.get('scheme', '?')}, {splits or '?'} splits, "
                                     f"{summary.get('rows', '?')} rows, {summary.get('candidates', '?')} candidates")),
            ("grid searched", esc(grid_text(spec, summary))),
            ("target", esc(f"{target}" + (f" ({units[target]})" if target in units else ""))),
            ("inputs", esc(features or "—") + (esc(f"; categorical: {', '.join(spec.get('categorical') or [])}")
                                               if spec.get("categorical") else "")),
        ]
        if onese and (onese.get("penalty") or {}).get("strength") != pen.get("strength") or \
                onese and onese.get("basis") != chosen.get("basis"):
            facts.append(("one-standard-error rule", esc(f"{chosen_text(onese)} ({metric_text(onese, splits)})")))
        if best and ((best.get("penalty") or {}).get("strength") != pen.get("strength") or best.get("basis") != chosen.get("basis")):
            facts.append(("lowest mean error", esc(f"{chosen_text(best)} ({metric_text(best, splits)})")))
        row = next((v for v in versions if v["version"] == selected), {})
        facts.append(("published", when(row.get("created_at")) + f' <span class="mono small">sha256 {esc(str(row.get("checksum"))[:12])}…</span>'))
        warnings = body.get("warnings") or []
        warn = (
            '<section class="panel warn" id="warnings"><h2>Warnings</h2><ul>'
            + "".join(f"<li>{esc(w)}</li>" for w in warnings) + "</ul></section>"
            if warnings else
            '<section class="panel ok" id="warnings"><h2>Warnings</h2><p>None: the chosen point lies inside the grid '
            "and the fit raised no concern.</p></section>"
        )
        api = f"/v1/models/{qn}/versions/{selected}"
        raw = (f'<p class="muted small">As JSON: <a href="{esc(api)}">metadata</a> · <a href="{esc(api)}/cv">CV table</a>'
               f' · <a href="{esc(api)}/path">regularization path</a></p>')
        chosen_panel = (f'<section class="panel chosen" id="chosen"><h2>Chosen point of v{esc(selected)}</h2>'
                        f'<p class="headline">{esc(chosen_text(chosen))}</p>{_definition(facts)}{raw}</section>')
        base = f"/v1/models/{qn}/versions/{selected}/plots"
        figures = (
            '<section class="figures">'
            + _figure(f"{base}/cv", f"CV error against penalty strength for every basis setting of {name} v{selected}",
                      "<strong>Was the grid wide enough, and how flat is the optimum?</strong> One line per basis "
                      "setting, shaded ±1 standard error; the ring is the chosen point.", "figure-cv")
            + _figure(f"{base}/path", f"Regularization path of {name} v{selected}",
                      "<strong>How do the coefficients shrink?</strong> Each line is a term of the chosen basis; "
                      "the dashed line is the chosen λ.", "figure-path")
            + _figure(f"{base}/residuals", f"Out-of-fold residuals of {name} v{selected}",
                      "<strong>Where do the residuals go wrong?</strong> Every row predicted by the fit that did not "
                      "see it.", "figure-residuals")
            + "</section>"
        )
        mon = f"/v1/models/{qn}/plots"
        q = f"?version={selected}"
        monitoring = (
            '<section class="panel" id="monitoring"><h2>Since training</h2>'
            '<p class="muted small">Served inputs against this version\'s training distribution, and the real error '
            f'of outcomes sent to <span class="mono">POST /v1/models/{esc(name)}/outcomes</span>. As JSON: '
            f'<a href="/v1/models/{esc(qn)}/inputs{esc(q)}">inputs</a> · '
            f'<a href="/v1/models/{esc(qn)}/outcomes{esc(q)}">outcomes</a></p>'
            '<div class="figures">'
            + _figure(f"{mon}/drift{q}", f"Input drift of {name} v{selected}",
                      "<strong>Do the inputs still look like the training data?</strong> Grey: training shares of "
                      "each bin; blue: recent. PSI above 0.25 suggests a retrain (rule of thumb).", "figure-drift")
            + _figure(f"{mon}/outside-range{q}", f"Rows outside the training range of {name} v{selected}",
                      "<strong>How often does the model extrapolate?</strong> Share of served rows with an input "
                      "outside the training range, per hour.", "figure-outside")
            + _figure(f"{mon}/live-error{q}", f"Real error of {name} v{selected}",
                      "<strong>Is the real error what CV promised?</strong> RMSE of scored outcomes per hour, "
                      "against the CV RMSE and its spread over folds.", "figure-live-error")
            + "</div></section>"
        )
        main = '<div class="two">' + chosen_panel + warn + "</div>" + figures + monitoring

    live_row, live_pill = ' class="is-live"', ' <span class="pill">live</span>'
    vrows = "".join(
        f'<tr{live_row if v.get("live") else ""}><td><a href="/models/{esc(qn)}?version={esc(v["version"])}">'
        f'v{esc(v["version"])}</a>{live_pill if v.get("live") else ""}</td>'
        f"<td>{when(v.get('created_at'))}</td>"
        f"<td>{esc(chosen_text((v.get('summary') or {}).get('chosen')))}</td>"
        f"<td class=\"num\">{esc(metric_text((v.get('summary') or {}).get('chosen'), ((v.get('summary') or {}).get('cv_summary') or {}).get('splits')))}</td>"
        f'<td class="mono small">{esc(str(v.get("checksum"))[:12])}…</td></tr>'
        for v in reversed(versions)
    )
    hrows = "".join(_history_row(h) for h in reversed(history))
    hist = (
        '<section class="panel" id="history"><h2>How the model changed</h2>'
        + (_figure(f"/v1/models/{qn}/plots/history", f"CV error and chosen settings of every version of {name}",
                   "<strong>What changed between versions?</strong> Ring: the live version; filled: versions that "
                   "were live at some time.", "figure-history") if versions else "")
        + '<h3>Versions</h3><table class="grid versions"><thead><tr><th>version</th><th>published</th>'
        f"<th>chosen point</th><th>CV error</th><th>checksum</th></tr></thead><tbody>{vrows}</tbody></table>"
        '<h3>History (every decision about the live version)</h3>'
        + (f"<table class=\"grid history\"><thead><tr><th>when</th><th>version</th><th>decision</th><th>live</th>"
           f"<th>by</th><th>reason</th></tr></thead><tbody>{hrows}</tbody></table>" if history
           else '<p class="muted">No version has gone live yet.</p>')
        + "</section>"
    )
    return layout(name, head + picker + main + jobs_table(jobs, model=name, deleted=deleted) + hist, signed_in=signed_in,
                  page="model")


def _history_row(h: dict[str, Any]) -> str:
    """One history entry: a change of the live version, or a decision that kept it (``details.not_made_live``)."""
    details = h.get("details") if isinstance(h.get("details"), dict) else {}
    not_live = details.get("not_made_live")
    v = lambda x: ("v" + esc(x)) if x is not None else "—"  # noqa: E731
    if not_live is None:
        version, decision, live = v(h.get("to_version")), "went live", f"{v(h.get('from_version'))} → {v(h.get('to_version'))}"
    else:
        version, decision, live = v(not_live), "not made live", f"{v(h.get('to_version'))} (unchanged)"
    cls = "went-live" if not_live is None else "kept"
    return (f'<tr class="{cls}"><td>{when(h.get("at"))}</td><td>{version}</td><td>{decision}</td><td>{live}</td>'
            f'<td class="mono small">{esc(h.get("actor"))}</td><td class="reason">{esc(h.get("reason"))}</td></tr>')


# ----------------------------------------------------------------------------------------------------
# sign-in and errors

def login_page(next_url: str, *, message: str | None = None) -> str:
    msg = f'<p class="bad" role="alert">{esc(message)}</p>' if message else ""
    body = (
        '<section class="panel login"><h1>Sign in</h1><p>This server uses API keys. Paste a key holding the '
        "<code>predict</code> scope (or <code>train</code> / <code>admin</code>) to read the overview. The key is "
        "kept in an HttpOnly cookie for this site only and is sent only with page and figure reads; it never "
        "authorizes a change.</p>"
        f'{msg}<form method="post" action="/login"><input type="hidden" name="next" value="{esc(next_url)}">'
        '<label for="key">API key</label><input id="key" name="key" type="password" autocomplete="current-password" '
        'required><button type="submit">Sign in</button></form><p class="muted small">An operator makes a key with '
        "<code>tikhon keys create --scope predict</code>.</p></section>"
    )
    return layout("Sign in", body, page="login")


def error_page(title: str, detail: str, *, signed_in: bool) -> str:
    body = (f'<section class="panel"><h1>{esc(title)}</h1><p>{esc(detail)}</p>'
            '<p><a href="/">Back to the models</a></p></section>')
    return layout(title, body, signed_in=signed_in, page="error")

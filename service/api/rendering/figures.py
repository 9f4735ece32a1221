"""Server-side figures of a stored version: pure functions from manifest parts and arrays to bytes.

Four figures: the CV error against penalty strength (one series per basis setting, and per l1 ratio
for the elastic net), the regularization path of the chosen setting, the out-of-fold residuals, and a
model's history of versions. Each ``*_figure`` function returns a ``matplotlib.figure.Figure`` built
directly (never pyplot, whose global state is not thread-safe); ``render`` turns a figure into SVG or
PNG bytes. Nothing here touches HTTP, the store or the clock, so the same inputs give the same bytes.

Design (our own): a pale paper background, ink-coloured text, dotted grid, and the eight-colour palette
of Okabe & Ito ("Color Universal Design", 2002), which stays distinguishable for the common forms of
colour blindness. Every series also has its own marker and line style, so the figures read in greyscale.
The chosen point is a thick ink ring with a label; the one-standard-error choice is an ink diamond.

The SVG keeps its text as ``<text>`` elements (``svg.fonttype = none``), carries a ``<title>`` and a
``<desc>`` naming the chosen basis setting and strength, and gives each series a ``gid`` (an ``id`` on
its ``<g>`` element: ``cv-series-0``, ``cv-series-1``, ...), so a reader, a screen reader and a test
can all find them.
"""

from __future__ import annotations

import io
import math
import re
from datetime import datetime, timedelta, timezone
from typing import Any, Iterable, Sequence
from xml.sax.saxutils import escape as xml_escape

import matplotlib

matplotlib.use("Agg")  # no display on a server; set explicitly, before anything imports a backend

import numpy as np  # noqa: E402
from matplotlib.backends.backend_agg import FigureCanvasAgg  # noqa: E402
from matplotlib.backends.backend_svg import FigureCanvasSVG  # noqa: E402
from matplotlib import dates as mdates  # noqa: E402
from matplotlib import ticker  # noqa: E402
from matplotlib.figure import Figure  # noqa: E402

# Process-wide matplotlib settings that only change how files are written, set once: text stays text
# in SVG, and element ids do not depend on a random salt (so equal figures give equal bytes).
matplotlib.rcParams["svg.fonttype"] = "none"
matplotlib.rcParams["svg.hashsalt"] = "tikhon"

FORMATS = ("svg", "png")
MEDIA_TYPES = {"svg": "image/svg+xml", "png": "image/png"}

# Okabe & Ito (2002) palette, reordered so the darker colours come first (their yellow is faint on a
# pale background and comes last): blue, orange, bluish green, vermillion, reddish purple, sky blue,
# black, yellow.
PALETTE = ("#0072B2", "#E69F00", "#009E73", "#D55E00", "#CC79A7", "#56B4E9", "#000000", "#F0E442")
MARKERS = ("o", "s", "^", "D", "v", "P", "X", "<", ">", "h")
LINESTYLES = ("-", "--", "-.", ":", (0, (5, 1, 1, 1, 1, 1)), (0, (1, 2)))
INK = "#1d2330"
PAPER = "#fbfaf6"
GRID = "#c9c5ba"
MUTED = "#6b6f7a"
DPI = 110


# ----------------------------------------------------------------------------------------------------
# small helpers

def fmt_strength(value: float) -> str:
    """Penalty strength shown with three significant digits (``0.000304``, ``12.3``, ``1e+03``)."""
    return f"{float(value):.3g}"


def basis_label(basis: dict[str, Any] | None) -> str:
    """``linear``, ``polynomial degree 3``, ``RBF width 0.5`` (plus the centre count when given)."""
    if not basis:
        return "unknown basis"
    kind = basis.get("kind")
    if kind == "polynomial":
        return f"polynomial degree {basis.get('degree')}"
    if kind == "rbf":
        text = f"RBF width {float(basis.get('width')):g}"
        if basis.get("centers"):
            text += f", {basis.get('centers')} centres"
        return text
    return str(kind)


def setting_label(basis: dict[str, Any] | None, l1_ratio: float | None, penalty_kind: str | None) -> str:
    label = basis_label(basis)
    if penalty_kind == "elastic_net" and l1_ratio is not None:
        label += f", l1 ratio {float(l1_ratio):g}"
    return label


def _key(basis: dict[str, Any] | None) -> tuple:
    return tuple(sorted((str(k), str(v)) for k, v in (basis or {}).items()))


def units_of(spec: dict[str, Any] | None) -> dict[str, str]:
    units = (spec or {}).get("units") or {}
    return {str(k): str(v) for k, v in units.items() if v}


def _with_unit(label: str, unit: str | None) -> str:
    return f"{label} ({unit})" if unit else label


def metric_label(metric: str | None, target: str | None, units: dict[str, str]) -> str:
    metric = (metric or "rmse").lower()
    unit = units.get(target or "")
    if metric in ("rmse", "mae"):
        return _with_unit(f"CV {metric.upper()}", unit)
    return f"CV {metric.upper()}"


def _style(ax, *, title: str | None = None) -> None:
    ax.set_facecolor(PAPER)
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    for side in ("left", "bottom"):
        ax.spines[side].set_color(MUTED)
    ax.tick_params(colors=INK, labelsize=8.5)
    ax.grid(True, which="major", color=GRID, linestyle=(0, (1, 3)), linewidth=0.8)
    ax.xaxis.label.set_color(INK)
    ax.yaxis.label.set_color(INK)
    if title:
        ax.set_title(title, loc="left", fontsize=10.5, color=INK, fontweight="bold")


def _new_figure(width: float, height: float, ncols: int = 1) -> tuple[Figure, Any]:
    fig = Figure(figsize=(width, height), dpi=DPI, facecolor=PAPER, layout="constrained")
    fig.get_layout_engine().set(rect=(0.0, 0.045, 1.0, 0.955))  # room for the note under the axes
    axes = fig.subplots(1, ncols) if ncols > 1 else fig.add_subplot(1, 1, 1)
    return fig, axes


def _note(fig: Figure, text: str) -> None:
    fig.text(0.01, 0.005, text, fontsize=7.5, color=MUTED, ha="left", va="bottom")


def engine_body(manifest: dict[str, Any]) -> dict[str, Any]:
    """The engine's manifest body inside a stored manifest (the store keeps it under ``training``)."""
    body = manifest.get("training")
    return body if isinstance(body, dict) and "cv_table" in body else manifest


def chosen_text(chosen: dict[str, Any] | None) -> str:
    """``polynomial degree 3, λ = 0.0123`` (plus the l1 ratio for the elastic net)."""
    if not chosen:
        return "no chosen point"
    pen = chosen.get("penalty") or {}
    text = f"{basis_label(chosen.get('basis'))}, λ = {fmt_strength(pen.get('strength'))}"
    if pen.get("kind") == "elastic_net" and pen.get("l1_ratio") is not None:
        text += f", l1 ratio {float(pen['l1_ratio']):g}"
    return text


# ----------------------------------------------------------------------------------------------------
# output

def render(fig: Figure, fmt: str, *, title: str, description: str) -> bytes:
    """SVG (with ``<title>`` and ``<desc>``) or PNG bytes of ``fig``; ``fmt`` is one of ``FORMATS``."""
    buf = io.BytesIO()
    if fmt == "png":
        FigureCanvasAgg(fig)
        fig.savefig(buf, format="png", dpi=DPI, facecolor=PAPER, metadata={"Title": title, "Software": None})
        return buf.getvalue()
    if fmt != "svg":
        raise ValueError(f"unknown format {fmt!r}")
    FigureCanvasSVG(fig)
    fig.savefig(buf, format="svg", facecolor=PAPER, metadata={"Date": None, "Title": title, "Description": description})
    text = buf.getvalue().decode("utf-8")
    # A <title> and <desc> as the first children of <svg>: shown as a tooltip and read by screen readers.
    head = f"<title>{xml_escape(title)}</title><desc>{xml_escape(description)}</desc>"
    text = re.sub(r"(<svg\b[^>]*>)", lambda m: m.group(1) + head, text, count=1)
    return text.encode("utf-8")


# ----------------------------------------------------------------------------------------------------
# CV error against strength

def cv_series(body: dict[str, Any]) -> list[dict[str, Any]]:
    """The CV table grouped into series: one per basis setting (× l1 ratio), strengths ascending.

    Each series: ``label``, ``basis``, ``l1_ratio``, ``strengths``, ``mean``, ``se`` (standard error of
    the mean over the splits: the row's ``se``, sample standard deviation / √splits; std / √splits for
    versions trained before rows carried it) as arrays."""
    table = body.get("cv_table") or []
    kind = ((body.get("spec") or {}).get("penalty") or {}).get("kind")
    groups: dict[tuple, dict[str, Any]] = {}
    for row in table:
        key = (_key(row.get("basis")), row.get("l1_ratio") if kind == "elastic_net" else None)
        g = groups.setdefault(key, {"basis": row.get("basis"), "l1_ratio": key[1], "rows": []})
        g["rows"].append(row)
    out = []
    for g in groups.values():
        rows = sorted(g["rows"], key=lambda r: float(r["strength"]))
        splits = np.array([max(len(r.get("split_values") or ()), 1) for r in rows], dtype=float)
        mean = np.array([float(r["mean"]) if r.get("mean") is not None else np.nan for r in rows])
        std = np.array([float(r["std"]) if r.get("std") is not None else np.nan for r in rows])
        se = std / np.sqrt(splits)  # versions trained before rows carried "se"
        # the engine's own standard error (ddof = 1, the one its one-SE rule uses) where the row has it
        se = np.array([float(r["se"]) if r.get("se") is not None else s for r, s in zip(rows, se)])
        out.append({
            "label": setting_label(g["basis"], g["l1_ratio"], kind), "basis": g["basis"], "l1_ratio": g["l1_ratio"],
            "strengths": np.array([float(r["strength"]) for r in rows]), "mean": mean, "se": se,
        })
    return out


def _same_point(a: dict[str, Any] | None, b: dict[str, Any] | None) -> bool:
    if not a or not b:
        return False
    pa, pb = a.get("penalty") or {}, b.get("penalty") or {}
    return (_key(a.get("basis")) == _key(b.get("basis")) and pa.get("strength") == pb.get("strength")
            and pa.get("l1_ratio") == pb.get("l1_ratio"))


def cv_figure(body: dict[str, Any], *, heading: str = "") -> Figure:
    spec = body.get("spec") or {}
    units = units_of(spec)
    chosen = body.get("chosen") or {}
    metric = chosen.get("metric") or (spec.get("selection") or {}).get("metric")
    series = cv_series(body)
    fig, ax = _new_figure(9.4, 5.0)
    _style(ax, title=heading or "Cross-validated error against penalty strength")
    positives = [s["mean"][np.isfinite(s["mean"]) & (s["mean"] > 0)] for s in series]
    allv = np.concatenate(positives) if positives else np.array([])
    use_log_y = allv.size > 0 and allv.max() / allv.min() > 4
    # Elastic net: colour and marker name the basis setting, the line style names the l1 ratio. Otherwise each
    # series has its own colour, marker and line style.
    bases = list(dict.fromkeys(_key(s["basis"]) for s in series))
    ratios = list(dict.fromkeys(s["l1_ratio"] for s in series))
    by_ratio = len(ratios) > 1
    for i, s in enumerate(series):
        b = bases.index(_key(s["basis"])) if by_ratio else i
        style = LINESTYLES[(ratios.index(s["l1_ratio"]) if by_ratio else i) % len(LINESTYLES)]
        colour = PALETTE[b % len(PALETTE)]
        x, m, se = s["strengths"], s["mean"], s["se"]
        ok = np.isfinite(m)
        band = ax.fill_between(x[ok], (m - se)[ok], (m + se)[ok], color=colour, alpha=0.18 if not by_ratio else 0.1,
                               linewidth=0, label="_nolegend_")
        band.set_gid(f"cv-band-{i}")
        (line,) = ax.plot(x[ok], m[ok], color=colour, linestyle=style,
                          marker=MARKERS[b % len(MARKERS)], markersize=3.6, markevery=max(1, int(ok.sum()) // 10),
                          linewidth=1.5, label=s["label"])
        line.set_gid(f"cv-series-{i}")
    ax.set_xscale("log")
    if use_log_y:
        ax.set_yscale("log")
        plain = ticker.FuncFormatter(lambda v, _: f"{v:g}")
        ax.yaxis.set_major_formatter(plain)
        # Label a few minor ticks (2, 3, 5 times a power of ten) so a short range still has numbers.
        ax.yaxis.set_minor_formatter(ticker.FuncFormatter(
            lambda v, _: f"{v:g}" if round(v / 10 ** math.floor(math.log10(v)), 6) in (2.0, 3.0, 5.0) else ""))
    ax.set_xlabel("penalty strength λ (log scale)")
    ax.set_ylabel(metric_label(metric, spec.get("target"), units) + ("  (log scale)" if use_log_y else ""))

    onese = body.get("one_standard_error") or {}
    best = body.get("best_mean") or {}
    if chosen:
        cx, cy = float((chosen.get("penalty") or {}).get("strength")), float(chosen.get("mean"))
        ring = ax.scatter([cx], [cy], s=170, facecolors="none", edgecolors=INK, linewidths=2.2, zorder=6,
                          label=f"chosen ({chosen.get('rule') or 'best'}):\n{chosen_text(chosen)}")
        ring.set_gid("chosen-point")
        tag = ax.annotate("chosen", (cx, cy), xytext=(0, -17), textcoords="offset points", ha="center",
                          fontsize=8, color=INK, fontweight="bold")
        tag.set_gid("chosen-tag")
    if onese and not _same_point(onese, chosen):
        ox, oy = float((onese.get("penalty") or {}).get("strength")), float(onese.get("mean"))
        dia = ax.scatter([ox], [oy], s=70, marker="D", facecolors=INK, edgecolors=PAPER, linewidths=0.8, zorder=6,
                         label=f"one-standard-error rule:\n{chosen_text(onese)}")
        dia.set_gid("one-se-point")
        tag = ax.annotate("1-SE", (ox, oy), xytext=(0, 9), textcoords="offset points", ha="center",
                          fontsize=8, color=INK)
        tag.set_gid("one-se-tag")
    if best and not _same_point(best, chosen):
        bx, by = float((best.get("penalty") or {}).get("strength")), float(best.get("mean"))
        tri = ax.scatter([bx], [by], s=60, marker="v", facecolors="none", edgecolors=INK, linewidths=1.2, zorder=6,
                         label=f"lowest mean error:\n{chosen_text(best)}")
        tri.set_gid("best-mean-point")
    leg = ax.legend(fontsize=7.8, frameon=True, facecolor=PAPER, edgecolor=GRID, loc="upper left",
                    bbox_to_anchor=(1.01, 1.0), borderaxespad=0.0,
                    title="basis setting" + (" (line style: l1 ratio)" if by_ratio else ""), title_fontsize=8)
    leg.set_gid("cv-legend")
    summary = body.get("cv_summary") or {}
    splits = summary.get("splits")
    _note(fig, f"Bands: ±1 standard error of the mean over {splits or 'the'} splits (std/√splits). "
               f"Scheme: {summary.get('scheme', '?')}, {summary.get('rows', '?')} rows, "
               f"{summary.get('candidates', len(body.get('cv_table') or []))} candidates.")
    return fig


# ----------------------------------------------------------------------------------------------------
# regularization path

def path_figure(body: dict[str, Any], strengths: np.ndarray, coefficients: np.ndarray, *,
                df: np.ndarray | None = None, label_top: int = 6, heading: str = "") -> Figure:
    spec = body.get("spec") or {}
    units = units_of(spec)
    path = body.get("path") or {}
    terms = list(path.get("terms") or [f"term {j}" for j in range(coefficients.shape[1])])
    chosen = body.get("chosen") or {}
    lam = float(path.get("chosen_strength") or (chosen.get("penalty") or {}).get("strength"))
    strengths = np.asarray(strengths, dtype=float)
    coefficients = np.asarray(coefficients, dtype=float).reshape(strengths.size, -1)
    order = np.argsort(strengths)
    strengths, coefficients = strengths[order], coefficients[order]
    if df is not None:
        df = np.asarray(df, dtype=float)[order]
    at = int(np.argmin(np.abs(np.log(strengths) - math.log(lam)))) if strengths.size else 0
    size = np.abs(coefficients[at]) if strengths.size else np.zeros(len(terms))
    top = [int(j) for j in np.argsort(-size)[:label_top] if size[j] > 0]

    fig, ax = _new_figure(8.6, 4.9)
    ratio = (chosen.get("penalty") or {}).get("l1_ratio")
    where = basis_label(chosen.get("basis")) + (f", l1 ratio {float(ratio):g}" if ratio is not None else "")
    _style(ax, title=heading or f"Regularization path of {where}")
    for j in range(coefficients.shape[1]):
        if j in top:
            k = top.index(j)
            (line,) = ax.plot(strengths, coefficients[:, j], color=PALETTE[k % len(PALETTE)],
                              linestyle=LINESTYLES[k % len(LINESTYLES)], linewidth=1.6, label=terms[j],
                              marker=MARKERS[k % len(MARKERS)], markersize=3.2, markevery=max(1, strengths.size // 8))
        else:
            (line,) = ax.plot(strengths, coefficients[:, j], color="#9a9da6", linewidth=0.8,
                              alpha=0.7, label="_nolegend_")
        line.set_gid(f"path-term-{j}")
    ax.axhline(0.0, color=MUTED, linewidth=0.8)
    vline = ax.axvline(lam, color=INK, linewidth=1.4, linestyle=(0, (4, 2)))
    vline.set_gid("chosen-strength")
    extra = ""
    if df is not None and strengths.size:
        extra = f", effective df {df[at]:.3g}"
    ann = ax.annotate(f"chosen λ = {fmt_strength(lam)}{extra}", (lam, 1.0), xycoords=("data", "axes fraction"),
                      xytext=(5, -12), textcoords="offset points", fontsize=8.5, color=INK, fontweight="bold",
                      bbox={"boxstyle": "round,pad=0.25", "facecolor": PAPER, "edgecolor": MUTED, "linewidth": 0.6})
    ann.set_gid("chosen-label")
    ax.set_xscale("log")
    ax.set_xlabel("penalty strength λ (log scale)")
    target = spec.get("target")
    ax.set_ylabel(_with_unit("coefficient of standardized term", units.get(target or "")))
    if top:
        leg = ax.legend(fontsize=7.8, frameon=True, facecolor=PAPER, edgecolor=GRID, loc="upper left",
                        bbox_to_anchor=(1.01, 1.0), borderaxespad=0.0,
                        title=f"largest {len(top)} at chosen λ", title_fontsize=8)
        leg.set_gid("path-legend")
    _note(fig, f"{coefficients.shape[1]} terms; each column is centred and scaled to unit standard deviation before "
               f"the penalty applies, so coefficients are comparable. Grey: the other terms.")
    return fig


# ----------------------------------------------------------------------------------------------------
# out-of-fold residuals

def residuals_figure(body: dict[str, Any], predicted: np.ndarray, observed: np.ndarray, *, heading: str = "") -> Figure:
    spec = body.get("spec") or {}
    units = units_of(spec)
    target = spec.get("target") or "target"
    unit = units.get(target)
    predicted = np.asarray(predicted, dtype=float)
    observed = np.asarray(observed, dtype=float)
    ok = np.isfinite(predicted) & np.isfinite(observed)
    predicted, observed = predicted[ok], observed[ok]
    resid = observed - predicted
    fig, (left, right) = _new_figure(9.4, 4.4, ncols=2)
    _style(left, title=heading or "Out-of-fold predicted against observed")
    _style(right, title="Residual against predicted")
    many = predicted.size > 2000
    dots = dict(s=7, color=PALETTE[0], alpha=0.45 if many else 0.6, linewidths=0, rasterized=many)
    sc = left.scatter(observed, predicted, **dots)
    sc.set_gid("residuals-scatter-observed")
    if predicted.size:
        lo = float(min(observed.min(), predicted.min()))
        hi = float(max(observed.max(), predicted.max()))
        ident = left.plot([lo, hi], [lo, hi], color=INK, linewidth=1.1, linestyle="--", label="predicted = observed")[0]
        ident.set_gid("identity-line")
        left.legend(fontsize=7.8, frameon=False, loc="upper left")
    left.set_xlabel(_with_unit(f"observed {target}", unit))
    left.set_ylabel(_with_unit(f"out-of-fold predicted {target}", unit))
    sc2 = right.scatter(predicted, resid, **dots)
    sc2.set_gid("residuals-scatter-predicted")
    right.axhline(0.0, color=INK, linewidth=1.0)
    if predicted.size >= 20:
        # Mean residual per decile of the prediction: a systematic bend shows where the model is off.
        edges = np.quantile(predicted, np.linspace(0, 1, 11))
        idx = np.clip(np.searchsorted(edges, predicted, side="right") - 1, 0, 9)
        centres = np.array([predicted[idx == b].mean() for b in range(10) if np.any(idx == b)])
        means = np.array([resid[idx == b].mean() for b in range(10) if np.any(idx == b)])
        trend = right.plot(centres, means, color=PALETTE[3], marker="s", markersize=4, linewidth=1.6,
                           label="mean residual per tenth of predictions")[0]
        trend.set_gid("residual-trend")
        right.legend(fontsize=7.8, frameon=False, loc="upper left")
    right.set_xlabel(_with_unit(f"out-of-fold predicted {target}", unit))
    right.set_ylabel(_with_unit("residual (observed − predicted)", unit))
    rmse = float(np.sqrt(np.mean(resid**2))) if resid.size else float("nan")
    _note(fig, f"{predicted.size} rows (a seeded sample when the data is larger); out-of-fold RMSE of the chosen "
               f"setting {rmse:.4g}{' ' + unit if unit else ''}. Each row is predicted by the fit that did not see it.")
    return fig


# ----------------------------------------------------------------------------------------------------
# history of a model

def _parse_time(text: Any) -> datetime | None:
    if not text:
        return None
    try:
        return datetime.fromisoformat(str(text).replace("Z", "+00:00"))
    except ValueError:
        return None


def _time_ticks(span: timedelta) -> str:
    """One tick format for the whole axis, so every label reads the same way (never a day number next to a
    clock time): month-day and time within a week, the full date beyond."""
    return "%m-%d %H:%M" if span <= timedelta(days=7) else "%Y-%m-%d"


def history_figure(name: str, versions: Sequence[dict[str, Any]], live: int | None,
                   promoted: Iterable[int] = (), *, heading: str = "") -> Figure:
    """``versions``: catalog rows (``version``, ``created_at``, ``summary`` with ``chosen`` and
    ``cv_summary``), oldest first. ``promoted``: versions that were live at some time."""
    promoted = set(promoted)
    points = []
    for v in versions:
        summary = v.get("summary") or {}
        chosen = summary.get("chosen") or {}
        when = _parse_time(v.get("created_at"))
        if when is None or chosen.get("mean") is None:
            continue
        splits = (summary.get("cv_summary") or {}).get("splits") or 1
        se = chosen_se(chosen, splits) or 0.0
        points.append({"version": int(v["version"]), "when": when, "mean": float(chosen["mean"]), "se": se,
                       "metric": chosen.get("metric") or "rmse", "chosen": chosen,
                       "strength": float((chosen.get("penalty") or {}).get("strength") or float("nan"))})
    fig, (top, bottom) = _new_figure(9.4, 4.6, ncols=2)
    _style(top, title=heading or f"{name}: CV error of each version")
    _style(bottom, title="Chosen strength and basis of each version")
    kinds = sorted({basis_label(p["chosen"].get("basis")) for p in points})
    seen: set[int] = set()
    order = sorted(range(len(points)), key=lambda i: points[i]["when"])
    late = {points[i]["version"] for i in order[(len(order) + 1) // 2:]} if len(order) > 1 else set()
    for p in points:
        dx, ha = ((-6, "right") if p["version"] in late else (6, "left"))
        k = kinds.index(basis_label(p["chosen"].get("basis")))
        was_live = p["version"] in promoted or p["version"] == live
        face = PALETTE[k % len(PALETTE)] if was_live else "none"
        eb = top.errorbar([p["when"]], [p["mean"]], yerr=[p["se"]], fmt=MARKERS[k % len(MARKERS)], color=PALETTE[k % len(PALETTE)],
                          mfc=face, mec=PALETTE[k % len(PALETTE)], markersize=7, capsize=3, linewidth=1.1)
        for artist in eb.get_children():
            artist.set_gid(f"history-version-{p['version']}")
        top.annotate(f"v{p['version']}", (p["when"], p["mean"]), xytext=(dx * 1.6, 8), textcoords="offset points",
                     fontsize=8, color=INK, ha=ha)
        bottom.scatter([p["when"]], [p["strength"]], marker=MARKERS[k % len(MARKERS)], s=46, facecolors=face,
                       edgecolors=PALETTE[k % len(PALETTE)], linewidths=1.3,
                       label=kinds[k] if k not in seen else "_nolegend_")
        seen.add(k)
        tag = bottom.annotate(f"v{p['version']}", (p["when"], p["strength"]), xytext=(dx, 6), textcoords="offset points",
                              fontsize=8, color=INK, ha=ha)
        tag.set_gid(f"history-choice-{p['version']}")
    if len(points) > 1:
        ordered = sorted(points, key=lambda p: p["when"])
        top.plot([p["when"] for p in ordered], [p["mean"] for p in ordered], color=MUTED, linewidth=0.8, zorder=0)
    live_pt = next((p for p in points if p["version"] == live), None)
    if live_pt is not None:
        ring = top.scatter([live_pt["when"]], [live_pt["mean"]], s=260, facecolors="none", edgecolors=INK,
                           linewidths=2.2, zorder=6)
        ring.set_gid("live-version")
        ann = top.annotate(f"live: v{live}", (live_pt["when"], live_pt["mean"]), xytext=(8, -18),
                           textcoords="offset points", fontsize=8.5, fontweight="bold", color=INK)
        ann.set_gid("live-label")
    if len({p["when"] for p in points}) == 1:  # one moment: give the axis an hour either side, not years
        centre = mdates.date2num(points[0]["when"])
        for ax in (top, bottom):
            ax.set_xlim(centre - 1 / 24, centre + 1 / 24)
    metrics = sorted({p["metric"] for p in points})
    top.set_ylabel(f"CV {'/'.join(m.upper() for m in metrics) or 'error'} of the chosen point (±1 SE)")
    bottom.set_yscale("log")
    bottom.set_ylabel("chosen penalty strength λ (log scale)")
    span = ""
    if points:
        first, last = min(p["when"] for p in points), max(p["when"] for p in points)
        span = f"{first:%Y-%m-%d %H:%M}" + (f" to {last:%Y-%m-%d %H:%M}" if last - first >= timedelta(minutes=1) else "")
    times = [p["when"] for p in points]
    tick_format = _time_ticks(max(times) - min(times) if times else timedelta(0))
    for ax in (top, bottom):
        ax.set_xlabel("version created (UTC)")
        locator = mdates.AutoDateLocator(minticks=3, maxticks=6)
        ax.xaxis.set_major_locator(locator)
        ax.xaxis.set_major_formatter(mdates.DateFormatter(tick_format, tz=timezone.utc))
        if len({p["when"] for p in points}) > 1:
            ax.margins(x=0.15, y=0.18)
        else:
            ax.margins(y=0.18)
    if kinds:
        bottom.legend(fontsize=7.5, frameon=False, loc="upper center", bbox_to_anchor=(0.5, -0.2),
                      ncol=min(3, len(kinds)), title="basis of the chosen point", title_fontsize=7.5)
    if not points:
        top.text(0.5, 0.5, "no versions with a CV summary", transform=top.transAxes, ha="center", color=MUTED)
    _note(fig, (f"Versions created {span} UTC. " if span else "") + "Filled markers: versions that were live at some "
               "time; hollow: published but never live. Ring: the live version.")
    return fig


def chosen_se(chosen: dict[str, Any], splits: Any) -> float | None:
    """The one meaning of ± on pages and figures: the chosen point's one-standard-error-rule standard error
    (the engine's ``se``: sample standard deviation of the split errors over √splits); std/√splits for
    versions trained before ``se`` was stored."""
    try:
        if chosen.get("se") is not None:
            return float(chosen["se"])
        return float(chosen["std"]) / math.sqrt(max(int(splits), 1))
    except (KeyError, TypeError, ValueError):
        return None

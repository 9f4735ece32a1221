"""Figures of a version since training: drift bars per input, the share of rows outside the training range
per hour, and the real error per hour against the CV band. Each draws a report of ``service.api.monitor``
(the same numbers the figure routes answer as JSON)."""

from __future__ import annotations

from datetime import datetime
from typing import Any

import numpy as np
from matplotlib.figure import Figure

from service.api.rendering.figures import DPI, INK, MUTED, PALETTE, PAPER, _new_figure, _note, _style

ACCENT = PALETTE[0]

MAX_PANELS = 6  # inputs drawn in the drift figure (the highest PSI first); the JSON has them all


def drift_figure(report: dict[str, Any]) -> Figure:
    feats = sorted(report.get("features") or [], key=lambda f: -(f.get("psi") or 0.0))[:MAX_PANELS]
    n = max(1, len(feats))
    cols = min(3, n)
    rows = (n + cols - 1) // cols
    fig = Figure(figsize=(3.4 * cols, 2.5 * rows + 0.4), dpi=DPI, facecolor=PAPER, layout="constrained")
    fig.get_layout_engine().set(rect=(0.0, 0.06, 1.0, 0.94))  # room for the note under the axes
    axes = np.atleast_1d(fig.subplots(rows, cols)).ravel()
    for ax, f in zip(axes, feats):
        t = np.asarray(f["training"], dtype=float)
        r = np.asarray(f["recent"], dtype=float)
        x = np.arange(t.size)
        ax.bar(x - 0.2, t, width=0.4, color=MUTED, label="training")
        ax.bar(x + 0.2, r, width=0.4, color=ACCENT, label="recent")
        psi = f.get("psi")
        flag = f" ({f['flag']})" if f.get("flag") else ""
        _style(ax, title=f"{f['name']} · PSI {'-' if psi is None else f'{psi:.3g}'}{flag}")
        if f["kind"] == "numeric":
            ax.set_xticks([0, t.size - 1], ["below", "above"])
        else:
            labels = [str(lv)[:10] for lv in f.get("levels") or []]
            ax.set_xticks(x, labels, rotation=45, ha="right", fontsize=7)
        ax.set_ylabel("share of rows")
    for ax in axes[len(feats):]:
        ax.set_visible(False)
    if feats:
        axes[0].legend(frameon=False, fontsize=8)
    else:
        axes[0].text(0.5, 0.5, "no inputs with training bins", ha="center", va="center", color=MUTED)
    _note(fig, f"{report['model']} v{report['version']}: {report['rows']} rows served from {report['from'][:16]} "
               f"to {report['to'][:16]} UTC; bins: training quantiles plus below/above the training range.")
    return fig


def outside_figure(report: dict[str, Any]) -> Figure:
    fig, ax = _new_figure(7.0, 3.0)
    series, t = _hours(report)
    _style(ax, title="Rows with an input outside the training range, per hour")
    if series:
        ax.plot(t, [100.0 * (s["outside_range"] or 0.0) for s in series], marker="o", color=ACCENT)
        fig.autofmt_xdate()
    else:
        ax.text(0.5, 0.5, "no rows served in this window", transform=ax.transAxes, ha="center", color=MUTED)
    ax.set_ylabel("% of rows")
    _note(fig, f"{report['model']} v{report['version']}: {report['rows']} rows in all.")
    return fig


def error_figure(report: dict[str, Any]) -> Figure:
    fig, ax = _new_figure(7.0, 3.0)
    cv = report.get("cv") or {}
    series, t = _hours(report)
    _style(ax, title="Real error of scored outcomes per hour, against the CV error")
    if series:
        ax.plot(t, [s["rmse"] for s in series], marker="o", color=ACCENT, label="live RMSE")
        if cv.get("mean") is not None:
            mean, std = float(cv["mean"]), float(cv.get("std") or 0.0)
            ax.axhline(mean, color=INK, linewidth=1, label="CV RMSE")
            ax.axhspan(mean - std, mean + std, color=MUTED, alpha=0.25, label="CV ± std over folds")
        ax.legend(frameon=False, fontsize=8)
        fig.autofmt_xdate()
    else:
        ax.text(0.5, 0.5, "no outcomes scored in this window", transform=ax.transAxes, ha="center", color=MUTED)
    ax.set_ylabel("RMSE")
    _note(fig, f"{report['model']} v{report['version']}: {report['rows']} scored rows.")
    return fig


def _hours(report: dict[str, Any]) -> tuple[list[dict[str, Any]], list[datetime]]:
    """The report's hours that hold rows, and their start times."""
    series = [s for s in report.get("series") or [] if s.get("rows")]
    return series, [datetime.fromisoformat(s["from"].replace("Z", "+00:00")) for s in series]

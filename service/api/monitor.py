"""Input drift and real-world error of served models: counted in memory, flushed to the catalog, reported.

On the hot path a prediction only appends ``(time, version, inputs, values, leverages)`` to a list (one
``list.append``); a background thread counts the list every ``DRAIN_S`` seconds into this process's hour buckets
(``service.engine.drift.count_inputs``) and writes its cumulative counts every ``monitor_flush_s``
seconds and at shutdown (``service.store.monitor``). A request with many rows is counted at once so the
list never holds more than ``PENDING_ROWS`` rows. Reports sum the catalog's rows over every replica.

Report shapes (``GET /v1/models/{name}/inputs`` and ``/outcomes``) are documented in the README's
"Monitoring" section; PSI thresholds and the retrain rules are in ``service.engine.drift`` and below.
"""

from __future__ import annotations

import logging
import math
import threading
import time
import uuid
from datetime import datetime, timezone
from typing import Any

import numpy as np

from service.engine import drift
from service.errors import InvalidData
from service.store.monitor import HOUR, MonitorSums, add_counts, bucket_of

log = logging.getLogger("tikhon.monitor")

DRAIN_S = 0.25  # pending rows are counted this often (written to the catalog every monitor_flush_s)
PENDING_ROWS = 200_000  # rows waiting to be counted; a request that would pass this is counted at once
DRIFT_MIN_ROWS = 100  # rows since training before a PSI can raise "retrain suggested" (rule of thumb)
ERROR_FACTOR = 1.5  # live RMSE above this × the CV RMSE (with OUTCOME_MIN_ROWS rows) suggests a retrain
OUTCOME_MIN_ROWS = 30  # rule of thumb: fewer scored rows say too little about the live error
WARNING_WINDOW_S = 7 * 24 * HOUR  # the window the model answer's monitoring warnings look at


class Monitor:
    """One process's counts (see the module docstring). Thread-safe."""

    def __init__(self, sums: MonitorSums, *, enabled: bool = True, flush_s: float = 5.0, retention_days: int = 90):
        self.sums = sums
        self.enabled = enabled
        self.flush_s = float(flush_s)
        self.retention_s = int(retention_days) * 24 * HOUR
        self.replica = uuid.uuid4().hex
        self._pending: list[tuple[float, Any, dict, np.ndarray, np.ndarray]] = []
        self._pending_rows = 0
        self._counts: dict[tuple[str, int, int, str], dict[str, Any]] = {}
        self._dirty: set[tuple[str, int, int, str]] = set()
        self._lock = threading.Lock()  # counts and dirty set
        self._flush_lock = threading.Lock()  # one writer at a time
        self._stop = threading.Event()
        self._thread: threading.Thread | None = None
        self._last_prune = 0.0

    # -- life -----------------------------------------------------------------------------------------
    def start(self) -> None:
        if self._thread is None:
            self._thread = threading.Thread(target=self._run, name="tikhon-monitor", daemon=True)
            self._thread.start()

    def close(self) -> None:
        """Stop the flusher and write what is counted (shutdown)."""
        self._stop.set()
        if self._thread is not None:
            self._thread.join(timeout=30)
            self._thread = None
        try:
            self.flush()
        except Exception as exc:  # the catalog may be gone at shutdown: say so, lose only this flush
            log.warning("monitoring counts could not be written at shutdown: %s", exc)

    def _run(self) -> None:
        # Pending rows are counted every DRAIN_S, not only at each flush: counting 20,000 single-row entries
        # at once (5 s of 4,000 predictions per second) held the interpreter lock for tens of milliseconds
        # and showed in the single-row p99; a quarter second's worth is a few milliseconds.
        next_flush = time.monotonic() + self.flush_s
        while not self._stop.wait(min(DRAIN_S, self.flush_s)):
            try:
                if time.monotonic() >= next_flush:
                    next_flush = time.monotonic() + self.flush_s
                    self.flush()
                else:
                    with self._flush_lock:
                        self._drain()
            except Exception as exc:  # kept in memory; the next flush writes the cumulative counts
                log.warning("monitoring counts not written (kept for the next flush): %s", exc)

    # -- counting -------------------------------------------------------------------------------------
    def observe(self, served: Any, cols: dict[str, np.ndarray], detail: dict[str, Any]) -> None:
        """A served prediction (hot path: an append, or counting at once for large requests)."""
        if not self.enabled or _reference(served) is None:
            return
        m = int(detail["value"].shape[0])
        entry = (time.time(), served, cols, detail["value"], detail["leverage"])
        if m > 1000 or self._pending_rows + m > PENDING_ROWS:
            self._count([entry])
            return
        self._pending.append(entry)  # list.append is atomic; the drain swaps the list under the GIL
        self._pending_rows += m

    def _drain(self) -> None:
        pending, self._pending = self._pending, []
        self._pending_rows = 0
        if pending:
            self._count(pending)

    def _count(self, entries: list) -> None:
        groups: dict[tuple[str, int, int], list] = {}
        for t, served, cols, value, lev in entries:
            groups.setdefault((served.name, int(served.version), bucket_of(t)), []).append((served, cols, value, lev))
        for (name, version, bucket), items in groups.items():
            served = items[0][0]
            ref = _reference(served)
            names = list(ref.get("numeric", [])) + list(ref.get("categorical", []))
            cols = {e["name"]: np.concatenate([np.asarray(c[e["name"]]) for _, c, _, _ in items]) for e in names}
            value = np.concatenate([v for _, _, v, _ in items])
            lev = np.concatenate([lv for _, _, _, lv in items])
            counts = _count_inputs(served, ref, cols, value, lev)
            if counts is not None:
                self._add((name, version, bucket, "inputs"), counts)

    def add_inputs(self, served: Any, counts: dict[str, Any] | None) -> None:
        """Counts of served rows made elsewhere (``input_counts`` in a prediction process), added as if observed here."""
        if self.enabled and counts is not None:
            self._add((served.name, int(served.version), bucket_of(time.time()), "inputs"), counts)

    def outcome(self, served: Any, observed: np.ndarray, detail: dict[str, Any]) -> dict[str, Any]:
        counts = drift.count_outcomes(observed, detail["value"], detail.get("lower"), detail.get("upper"))
        self._add((served.name, int(served.version), bucket_of(time.time()), "outcomes"), counts)
        return counts

    def _add(self, key: tuple[str, int, int, str], counts: dict[str, Any]) -> None:
        with self._lock:
            self._counts[key] = add_counts(self._counts.get(key), counts)
            self._dirty.add(key)

    def flush(self) -> int:
        """Count what is pending and write this replica's changed buckets; returns rows written."""
        with self._flush_lock:
            self._drain()
            with self._lock:
                keys = list(self._dirty)
                self._dirty.clear()
                entries = [(k[0], k[1], k[2], k[3], self._counts[k]) for k in keys]
            if not entries:
                return 0
            try:
                n = self.sums.put(self.replica, entries)
            except Exception:
                with self._lock:
                    self._dirty.update(keys)  # written next time (cumulative, so nothing is counted twice)
                raise
            now = time.time()
            with self._lock:  # buckets of past hours that are written need not stay in memory
                for k in keys:
                    if k[2] < bucket_of(now) - HOUR and k not in self._dirty:
                        self._counts.pop(k, None)
            if now - self._last_prune > HOUR:
                self._last_prune = now
                self.sums.prune(bucket_of(now - self.retention_s))
            return n


def input_counts(served: Any, cols: dict[str, np.ndarray], detail: dict[str, Any]) -> dict[str, Any] | None:
    """The monitoring counts of one request's rows (None for a version without training bins)."""
    ref = _reference(served)
    if ref is None:
        return None
    return _count_inputs(served, ref, cols, detail["value"], detail["leverage"])


def _count_inputs(served: Any, ref: dict[str, Any], cols: dict[str, np.ndarray], value: np.ndarray,
                  lev: np.ndarray) -> dict[str, Any] | None:
    try:
        return drift.count_inputs(served.model, ref, cols, value, lev)
    except Exception as exc:  # never fail a prediction or the flusher over monitoring
        log.warning("monitoring could not count %d rows of %s v%s: %s", value.size, served.name, served.version, exc)
        return None


def _reference(served: Any) -> dict[str, Any] | None:
    manifest = getattr(served, "manifest", None) or {}
    return (manifest.get("training") or {}).get("drift_reference")


# ---- reports ------------------------------------------------------------------------------------------
def parse_time(value: str | None, field: str, default: float) -> float:
    """An ISO 8601 time (``2026-11-01`` or ``2026-11-01T06:00:00Z``) or a span back from now (``90m``, ``36h``,
    ``7d``), as seconds since the epoch."""
    if value is None or value == "":
        return default
    text = value.strip()
    units = {"m": 60, "h": HOUR, "d": 24 * HOUR}
    if text[-1:].lower() in units and text[:-1].replace(".", "", 1).isdigit():
        return time.time() - float(text[:-1]) * units[text[-1].lower()]
    try:
        t = datetime.fromisoformat(text.replace("Z", "+00:00"))
    except ValueError:
        raise InvalidData(f"{field}={value!r} is not a time; write an ISO 8601 time (2026-11-01T06:00:00Z) or a span "
                          "back from now (90m, 36h, 7d)", errors=[{"field": field, "value": value,
                                                                   "message": "expected a time or a span"}]) from None
    if t.tzinfo is None:
        t = t.replace(tzinfo=timezone.utc)
    return t.timestamp()


def iso(t: float) -> str:
    return datetime.fromtimestamp(t, tz=timezone.utc).isoformat().replace("+00:00", "Z")


def inputs_report(name: str, version: int, ref: dict[str, Any] | None, buckets: dict[int, dict[str, Any]],
                  since: float, until: float) -> dict[str, Any]:
    """The drift answer: recent shares against training shares per feature, with PSI and flags."""
    total = None
    for counts in buckets.values():
        total = add_counts(total, counts)
    total = total or {}
    rows = int(total.get("rows", 0))
    out: dict[str, Any] = {"model": name, "version": int(version), "from": iso(since), "to": iso(until), "rows": rows,
                           "features": [], "prediction": None, "warnings": []}
    if ref is None:
        out["warnings"].append("this version was trained before input monitoring existed and has no training bins; "
                               "retrain it to monitor its inputs")
        return out
    for entry in ref.get("numeric", []):
        counts = (total.get("numeric") or {}).get(entry["name"]) or [0.0] * len(entry["training"])
        out["features"].append(_feature("numeric", entry, counts, rows,
                                        (total.get("outside_range_by_feature") or {}).get(entry["name"], 0)))
    for entry in ref.get("categorical", []):
        counts = (total.get("categorical") or {}).get(entry["name"]) or [0.0] * len(entry["training"])
        out["features"].append(_feature("categorical", entry, counts, rows, None))
    pred = ref.get("prediction") or {"edges": [], "training": []}
    pcounts = total.get("prediction") or [0.0] * len(pred["training"])
    out["prediction"] = {"edges": pred["edges"], "training": pred["training"], "recent": _shares(pcounts),
                         "psi": _round(drift.psi(pred["training"], pcounts))}
    out["outside_range_rows"] = int(total.get("outside_range_rows", 0))
    out["unseen_level_rows"] = int(total.get("unseen_level_rows", 0))
    out["high_leverage_rows"] = int(total.get("high_leverage_rows", 0))
    out["series"] = [{"from": iso(b), "to": iso(b + HOUR), "rows": int(c.get("rows", 0)),
                      "outside_range": _share(c.get("outside_range_rows", 0), c.get("rows", 0))}
                     for b, c in sorted(buckets.items())]
    for f in out["features"]:
        if f["flag"] == "act" and rows >= DRIFT_MIN_ROWS:
            out["warnings"].append(f"retrain suggested: input {f['name']} has drifted (PSI {f['psi']:.3g} ≥ "
                                   f"{drift.PSI_ACT} over {rows} rows)")
        elif f["flag"] == "watch" and rows >= DRIFT_MIN_ROWS:
            out["warnings"].append(f"input {f['name']} is shifting (PSI {f['psi']:.3g} ≥ {drift.PSI_WATCH}); watch it")
    return out


def _feature(kind: str, entry: dict[str, Any], counts: list[float], rows: int, outside: int | None) -> dict[str, Any]:
    value = drift.psi(entry["training"], counts)
    f = {"name": entry["name"], "kind": kind, "psi": _round(value), "flag": drift.flag(value) if rows else None,
         "training": entry["training"], "recent": _shares(counts)}
    if kind == "numeric":
        f["edges"] = entry["edges"]
        f["outside_range"] = _share(outside or 0, rows)
    else:
        f["levels"] = entry["levels"] + ["(unseen)"]
    return f


def outcomes_report(name: str, version: int, cv: dict[str, Any], buckets: dict[int, dict[str, Any]],
                    since: float, until: float) -> dict[str, Any]:
    """Real error of scored outcomes against the CV error, overall and per hour."""
    total = None
    for counts in buckets.values():
        total = add_counts(total, counts)
    metrics = _metrics(total or {})
    out = {"model": name, "version": int(version), "from": iso(since), "to": iso(until), "rows": metrics.pop("rows"),
           "metrics": metrics, "cv": {k: cv.get(k) for k in ("metric", "mean", "std")},
           "series": [{"from": iso(b), "to": iso(b + HOUR), **_metrics(c)} for b, c in sorted(buckets.items())],
           "warnings": []}
    warning = error_warning(out["rows"], metrics.get("rmse"), cv)
    if warning:
        out["warnings"].append(warning)
    return out


def error_warning(rows: int, rmse: float | None, cv: dict[str, Any]) -> str | None:
    if cv.get("metric") != "rmse" or rmse is None or not cv.get("mean") or rows < OUTCOME_MIN_ROWS:
        return None
    if rmse > ERROR_FACTOR * float(cv["mean"]):
        return (f"retrain suggested: the live RMSE {rmse:.4g} over {rows} scored rows is more than {ERROR_FACTOR}× "
                f"the CV RMSE {float(cv['mean']):.4g}")
    return None


def _metrics(c: dict[str, Any]) -> dict[str, Any]:
    n = int(c.get("rows", 0))
    if not n:
        return {"rows": 0, "rmse": None, "mae": None, "coverage90": None}
    k = int(c.get("interval_rows", 0))
    return {"rows": n, "rmse": _round(math.sqrt(c.get("sse", 0.0) / n)), "mae": _round(c.get("sae", 0.0) / n),
            "coverage90": _round(c.get("inside", 0) / k) if k else None}


def _shares(counts: list[float]) -> list[float]:
    c = np.asarray(counts, dtype=np.float64)
    s = c.sum()
    return (c / s).tolist() if s > 0 else [0.0] * c.size


def _share(part: float, whole: float) -> float | None:
    return float(part) / float(whole) if whole else None


def _round(v: float | None) -> float | None:
    return None if v is None or not math.isfinite(v) else float(v)


def live_warnings(mon: Monitor, name: str, version: int, manifest: dict[str, Any]) -> list[str]:
    """"Retrain suggested" warnings of a version over the last ``WARNING_WINDOW_S`` (for the model answer and
    page): an input whose PSI passes the act threshold, or a live RMSE above ``ERROR_FACTOR`` × the CV RMSE."""
    body = manifest.get("training") or {}
    ref = body.get("drift_reference")
    until = time.time()
    since = until - WARNING_WINDOW_S
    try:
        mon.flush()
        inputs = mon.sums.read(name, version, "inputs", bucket_of(since), bucket_of(until))
        outcomes = mon.sums.read(name, version, "outcomes", bucket_of(since), bucket_of(until))
    except Exception as exc:  # the model answer does not fail over monitoring
        log.warning("monitoring warnings unavailable for %s v%s: %s", name, version, exc)
        return []
    out = []
    if ref is not None and inputs:
        out += [w for w in inputs_report(name, version, ref, inputs, since, until)["warnings"] if w.startswith("retrain")]
    if outcomes:
        out += outcomes_report(name, version, body.get("chosen") or {}, outcomes, since, until)["warnings"]
    return out

"""Monitoring counts in the catalog: additive, per model version, hour bucket, kind and replica.

A server process (a "replica", named by a random id for its lifetime) keeps its counts in memory and
writes them every few seconds as its *cumulative* counts for each (model, version, hour bucket, kind):
an upsert of its own row. Rewriting one's own row makes a flush idempotent (a retried flush cannot
count twice), and replicas never write the same row, so several processes on one catalog add up when
rows are read and summed. A restart starts a new replica id; the old rows stay and keep counting.

Counts are JSON trees of numbers, lists of numbers (bins) and objects of those; ``add_counts`` sums two
trees element by element. No raw request row is ever stored.
"""

from __future__ import annotations

from typing import Any, Iterable

from sqlalchemy import and_, delete, insert, select, update

from service.store.schema import monitor_sums as sums_t
from service.store.util import utcnow

HOUR = 3600


def bucket_of(t: float) -> int:
    """Start of the hour (seconds since the Unix epoch) holding time ``t``."""
    return int(t // HOUR) * HOUR


def add_counts(a: Any, b: Any) -> Any:
    """Element-wise sum of two count trees (numbers, equal-length lists, objects); a missing side is zero."""
    if a is None:
        return b
    if b is None:
        return a
    if isinstance(a, dict) and isinstance(b, dict):
        return {k: add_counts(a.get(k), b.get(k)) for k in {**a, **b}}
    if isinstance(a, list) and isinstance(b, list):
        if len(a) != len(b):  # bins of another reference (cannot happen within one version): keep the first
            return a
        return [x + y for x, y in zip(a, b)]
    if isinstance(a, (int, float)) and isinstance(b, (int, float)):
        return a + b
    return a


class MonitorSums:
    """Reads and writes ``monitor_sums`` rows (see the module docstring)."""

    def __init__(self, db):
        self._db = db  # the store's CatalogAccess: its engine is read at every call

    def put(self, replica: str, entries: Iterable[tuple[str, int, int, str, dict[str, Any]]]) -> int:
        """Write this replica's cumulative counts: ``(model, version, bucket, kind, counts)`` each."""
        n = 0
        now = utcnow()
        with self._db.write() as conn:
            for model, version, bucket, kind, counts in entries:
                key = and_(sums_t.c.model == model, sums_t.c.version == int(version), sums_t.c.bucket == int(bucket),
                           sums_t.c.kind == kind, sums_t.c.replica == replica)
                done = conn.execute(update(sums_t).where(key).values(counts=counts, updated_at=now)).rowcount
                if not done:
                    conn.execute(insert(sums_t).values(model=model, version=int(version), bucket=int(bucket), kind=kind,
                                                       replica=replica, counts=counts, updated_at=now))
                n += 1
        return n

    def read(self, model: str, version: int, kind: str, since: int, until: int) -> dict[int, dict[str, Any]]:
        """Counts per hour bucket in [since, until], summed over replicas."""
        with self._db.read() as conn:
            rows = conn.execute(
                select(sums_t.c.bucket, sums_t.c.counts)
                .where(sums_t.c.model == model, sums_t.c.version == int(version), sums_t.c.kind == kind,
                       sums_t.c.bucket >= int(since), sums_t.c.bucket <= int(until))
                .order_by(sums_t.c.bucket)
            ).all()
        out: dict[int, dict[str, Any]] = {}
        for bucket, counts in rows:
            out[int(bucket)] = add_counts(out.get(int(bucket)), counts)
        return out

    def versions(self, model: str) -> list[int]:
        """Versions of a model with any monitoring rows."""
        with self._db.read() as conn:
            return sorted({int(v) for (v,) in conn.execute(
                select(sums_t.c.version).where(sums_t.c.model == model).distinct())})

    def prune(self, before: int) -> int:
        """Delete every row of a bucket that starts before ``before`` (retention)."""
        with self._db.write() as conn:
            return int(conn.execute(delete(sums_t).where(sums_t.c.bucket < int(before))).rowcount or 0)

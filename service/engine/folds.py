"""Cross-validation plans, built with scikit-learn's splitters so fold assignment is exactly theirs.

A plan cuts the rows into *atoms* (blocks that are never split) and lists each split as
(training atoms, validation atoms). Summaries are computed once per atom and merged per split:
- kfold: ``KFold(folds, shuffle=True, random_state=seed)``; atoms are the folds.
- repeated_kfold: ``RepeatedKFold(n_splits=folds, n_repeats=repeats, random_state=seed)``; each repeat
  is its own partition of atoms.
- grouped: ``GroupKFold(n_splits=folds)`` on ``group_by``.
- time_ordered: ``TimeSeriesSplit(n_splits=folds)`` on the rows sorted (stably) by ``order_by``;
  atoms are the contiguous blocks, split k trains on blocks 0..k and validates on block k + 1.
- hash assignment (kfold, grouped): a row goes to fold ``h(key) mod folds``, where h is SplitMix64
  (Steele, Lea & Flood, "Fast splittable pseudorandom number generators", OOPSLA 2014) of the row key
  mixed with the seed. The key is the row's position, a ``row_key`` column, or for grouped the group.
  Any re-read of the same rows, in any order or partitioning, gives the same folds.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from service.errors import InvalidData, InvalidSpec


@dataclass
class Plan:
    atoms: list[np.ndarray]  # row indices of each atom
    splits: list[tuple[list[int], list[int]]]  # (training atom ids, validation atom ids)
    assignment: np.ndarray  # per row: validation split id (kfold/grouped/time), or (repeats, n) for repeated
    refit_atoms: list[int]  # atoms whose union is every row once (used for the refit)
    interval_splits: list[int]  # splits whose validation rows give out-of-fold residuals for intervals

    @property
    def n_splits(self) -> int:
        return len(self.splits)


_M1 = np.uint64(0xBF58476D1CE4E5B9)
_M2 = np.uint64(0x94D049BB133111EB)
_GOLDEN = np.uint64(0x9E3779B97F4A7C15)


def splitmix64(x: np.ndarray) -> np.ndarray:
    """SplitMix64's output for each state x (Steele, Lea & Flood, "Fast splittable pseudorandom number
    generators", OOPSLA 2014): ``z = x + γ``, then three xor-shift-multiply rounds, in place on one copy
    with one scratch array (the same bits as the textbook expression, with a third of its temporaries)."""
    with np.errstate(over="ignore"):
        z = np.array(x, dtype=np.uint64)  # a copy
        z += _GOLDEN
        t = z >> np.uint64(30)
        z ^= t
        z *= _M1
        np.right_shift(z, np.uint64(27), out=t)
        z ^= t
        z *= _M2
        np.right_shift(z, np.uint64(31), out=t)
        z ^= t
        return z


def key_hash(keys: np.ndarray, seed: int) -> np.ndarray:
    """Stable 64-bit hash of row keys mixed with the seed, of a canonical form of each key, so the storage
    type does not matter: an integer-valued number hashes as that integer (7, 7.0 and an int64 7 alike:
    a CSV key is float64 in memory and may be int64 elsewhere), any other number as its float64 bits
    (-0.0 as 0.0), text as BLAKE2b-64 of its UTF-8 bytes."""
    keys = np.asarray(keys)
    if keys.dtype.kind in "iub":
        u = keys.astype(np.int64).view(np.uint64)
    elif keys.dtype.kind == "f":
        f = keys.astype(np.float64) + 0.0  # + 0.0 folds -0.0 into 0.0
        whole = np.isfinite(f) & (np.floor(f) == f) & (np.abs(f) < 2.0 ** 63)
        u = f.view(np.uint64).copy()
        u[whole] = f[whole].astype(np.int64).view(np.uint64)
    else:
        import hashlib

        # each distinct text hashed once (a label column repeats a few levels over many rows)
        index: dict[str, int] = {}
        codes = np.fromiter((index.setdefault(str(v), len(index)) for v in keys), dtype=np.int64, count=len(keys))
        hashes = np.fromiter((int.from_bytes(hashlib.blake2b(t.encode("utf-8"), digest_size=8).digest(), "little")
                              for t in index), dtype=np.uint64, count=len(index))
        u = hashes[codes]
    return splitmix64(u ^ splitmix64(np.array([seed], dtype=np.uint64))[0])


def hash_folds(keys: np.ndarray, seed: int, folds: int) -> np.ndarray:
    return (key_hash(keys, seed) % np.uint64(folds)).astype(np.int64)


def uses_hash(cv, streaming: bool = False) -> bool:
    return cv.assignment == "hash" or (cv.assignment == "auto" and streaming)


def make_plan(cv, n: int, groups: np.ndarray | None = None, order: np.ndarray | None = None,
              keys: np.ndarray | None = None) -> Plan:
    from sklearn.model_selection import GroupKFold, KFold, RepeatedKFold, TimeSeriesSplit

    k = cv.folds
    if cv.scheme in ("kfold", "repeated_kfold", "time_ordered") and k > n - (1 if cv.scheme == "time_ordered" else 0):
        raise InvalidSpec(f"cv.folds is {k} but the data has only {n} rows; use at most {max(2, n - 1)} folds",
                          errors=[{"field": "cv.folds", "value": k, "message": "more folds than rows"}])
    dummy = np.zeros((n, 1))
    if uses_hash(cv) and cv.scheme in ("kfold", "grouped"):
        source = groups if cv.scheme == "grouped" else (np.arange(n) if keys is None else keys)
        return plan_from_assignment(hash_folds(source, cv.seed, k), k)
    if cv.scheme == "kfold":
        tests = [t for _, t in KFold(k, shuffle=True, random_state=cv.seed).split(dummy)]
        return _partition_plan(tests, n)
    if cv.scheme == "repeated_kfold":
        tests = [t for _, t in RepeatedKFold(n_splits=k, n_repeats=cv.repeats, random_state=cv.seed).split(dummy)]
        atoms, splits = [], []
        assignment = np.empty((cv.repeats, n), dtype=np.int64)
        for r in range(cv.repeats):
            block = tests[r * k:(r + 1) * k]
            base = len(atoms)
            atoms.extend(block)
            for j, t in enumerate(block):
                assignment[r, t] = j
                splits.append(([base + i for i in range(k) if i != j], [base + j]))
        return Plan(atoms, splits, assignment, list(range(k)), list(range(k)))
    if cv.scheme == "grouped":
        n_groups = len(np.unique(groups))
        if n_groups < k:
            raise InvalidSpec(
                f"cv.folds is {k} but column {cv.group_by!r} has only {n_groups} distinct groups; "
                f"use at most {n_groups} folds",
                errors=[{"field": "cv.folds", "value": k, "message": "more folds than groups"}])
        tests = [t for _, t in GroupKFold(n_splits=k).split(dummy, groups=groups)]
        return _partition_plan(tests, n)
    if cv.scheme == "time_ordered":
        idx = np.argsort(order, kind="stable")
        splits_ = list(TimeSeriesSplit(n_splits=k).split(dummy))
        first_train = splits_[0][0]
        atoms = [idx[first_train]] + [idx[t] for _, t in splits_]
        splits = [(list(range(0, j + 1)), [j + 1]) for j in range(k)]
        assignment = np.full(n, -1, dtype=np.int64)
        for j in range(k):
            assignment[atoms[j + 1]] = j
        return Plan(atoms, splits, assignment, list(range(k + 1)), list(range(k)))
    raise InvalidSpec(f"cv.scheme {cv.scheme!r} has no fold plan")


def plan_from_assignment(assignment: np.ndarray, k: int) -> Plan:
    tests = [np.flatnonzero(assignment == j) for j in range(k)]
    empty = [j for j, t in enumerate(tests) if t.size == 0]
    if empty:
        raise InvalidSpec(f"hash assignment left fold {empty[0]} empty; use fewer folds or more rows/groups",
                          errors=[{"field": "cv.folds", "value": k, "message": "empty fold"}])
    return _partition_plan(tests, assignment.size)


def _partition_plan(tests: list[np.ndarray], n: int) -> Plan:
    k = len(tests)
    assignment = np.empty(n, dtype=np.int64)
    for j, t in enumerate(tests):
        assignment[t] = j
    splits = [([i for i in range(k) if i != j], [j]) for j in range(k)]
    # each fold's rows in ascending order, read off the assignment (a pass per fold instead of a sort)
    atoms = [np.flatnonzero(assignment == j) for j in range(k)] if sum(t.size for t in tests) == n else \
        [np.sort(t) for t in tests]
    return Plan(atoms, splits, assignment, list(range(k)), list(range(k)))


def order_key(raw: np.ndarray, name: str) -> np.ndarray:
    """Sort keys of a ``time_ordered`` scheme's ``order_by`` column: numbers as they are, timestamps and
    dates (datetime64, datetime/date objects, ISO-8601 text such as ``2024-03-01`` or
    ``2024-03-01T06:00:00+01:00``) as microseconds since 1970-01-01 UTC. Refused, naming the column
    and the first rows: missing values (NaN, NaT, None; they would sort last and be validated on as the
    most recent rows), booleans, and any other text ("10" < "9" as text)."""
    raw = np.asarray(raw)
    kind = raw.dtype.kind

    def refuse(rows: list[int], what: str, fix: str) -> InvalidData:
        return InvalidData(f"cv.order_by column {name!r} {what} at rows {rows[:5]}; {fix}",
                           errors=[{"field": name, "rows": rows[:5], "message": what}])

    missing_fix = "drop those rows or fill in their times: the scheme validates on the most recent rows"
    if kind == "b":
        raise InvalidData(f"cv.order_by column {name!r} holds booleans, which do not order rows in time; "
                          "send numbers or ISO-8601 timestamps",
                          errors=[{"field": name, "message": "booleans cannot order rows"}])
    if kind in "iu":
        return raw.astype(np.int64) if kind == "i" or raw.max(initial=0) < 2**63 else raw.astype(np.float64)
    if kind == "f":
        bad = np.flatnonzero(np.isnan(raw)).tolist()
        if bad:
            raise refuse(bad, "holds missing values (NaN)", missing_fix)
        return raw.astype(np.float64)
    if kind == "M":
        bad = np.flatnonzero(np.isnat(raw)).tolist()
        if bad:
            raise refuse(bad, "holds missing times (NaT)", missing_fix)
        return raw.astype("datetime64[us]").astype(np.int64)
    import datetime as dt

    epoch = dt.datetime(1970, 1, 1)
    keys = np.empty(raw.size, dtype=np.float64)
    kinds: set[str] = set()
    missing, text = [], []
    for i, v in enumerate(raw.tolist()):
        if isinstance(v, bytes):
            v = v.decode("utf-8", "replace")
        if v is None or (isinstance(v, float) and v != v) or type(v).__name__ in ("NAType", "NaTType"):
            missing.append(i)
            continue
        if isinstance(v, bool):
            text.append(i)
            continue
        if isinstance(v, (int, float)):
            kinds.add("number")
            keys[i] = float(v)
            continue
        if isinstance(v, str):
            try:
                v = dt.datetime.fromisoformat(v.strip())
            except ValueError:
                text.append(i)
                continue
        if isinstance(v, dt.datetime):
            kinds.add("aware" if v.tzinfo is not None and v.utcoffset() is not None else "naive")
            if v.tzinfo is not None:
                v = v.astimezone(dt.timezone.utc).replace(tzinfo=None)
            keys[i] = (v - epoch) // dt.timedelta(microseconds=1)
        elif isinstance(v, dt.date):
            kinds.add("naive")
            keys[i] = (dt.datetime(v.year, v.month, v.day) - epoch) // dt.timedelta(microseconds=1)
        else:
            text.append(i)
    if missing:
        raise refuse(missing, "holds missing values", missing_fix)
    if text:
        shown = [repr(raw[i])[:40] for i in text[:3]]
        raise refuse(text, f"holds values that are neither numbers nor ISO-8601 timestamps ({', '.join(shown)})",
                     "send numbers (JSON numbers, not strings) or timestamps such as 2024-03-01T06:00:00Z; "
                     "text would sort as text (\"10\" before \"9\")")
    if len(kinds) > 1:
        raise InvalidData(f"cv.order_by column {name!r} mixes {' and '.join(sorted(kinds))} values "
                          "(numbers, timestamps with a UTC offset, timestamps without one); use one kind for every row",
                          errors=[{"field": name, "message": "mixed kinds of time"}])
    return keys

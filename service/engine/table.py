"""Tables of named columns: accept dicts, pandas DataFrames and pyarrow Tables; check them; hash them."""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np

from service.errors import InvalidData

Columns = dict[str, np.ndarray]


def as_columns(data: Any) -> Columns:
    """Return ``{name: 1-D array}``; refuse duplicate names and ragged lengths."""
    if type(data) is dict:  # the usual case (a request's columns): already text names and 1-D arrays of one length
        length = -1
        for k, v in data.items():
            if type(k) is not str or type(v) is not np.ndarray or v.ndim != 1 or (length >= 0 and v.shape[0] != length):
                break
            length = v.shape[0]
        else:
            return dict(data)
    names: list[str]
    if isinstance(data, Mapping):
        names = [str(k) for k in data.keys()]
        cols = [np.asarray(v) for v in data.values()]
    elif hasattr(data, "column_names") and hasattr(data, "column"):  # pyarrow.Table
        names = [str(n) for n in data.column_names]
        cols = [np.asarray(data.column(i).to_numpy(zero_copy_only=False)) for i in range(len(names))]
    elif hasattr(data, "columns") and hasattr(data, "iloc"):  # pandas.DataFrame
        names = [str(c) for c in data.columns]
        cols = [np.asarray(data.iloc[:, i].to_numpy()) for i in range(len(names))]
    else:
        raise InvalidData(
            f"data must be a table of named columns (dict of arrays, pandas DataFrame or pyarrow Table), "
            f"got {type(data).__name__}"
        )
    seen: set[str] = set()
    for n in names:
        if n in seen:
            raise InvalidData(f"column name {n!r} appears more than once; give every column a unique name")
        seen.add(n)
    out: Columns = {}
    length = None
    for n, c in zip(names, cols):
        if c.ndim == 0:
            c = c.reshape(1)
        if c.ndim != 1:
            raise InvalidData(f"column {n!r} must be one-dimensional, got shape {c.shape}")
        if length is None:
            length = len(c)
        elif len(c) != length:
            raise InvalidData(f"column {n!r} has {len(c)} values but earlier columns have {length}; "
                              "all columns must have the same number of rows")
        out[n] = c
    return out


def numeric_column(cols: Columns, name: str, role: str, offset: int = 0) -> np.ndarray:
    """The named column as float64, refusing non-numbers and NaN/inf with the first offending rows
    (row numbers count from ``offset``, the position of the first row in the whole source)."""
    if name not in cols:
        known = ", ".join(sorted(cols)[:20])
        raise InvalidData(f"{role} column {name!r} is not in the data; columns present: {known}",
                          errors=[{"field": name, "message": "missing column"}])
    raw = cols[name]
    if raw.dtype.kind == "b" or (raw.dtype.kind == "O" and any(isinstance(v, (bool, np.bool_)) for v in raw[:1000])):
        # one rule with the HTTP tables (engine.result.column_kind): true/false is not a number
        raise InvalidData(
            f"{role} column {name!r} holds true/false values; encode it as 0/1 numbers or list it under 'categorical'",
            errors=[{"field": name, "message": "booleans are not numbers"}])
    if raw.dtype.kind in "iuf":
        x = raw.astype(np.float64, copy=False)
    elif raw.size and (raw.dtype.kind in "UST" or (raw.dtype.kind == "O" and _all_text(raw))):
        # A text-typed column (JSON strings, a CSV column pyarrow read as text) is text even when its
        # values look like numbers ("55.5"): reading them as numbers would hide a caller's type error.
        shown = [offset + i for i in range(min(5, raw.size))]
        raise InvalidData(
            f"{role} column {name!r} must be numeric but holds text, e.g. row {offset} = {_short(raw[0])}; "
            f"{_numeric_fix(role, name)}",
            errors=[{"field": name, "rows": shown, "message": "text where a number belongs"}],
        )
    else:
        try:
            x = np.array([_to_float(v) for v in raw], dtype=np.float64)
        except (TypeError, ValueError):
            bad = [i for i, v in enumerate(raw) if not _is_number(v)][:5]
            shown = [i + offset for i in bad]
            raise InvalidData(
                f"{role} column {name!r} must be numeric; rows {shown} hold {', '.join(_short(raw[i]) for i in bad)}; "
                f"{_numeric_fix(role, name)}",
                errors=[{"field": name, "rows": shown, "message": "not a number"}],
            ) from None
    finite = np.isfinite(x)
    if not finite.all():
        bad = (np.flatnonzero(~finite)[:5] + offset).tolist()
        raise InvalidData(
            f"{role} column {name!r} holds NaN or infinite values, first at rows {bad}; "
            "drop or impute those rows before training",
            errors=[{"field": name, "rows": bad, "message": "NaN or infinite"}],
        )
    return x


def categorical_column(cols: Columns, name: str, offset: int = 0) -> np.ndarray:
    """The named column as level texts; refuses missing values naming the first rows (counted from
    ``offset``, the position of the first row in the whole source)."""
    if name not in cols:
        known = ", ".join(sorted(cols)[:20])
        raise InvalidData(f"categorical column {name!r} is not in the data; columns present: {known}",
                          errors=[{"field": name, "message": "missing column"}])
    raw = cols[name]
    if raw.dtype.kind == "f":
        bad = (np.flatnonzero(~np.isfinite(raw))[:5] + offset).tolist()
        if bad:
            raise InvalidData(f"categorical column {name!r} holds missing values at rows {bad}; fill them in",
                              errors=[{"field": name, "rows": bad, "message": "missing"}])
    if raw.dtype.kind == "O" and _all_text(raw):
        out = raw  # already Python strings (the API's text columns): no copy, no fixed width
    else:
        # An object array of Python strings, never fixed-width unicode: one long label would widen every row.
        out = np.empty(raw.size, dtype=object)
        out[:] = [_level(v) for v in raw]
    # An empty (or blank) label is a missing value, as an empty CSV cell is: refused on every path.
    missing = [i + offset for i, v in enumerate(out) if v is None or not v.strip()][:5]
    if missing:
        raise InvalidData(f"categorical column {name!r} holds missing values (empty or blank labels) at rows {missing}; "
                          "fill them in or drop those rows",
                          errors=[{"field": name, "rows": missing, "message": "missing"}])
    return out


def key_column(cols: Columns, name: str, offset: int = 0) -> np.ndarray:
    """The ``cv.row_key`` column, refusing missing keys (NaN, None, NaT) with their first rows (counted from
    ``offset``): a missing key has no fold of its own, in memory or streamed."""
    raw = cols[name]
    if raw.dtype.kind == "f":
        missing = np.flatnonzero(~np.isfinite(raw))
    elif raw.dtype.kind in "OM":
        missing = np.flatnonzero([_level(v) is None for v in raw]) if raw.dtype.kind == "O" else np.flatnonzero(np.isnat(raw))
    else:
        return raw
    if missing.size:
        rows = (missing[:5] + offset).tolist()
        raise InvalidData(f"cv.row_key column {name!r} holds missing keys at rows {rows}; give every row a key, or "
                          "drop the row_key setting (folds then follow row positions)",
                          errors=[{"field": name, "rows": rows, "message": "missing key"}])
    return raw


def _all_text(raw: np.ndarray) -> bool:
    return all(type(v) is str for v in raw)


def _to_float(v: Any) -> float:
    if isinstance(v, (bool, np.bool_)):
        raise TypeError("bool")
    if isinstance(v, (int, float, np.integer, np.floating)):
        return float(v)
    if isinstance(v, str):
        return float(v.strip())
    raise TypeError(type(v).__name__)


def _is_number(v: Any) -> bool:
    try:
        _to_float(v)
        return True
    except (TypeError, ValueError):
        return False


def _numeric_fix(role: str, name: str) -> str:
    """The fix for text where a number belongs, for the place it happened (training or prediction)."""
    if role == "input":
        return (f"this model was trained with {name!r} as a number, so send a number there (a JSON number, not a "
                "string; a plain number in CSV), or drop the row")
    if role == "target":
        return "the target must be a number on every row; fix or drop those rows"
    return ("send numbers (JSON numbers, not strings), fix or drop those rows, or, if the column holds labels, "
            "list it under 'categorical' in the spec")


def _short(v: Any) -> str:
    """A value as the caller wrote it: text in quotes, numbers bare (never a numpy repr such as np.str_('x'))."""
    if isinstance(v, (str, np.str_)):
        v = str(v)
    elif isinstance(v, np.generic):
        v = v.item()
    s = repr(v)
    return s if len(s) <= 40 else s[:37] + "..."


def _level(v: Any) -> str | None:
    """The level's text, or None for a missing value: None, NaN (float or in an object column), pandas'
    NA and NaT, numpy's NaT. A missing value is never learned as a level named 'nan' or '<NA>'."""
    if v is None or type(v).__name__ in ("NAType", "NaTType"):
        return None
    if isinstance(v, (bool, np.bool_)):  # JSON's spelling, as a CSV or Parquet boolean read as a label
        return "true" if v else "false"
    if isinstance(v, (float, np.floating)):
        if not np.isfinite(v):
            return None
        if float(v).is_integer():
            return str(int(v))
    if isinstance(v, (np.datetime64, np.timedelta64)) and np.isnat(v):
        return None
    if isinstance(v, bytes):
        return v.decode("utf-8", "replace")
    return str(v)

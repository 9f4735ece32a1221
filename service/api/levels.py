"""Unseen category levels at prediction time: the per-request choice between a warning and a refusal.

``unseen_levels`` is ``"warn"`` (the default: the row is answered, the level's effect is taken as zero and
the row's warnings name the level and the known ones) or ``"refuse"`` (the request answers 422 naming the
rows, the values as they were sent and the known levels, and nothing is predicted).
"""

from __future__ import annotations

from typing import Any

from service.engine.model import known_levels, level_as_sent
from service.engine.table import categorical_column
from service.errors import InvalidData

MODES = ("warn", "refuse")


def mode(value: Any, field: str) -> str:
    """Validate the ``unseen_levels`` option (body field or query parameter)."""
    if value is None:
        return "warn"
    if value not in MODES:
        raise InvalidData(
            f"{field} must be one of 'warn' (answer and list the unseen level in the row's warnings) or 'refuse' "
            f"(answer 422 instead), got {value!r}.",
            errors=[{"field": field, "value": value, "message": "allowed values: 'warn', 'refuse'"}],
        )
    return value


def refuse_unseen(model: Any, cols: dict[str, Any]) -> None:
    """Raise ``InvalidData`` when any categorical input holds a level the model was not trained with."""
    cats = model.categories
    problems = []
    for name, levels in zip(cats.names, cats.levels):
        if name not in cols:
            continue  # the model's own column check names missing columns
        known = set(levels)
        labels = categorical_column(cols, name)
        raw = cols[name]
        bad = [i for i, v in enumerate(labels.tolist()) if v not in known]
        if bad:
            problems.append((name, levels, bad, raw))
    if not problems:
        return
    name, levels, bad, raw = problems[0]
    rows = ", ".join(str(i) for i in bad[:5]) + (f" (and {len(bad) - 5} more)" if len(bad) > 5 else "")
    raise InvalidData(
        f"rows[{bad[0]}].{name} = {level_as_sent(raw[bad[0]])} was not seen in training (row(s) {rows}); known levels "
        f"of {name!r}: {known_levels(levels)}. Send one of those, or use \"unseen_levels\": \"warn\" to answer with "
        "the level's effect taken as zero.",
        errors=[{"field": f"rows[{i}].{n}", "value": str(r[i]), "message": "level not seen in training"}
                for n, _lv, b, r in problems for i in b[:20]],
    )

"""Warnings about the data a version was trained on (kept in the version's ``warnings``).

- A text column that no role uses (not the target, not under ``categorical``, not a CV column) was left
  out of the model; people usually meant it as a category, so the warning names it and the fix.
- Too little data: fewer than ``MIN_ROWS_PER_FOLD`` rows per validation fold, or fewer than
  ``MIN_ROWS_PER_TERM`` rows per coefficient of the chosen basis. Both floors are rules of thumb
  (common practice, no single source: about ten observations per estimated coefficient is the usual
  regression guideline, and a validation fold of fewer than about ten rows gives a CV figure dominated by
  noise). The penalty keeps the fit defined below them; the warning says the figures are fragile.
"""

from __future__ import annotations

from typing import Any

MIN_ROWS_PER_FOLD = 10  # common practice (rule of thumb), see the module docstring
MIN_ROWS_PER_TERM = 10  # common practice: "about ten rows per coefficient", see the module docstring


def data_warnings(spec: Any, schema: dict[str, str], used: list[str], n_rows: int, n_splits: int,
                  n_terms: int) -> list[str]:
    """Warnings for unused text columns and for too few rows per fold or per basis term.

    ``schema`` maps every column of the data to "number" or "text"; ``used`` lists the columns with a
    role; ``n_terms`` counts the columns of the chosen basis (one-hot columns included)."""
    out = []
    for name, kind in schema.items():
        if kind == "text" and name not in used:
            out.append(f"column {name} is text and was not used; list it under categorical to use it")
    per_fold = n_rows / max(1, n_splits)
    per_term = n_rows / max(1, n_terms)
    short = []
    if per_fold < MIN_ROWS_PER_FOLD and getattr(spec.cv, "scheme", None) != "loo":  # LOO folds hold one row by design
        short.append(f"{per_fold:.3g} rows per validation fold ({n_rows} rows, {n_splits} folds; floor "
                     f"{MIN_ROWS_PER_FOLD})")
    if per_term < MIN_ROWS_PER_TERM:
        short.append(f"{per_term:.3g} rows per basis term ({n_rows} rows, {n_terms} terms in the chosen basis; floor "
                     f"{MIN_ROWS_PER_TERM})")
    if short:
        out.append("little data: " + " and ".join(short) + "; the floors are a rule of thumb (common practice: about "
                   "ten rows per coefficient and per validation fold). The cross-validated figures and intervals of "
                   "this version rest on few rows: collect more rows, or use fewer folds or a simpler basis")
    return out

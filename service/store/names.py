"""Model names: the one check every public store method runs before a name touches a path or a query."""

from __future__ import annotations

import re

from service.errors import InvalidName

NAME_RULE = r"^[a-z0-9][a-z0-9_.-]{0,62}$"
_NAME_RE = re.compile(NAME_RULE)
# Names the store itself uses inside its folder (the default SQLite catalog and its side files).
_RESERVED_PREFIX = "catalog.db"


def validate_name(name: object) -> str:
    """Return ``name`` unchanged when it is a valid model name, else raise ``InvalidName``.

    The rule is ``^[a-z0-9][a-z0-9_.-]{0,62}$``: 1 to 63 characters, lower-case letters, digits, ``_``,
    ``.`` and ``-``, starting with a letter or digit. The first-character rule already excludes ``.``,
    ``..`` and hidden names; the extra checks below are belts on top of braces.
    """
    if not isinstance(name, str):
        raise InvalidName(
            f"model name must be a string, received {type(name).__name__} {name!r}; "
            f"use 1-63 characters matching {NAME_RULE}.",
            errors=[{"field": "name", "value": repr(name), "message": f"must match {NAME_RULE}"}],
        )
    # re.match with $ accepts a trailing newline; fullmatch does not.
    if not _NAME_RE.fullmatch(name) or set(name) <= {"."}:
        shown = name if len(name) <= 80 else name[:77] + "..."
        raise InvalidName(
            f"model name {shown!r} is not allowed; use 1-63 characters of lower-case letters, digits, "
            f"'_', '.' or '-', starting with a letter or digit (rule {NAME_RULE}).",
            errors=[{"field": "name", "value": shown, "message": f"must match {NAME_RULE}"}],
        )
    if name.startswith(_RESERVED_PREFIX):
        raise InvalidName(
            f"model name {name!r} is reserved for the store's own catalog file; pick another name.",
            errors=[{"field": "name", "value": name, "message": "reserved name"}],
        )
    return name

"""FastAPI dependencies the routes share (the framework's "bigger applications" layout).

``StoreDep`` gives a handler the app's ``Store``; ``ModelName`` is the ``{name}`` path parameter, checked
against the naming rule (``InvalidName``, a 422 problem naming the rule) before the handler runs. Both are
``async`` so FastAPI calls them on the event loop, with no thread hand-off. The two predict routes do not
use them: they are the hot path and do their own checks in their first statements (DEVELOPERS.md, "The
prediction path"); the pages do not either, because their errors are answered as HTML pages.
"""

from __future__ import annotations

from typing import Annotated

from fastapi import Depends, Path, Request

from service.store import Store
from service.store.names import validate_name

NAME_DESCRIPTION = "Model name: 1-63 of a-z 0-9 _ . - starting with a letter or digit."


async def get_store(request: Request) -> Store:
    return request.app.state.store


async def model_name(name: Annotated[str, Path(description=NAME_DESCRIPTION)]) -> str:
    validate_name(name)
    return name


StoreDep = Annotated[Store, Depends(get_store)]
ModelName = Annotated[str, Depends(model_name)]

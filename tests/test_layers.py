"""Each layer imports only the layers below it (DEVELOPERS.md, "Layout and layers").

The check reads every module's imports with ``ast`` (top level and inside functions), so a lazy import
cannot slip a dependency past it.
"""

from __future__ import annotations

import ast
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1] / "service"

# layer of each part of the package; a module may import its own layer or lower ones
LAYERS = {
    "service": 0, "service.errors": 0, "service.settings": 0, "service.demo": 0, "service.paths": 0,
    "service.engine": 1,
    "service.store": 2, "service.sources": 2, "service.filelist": 2,
    "service.api": 3, "service.worker": 3,
    "service.client": 4, "service.cli": 4,
}
# third-party packages each layer may not touch at all
FORBIDDEN = {
    1: {"fastapi", "starlette", "uvicorn", "httpx", "sqlalchemy", "alembic", "psycopg", "pyarrow", "typer", "rich",
        "matplotlib", "prometheus_client"},
    2: {"fastapi", "starlette", "uvicorn", "httpx", "typer", "rich"},
}
# the CLI reaches layer 3 only to start a server or a worker (serve / worker commands)
ALLOWED_UPWARD = {("service.cli", "service.api.server"), ("service.cli", "service.worker"),
                  ("service.cli", "service.api.app")}


def layer_of(module: str) -> int | None:
    best = None
    for prefix, layer in LAYERS.items():
        if module == prefix or module.startswith(prefix + "."):
            if best is None or len(prefix) > len(best[0]):
                best = (prefix, layer)
    return None if best is None else best[1]


def modules():
    for path in sorted(ROOT.rglob("*.py")):
        rel = path.relative_to(ROOT.parent).with_suffix("")
        name = ".".join(rel.parts).removesuffix(".__init__")
        yield name, path


def imports(path: Path, module: str):
    tree = ast.parse(path.read_text(encoding="utf-8"))
    pkg = module if path.name == "__init__.py" else module.rsplit(".", 1)[0]
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            for a in node.names:
                yield a.name
        elif isinstance(node, ast.ImportFrom):
            if node.level:
                base = pkg.split(".")
                base = base[: len(base) - (node.level - 1)]
                yield ".".join(base + ([node.module] if node.module else []))
            elif node.module:
                yield node.module


@pytest.mark.parametrize("module,path", list(modules()), ids=lambda v: str(v) if isinstance(v, str) else "")
def test_module_imports_only_lower_layers(module, path):
    own = layer_of(module)
    assert own is not None, f"{module} is not assigned to a layer; add it to LAYERS and to DEVELOPERS.md"
    for imp in imports(path, module):
        top = imp.split(".")[0]
        assert top not in FORBIDDEN.get(own, set()), f"{module} (layer {own}) imports {imp}"
        if not imp.startswith("service"):
            continue
        target = layer_of(imp)
        if target is None:  # "service" itself
            continue
        if any(module.startswith(a) and imp.startswith(b) for a, b in ALLOWED_UPWARD):
            continue
        assert target <= own, f"{module} (layer {own}) imports {imp} (layer {target})"

"""Each module imports exactly what DEVELOPERS.md's layer table allows ("Layout and layers").

The rules are read from DEVELOPERS.md itself (the layer table and the table of imports across the rule), so
the guide and the check cannot drift apart. A module may import its own part (one cell of the "modules"
column: a package folder or a file), the layers its row names, the pairs of the second table, the standard
library and its row's libraries. Imports are read with ``ast`` (top level and inside functions), so a lazy
import cannot slip a dependency past the check.
"""

from __future__ import annotations

import ast
import re
import sys
from dataclasses import dataclass
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parents[1]
ROOT = REPO / "service"
GUIDE = REPO / "DEVELOPERS.md"


@dataclass(frozen=True)
class Row:
    layer: int
    parts: tuple[str, ...]  # dotted module names: "service.engine", "service.errors"
    layers: frozenset[int]  # layers it may import from
    modules: tuple[str, ...]  # other service modules it may import by name
    libraries: frozenset[str]


def _ticked(cell: str) -> list[str]:
    return re.findall(r"`([^`]+)`", cell)


def _dotted(path: str) -> str:
    return path.rstrip("/").removesuffix(".py").replace("/", ".").removesuffix(".__init__")


def _layers(cell: str) -> frozenset[int]:
    found: set[int] = set()
    for a, b in re.findall(r"layers? (\d)(?:\s*[–-]\s*(\d))?", cell):
        found |= set(range(int(a), int(b or a) + 1))
    return frozenset(found)


def _section_tables(text: str) -> list[list[list[str]]]:
    section = text.split("## Layout and layers", 1)[1].split("\n## ", 1)[0]
    tables, current = [], []
    for line in section.splitlines():
        if line.startswith("|"):
            cells = [c.strip() for c in line.strip().strip("|").split("|")]
            if not set("".join(cells)) <= set("-: "):
                current.append(cells)
        elif current:
            tables.append(current)
            current = []
    if current:
        tables.append(current)
    return tables


def documented() -> tuple[list[Row], set[tuple[str, str]]]:
    tables = {tuple(t[0]): t for t in _section_tables(GUIDE.read_text(encoding="utf-8"))}
    layer_table = tables[("layer", "modules", "imports from `service`", "libraries")]
    extra_table = tables[("module", "may also import", "why")]
    rows = [Row(layer=int(cells[0]), parts=tuple(_dotted(p) for p in _ticked(cells[1])), layers=_layers(cells[2]),
                modules=tuple(_ticked(cells[2])),
                libraries=frozenset(_ticked(cells[3])))
            for cells in layer_table[1:]]
    extra = {(_ticked(cells[0])[0], _ticked(cells[1])[0]) for cells in extra_table[1:]}
    return rows, extra


ROWS, EXTRA = documented()


def part_of(module: str) -> tuple[Row, str] | None:
    best = None
    for row in ROWS:
        for part in row.parts:
            # the package root ("service", its __init__) is its own part only: a new module elsewhere in
            # the package must be given a row, not fall into layer 0 by prefix
            if module == part or (part != "service" and module.startswith(part + ".")):
                if best is None or len(part) > len(best[1]):
                    best = (row, part)
    return best


def modules():
    for path in sorted(ROOT.rglob("*.py")):
        rel = path.relative_to(REPO).with_suffix("")
        yield ".".join(rel.parts).removesuffix(".__init__"), path


def imports(path: Path, module: str):
    """Every module name an import statement of ``path`` names; ``from a import b`` gives ``a.b`` (b may
    be a module or a name in a, and the part lookup is by prefix, so both resolve to the right part)."""
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
                source = ".".join(base + ([node.module] if node.module else []))
            else:
                source = node.module
            for a in node.names:
                yield f"{source}.{a.name}" if a.name != "*" else source


def allowed(module: str, imp: str) -> bool:
    top = imp.split(".")[0]
    row, part = part_of(module)
    if top != "service":
        return top in sys.stdlib_module_names or top == "__future__" or top in row.libraries
    target = part_of(imp)
    if target is None:
        return imp in ("service", "service.__version__")
    target_row, target_part = target
    if target_part == part or target_row.layer in row.layers:
        return True
    if any(imp == m or imp.startswith(m + ".") for m in row.modules):
        return True
    return any((module == a or module.startswith(a + ".")) and (imp == b or imp.startswith(b + "."))
               for a, b in EXTRA)


def test_the_guide_has_one_row_per_layer_below_its_own():
    assert [r.layer for r in ROWS] == [0, 1, 2, 3, 4]
    assert [sorted(r.layers) for r in ROWS] == [[0], [0], [0, 1], [0, 1, 2], [0]]
    assert ROWS[4].modules == ("service.client",)
    # every layer imports only from below (layer 0 from its own peers); the extras are the only way up
    assert all(max(r.layers) < r.layer or r.layer == 0 for r in ROWS)
    assert EXTRA == {("service.api.server", "service.worker"), ("service.cli", "service.api.server"),
                     ("service.cli", "service.worker"), ("service.cli", "service.store")}


@pytest.mark.parametrize("module,path", list(modules()), ids=lambda v: str(v) if isinstance(v, str) else "")
def test_module_imports_only_what_the_layer_table_allows(module, path):
    assert part_of(module) is not None, f"{module} is in no row of DEVELOPERS.md's layer table; add it there"
    bad = sorted({imp for imp in imports(path, module) if not allowed(module, imp)})
    assert bad == [], f"{module} (layer {part_of(module)[0].layer}) imports {bad}, which DEVELOPERS.md does not allow"


@pytest.mark.parametrize("module,imp,expected", [
    ("service.worker", "service.api.problems.problem_body", False),  # the worker stays below the HTTP layer
    ("service.api.app", "service.worker.Worker", False),  # only the server embeds the worker
    ("service.api.server", "service.worker.Worker", True),
    ("service.cli", "service.api.routes.trainings.job_view", False),  # the CLI reaches the API only to serve
    ("service.cli", "service.api.server.run", True),
    ("service.cli", "service.engine.tune", False),
    ("service.client", "service.cli.app", False),
    ("service.cli", "service.client.Client", True),
    ("service.store.store", "service.engine.load_model", True),
    ("service.engine.tune", "service.store.Store", False),
    ("service.engine.tune", "fastapi", False),
    ("service.store.jobs", "service.tables.stage", False),  # peers of layer 2 stay apart
    ("service.tables", "service.paths.shown", True),
    ("service.problems", "fastapi.Request", False),
    ("service.problems", "service.__version__", True),
])
def test_the_rule_refuses_what_the_table_does_not_name(module, imp, expected):
    assert allowed(module, imp) is expected


def test_a_module_in_no_row_is_not_taken_for_the_package_root():
    assert part_of("service.newcomer") is None
    assert part_of("service")[0].layer == 0


def test_the_guide_names_every_folder_of_the_package():
    tables = {tuple(t[0]): t for t in _section_tables(GUIDE.read_text(encoding="utf-8"))}
    listed = {_ticked(cells[0])[0].rstrip("/") for cells in tables[("folder", "what lives there")][1:]}
    folders = {str(p.relative_to(REPO)) for p in [ROOT, *ROOT.rglob("*")]
               if p.is_dir() and p.name != "__pycache__" and p.parent.name != "migrations"}
    assert folders <= listed, sorted(folders - listed)

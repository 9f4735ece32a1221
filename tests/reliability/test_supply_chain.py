"""Supply chain: every dependency has a lower bound, and nothing in the package unpickles anything.

Stored models are JSON plus .npz read with ``allow_pickle=False`` (service/store/artifact.py). This test
reads every module of ``service/`` with ``ast`` and refuses any call that can execute code while
deserializing: pickle/cPickle/dill/cloudpickle loads, ``joblib.load``, ``numpy.load`` (and
``np.lib.format.read_array``) without a literal ``allow_pickle=False``, ``torch.load``,
``pandas.read_pickle``, ``shelve.open``, ``marshal.load(s)`` and ``yaml.load`` without a safe loader.
(Which calls unpickle: the standard library and numpy documentation; ``numpy.load`` documents that
``allow_pickle=True`` "can execute arbitrary code".) The scanner is exercised on a sample with every
forbidden form first, so a scanner that finds nothing cannot pass by accident.

The worker's ``multiprocessing`` pipe between a worker and the training process it spawned does
pickle, but only objects the two processes of one installation build themselves, never stored data;
the scanner is about reads of stored or uploaded bytes, so it does not flag ``Connection.recv``.
"""

from __future__ import annotations

import ast
import importlib.metadata as md
import tomllib
from pathlib import Path

import pytest
from packaging.requirements import Requirement
from packaging.version import Version

REPO = Path(__file__).resolve().parents[2]
PACKAGE = REPO / "service"

UNPICKLING_MODULES = {"pickle", "cPickle", "_pickle", "dill", "cloudpickle", "shelve", "marshal"}
FORBIDDEN_CALLS = {
    ("pickle", "load"), ("pickle", "loads"), ("pickle", "Unpickler"), ("_pickle", "load"), ("_pickle", "loads"),
    ("cPickle", "load"), ("cPickle", "loads"), ("dill", "load"), ("dill", "loads"), ("cloudpickle", "load"),
    ("cloudpickle", "loads"), ("joblib", "load"), ("torch", "load"), ("pandas", "read_pickle"),
    ("shelve", "open"), ("marshal", "load"), ("marshal", "loads"),
}
NEEDS_ALLOW_PICKLE_FALSE = {("numpy", "load"), ("numpy.lib.format", "read_array"), ("numpy.lib", "format.read_array")}


class _Scanner(ast.NodeVisitor):
    """Finds unpickling calls, following ``import x as y`` and ``from x import y as z`` aliases."""

    def __init__(self, where: str):
        self.where = where
        self.aliases: dict[str, str] = {}  # local name -> dotted origin
        self.found: list[str] = []

    def visit_Import(self, node: ast.Import) -> None:
        for a in node.names:
            self.aliases[a.asname or a.name.split(".")[0]] = a.name if a.asname else a.name.split(".")[0]
        self.generic_visit(node)

    def visit_ImportFrom(self, node: ast.ImportFrom) -> None:
        for a in node.names:
            if node.module:
                self.aliases[a.asname or a.name] = f"{node.module}.{a.name}"
        self.generic_visit(node)

    def _dotted(self, node: ast.AST) -> str | None:
        parts = []
        while isinstance(node, ast.Attribute):
            parts.append(node.attr)
            node = node.value
        if not isinstance(node, ast.Name):
            return None
        parts.append(self.aliases.get(node.id, node.id))
        return ".".join(reversed(parts))

    def visit_Call(self, node: ast.Call) -> None:
        name = self._dotted(node.func)
        if name:
            mod, _, func = name.rpartition(".")
            where = f"{self.where}:{node.lineno}"
            if (mod, func) in FORBIDDEN_CALLS or (mod.split(".")[0] in UNPICKLING_MODULES and func.startswith("load")):
                self.found.append(f"{where} calls {name}")
            if (mod, func) in NEEDS_ALLOW_PICKLE_FALSE or name in ("numpy.lib.format.read_array",):
                kw = {k.arg: k.value for k in node.keywords}
                ok = isinstance(kw.get("allow_pickle"), ast.Constant) and kw["allow_pickle"].value is False
                if not ok:
                    self.found.append(f"{where} calls {name} without allow_pickle=False")
            if (mod, func) == ("yaml", "load"):
                loader = {k.arg: k.value for k in node.keywords}.get("Loader")
                text = ast.unparse(loader) if loader is not None else ""
                if "Safe" not in text:
                    self.found.append(f"{where} calls yaml.load without a safe loader")
        self.generic_visit(node)


def scan_source(text: str, where: str) -> list[str]:
    s = _Scanner(where)
    s.visit(ast.parse(text))
    return s.found


BAD_SAMPLE = '''
import pickle, joblib
import numpy as np
import numpy
from pickle import loads as undo
import torch as t
import pandas as pd
from numpy.lib import format as npf
pickle.load(open("m.pkl", "rb"))
undo(b"")
joblib.load("m.joblib")
np.load("a.npz")
numpy.load("a.npz", allow_pickle=True)
t.load("w.pt")
pd.read_pickle("f.pkl")
npf.read_array(fh)
'''

GOOD_SAMPLE = '''
import numpy as np
np.load("a.npz", allow_pickle=False)
import json
json.loads("{}")
'''


def test_scanner_finds_every_forbidden_form_in_a_sample():
    found = scan_source(BAD_SAMPLE, "sample")
    # one finding per forbidden line of the sample (lines 9-16)
    assert sorted({int(f.split(":")[1].split()[0]) for f in found}) == list(range(9, 17)), found
    assert scan_source(GOOD_SAMPLE, "good") == []


def test_no_unpickling_of_stored_data_anywhere_in_the_package():
    modules = sorted(PACKAGE.rglob("*.py"))
    assert len(modules) > 30  # the whole package was read, not an empty folder
    found = []
    for path in modules:
        found += scan_source(path.read_text(encoding="utf-8"), str(path.relative_to(REPO)))
    assert found == [], "deserialization that can execute code:\n" + "\n".join(found)


def _pyproject() -> dict:
    return tomllib.loads((REPO / "pyproject.toml").read_text(encoding="utf-8"))


def _all_requirements() -> list[tuple[str, Requirement]]:
    project = _pyproject()["project"]
    out = [("dependencies", Requirement(r)) for r in project["dependencies"]]
    for extra, reqs in project.get("optional-dependencies", {}).items():
        out += [(f"optional-dependencies.{extra}", Requirement(r)) for r in reqs]
    return out


def test_every_dependency_has_a_lower_bound():
    reqs = _all_requirements()
    assert len(reqs) >= 15
    missing = [f"{where}: {req}" for where, req in reqs if not any(s.operator in (">=", "==", "~=") for s in req.specifier)]
    assert missing == [], "dependencies without a lower bound (add '>=<tested version>'):\n" + "\n".join(missing)
    # no upper pins on the runtime dependencies (common practice for libraries: they block security fixes)
    pinned = [str(r) for where, r in reqs if where == "dependencies" and any(s.operator in ("<", "<=", "==") for s in r.specifier)]
    assert pinned == []


@pytest.mark.parametrize("where,req", _all_requirements(), ids=lambda v: str(v) if isinstance(v, Requirement) else v)
def test_installed_versions_meet_the_declared_lower_bounds(where, req):
    """The bounds are not wishes: the environment the tests run in satisfies each of them."""
    try:
        installed = md.version(req.name)
    except md.PackageNotFoundError:
        if where.startswith("optional"):
            pytest.skip(f"{req.name} ({where}) is not installed here")
        raise
    assert req.specifier.contains(Version(installed), prereleases=True), (str(req), installed)

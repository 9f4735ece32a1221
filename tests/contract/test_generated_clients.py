"""Clients generated from a live server's /openapi.json by two general-purpose generators, as a new user
would make them, type-checked and run.

* Python: ``openapi-python-client`` (PyPI) generates a package; ``clients/tour_python.py`` (submit a job
  with a typed spec, wait for it, read the CV table, predict, set the live version, make a key, do it all
  again with the key) passes ``mypy --strict`` with ``--disallow-any-expr`` (no expression of type Any)
  and then runs against the server.
* TypeScript: ``openapi-typescript`` (npm) generates the types, ``openapi-fetch`` (npm) calls the routes;
  ``clients/tour.ts`` passes ``tsc --strict --noEmit``, is compiled, and runs under node.

Neither tour casts (no ``Any``/``cast``/``type: ignore`` in Python, no ``any``/``unknown``/``as`` in
TypeScript; checked on their sources). mypy comes from ``pip install -e ".[test]"``; openapi-python-client
is installed (pinned, ``PYTHON_GENERATOR``) into its own virtual environment in a cache folder, because it
pins typer below the version the CLI uses; the npm tools (pinned in ``clients/package.json``) into a cache
folder too. A test skips, naming why, only when its tool cannot be installed (no node or npm, or a
registry unreachable).
"""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import httpx
import pytest

import livesvc

CLIENTS = Path(__file__).resolve().parent / "clients"
PYTHON_GENERATOR = "openapi-python-client==0.29.1"
CACHE = Path(os.environ.get("TIKHON_TEST_TOOLS_DIR", Path.home() / ".cache" / "tikhon-tests"))


@pytest.fixture()
def open_server(tmp_path_factory):
    """A server with no key yet (each tour makes one), and its document as read then."""
    with livesvc.live_service(tmp_path_factory.mktemp("generated"), worker=True) as (base, _, _):
        doc = httpx.get(f"{base}/openapi.json", timeout=60).json()
        path = tmp_path_factory.mktemp("doc") / "openapi.json"
        path.write_text(json.dumps(doc))
        yield base, path


def _run(cmd: list[str], cwd: Path, timeout: float = 600, env: dict | None = None) -> subprocess.CompletedProcess:
    return subprocess.run(cmd, cwd=cwd, capture_output=True, text=True, timeout=timeout,
                          env={**os.environ, **(env or {})})


def test_python_client_type_checks_and_runs(open_server, tmp_path):
    base, doc = open_server
    generator = _python_generator()
    pytest.importorskip("mypy", reason="mypy is not installed: pip install -e '.[test]' installs it")
    made = _run([generator, "generate", "--path", str(doc), "--meta", "none", "--output-path", "tikhon_api"], tmp_path)
    assert made.returncode == 0, made.stdout + made.stderr
    package = tmp_path / "tikhon_api"
    # every JSON operation returns its own model, never Any (the figure routes' images are bytes: Any there)
    returns = {p.stem: re.search(r"def sync\(.*?\) -> (.*?):\n", p.read_text(), re.S).group(1)
               for p in (package / "api").rglob("*.py") if "def sync(" in p.read_text()}
    assert returns["list_models"] == "ModelList | Problem | None"
    assert returns["get_training"] == "Job | Problem | None"
    assert returns["get_cv_table"] == "CvTable | Problem | None"
    assert returns["predict"] == "PredictResponse | Problem | None"
    untyped = sorted(k for k, v in returns.items() if v.startswith("Any") and not k.startswith("plot"))
    assert untyped == ["delete_version"]  # 204: no body at all
    assert returns["get_metrics"] == "Problem | str | None"

    tour = tmp_path / "tour_python.py"
    shutil.copy(CLIENTS / "tour_python.py", tour)
    source = tour.read_text().split('"""', 2)[2]  # the code, after the module's docstring
    assert not re.search(r"\bAny\b|\bcast\(|type:\s*ignore", source)
    checked = _run([sys.executable, "-m", "mypy", "--strict", "--follow-imports=silent", "--disallow-any-expr",
                    "--disallow-any-explicit", "--no-incremental", "tour_python.py"], tmp_path)
    assert checked.returncode == 0 and "Success" in checked.stdout, checked.stdout + checked.stderr

    ran = _run([sys.executable, "tour_python.py", base], tmp_path)
    assert ran.returncode == 0, ran.stdout + ran.stderr
    lines = ran.stdout.splitlines()
    assert lines[0].startswith("models=['pump-generated'] versions=[1] answered_by=1 ")
    assert lines[1].startswith("models=['pump-generated'] versions=[1, 2] answered_by=2 ")  # with the key
    assert re.match(r"key=[0-9a-f]{12} scopes=\['admin'\]", lines[2])


def _python_generator() -> str:
    """openapi-python-client (PYTHON_GENERATOR) in its own virtual environment, made once in the cache."""
    venv = CACHE / "openapi-python-client"
    exe = venv / "bin" / "openapi-python-client"
    stamp = venv / "installed.txt"
    if exe.exists() and stamp.exists() and stamp.read_text() == PYTHON_GENERATOR:
        return str(exe)
    made = _run([sys.executable, "-m", "venv", "--clear", str(venv)], CACHE if CACHE.exists() else Path.cwd())
    if made.returncode != 0:
        pytest.skip(f"no virtual environment for openapi-python-client ({made.stderr.strip()[-300:]})")
    done = _run([str(venv / "bin" / "python"), "-m", "pip", "install", "-q", PYTHON_GENERATOR], venv, timeout=900)
    if done.returncode != 0 or not exe.exists():
        pytest.skip(f"openapi-python-client could not be installed (pip: {done.stderr.strip()[-300:]})")
    stamp.write_text(PYTHON_GENERATOR)
    return str(exe)


def _npm_tools() -> Path:
    """The pinned npm tools (clients/package.json), installed once into a cache folder."""
    npm, node = shutil.which("npm"), shutil.which("node")
    if not npm or not node:
        pytest.skip("node and npm are not installed (.ci/run installs the Debian packages nodejs and npm)")
    spec = (CLIENTS / "package.json").read_text()
    home = Path(os.environ.get("TIKHON_TEST_NPM_DIR", CACHE / "npm"))
    home.mkdir(parents=True, exist_ok=True)
    if (home / "package.json").exists() and (home / "package.json").read_text() == spec \
            and (home / "node_modules" / ".bin" / "tsc").exists():
        return home
    (home / "package.json").write_text(spec)
    done = _run([npm, "install", "--no-audit", "--no-fund", "--loglevel=error"], home, timeout=900)
    if done.returncode != 0:
        pytest.skip(f"the npm tools could not be installed (npm install: {done.stderr.strip()[-300:]})")
    return home


def test_typescript_client_type_checks_and_runs(open_server, tmp_path):
    base, doc = open_server
    tools = _npm_tools()
    work = tmp_path / "ts"
    work.mkdir()
    (work / "node_modules").symlink_to(tools / "node_modules")
    for name in ("tour.ts", "tsconfig.json", "package.json"):
        shutil.copy(CLIENTS / name, work / name)
    code = re.sub(r"//.*", "", (work / "tour.ts").read_text())
    assert not re.search(r"\bany\b|\bunknown\b|\bas\s+[A-Za-z{\[]|<[A-Z]\w*>\s*\w", code), "the tour casts"
    bin_ = tools / "node_modules" / ".bin"
    # --default-non-nullable false: a member with a default is optional in a request (README, client section)
    made = _run([str(bin_ / "openapi-typescript"), str(doc), "-o", "schema.d.ts", "--default-non-nullable", "false"],
                work)
    assert made.returncode == 0, made.stdout + made.stderr
    types = (work / "schema.d.ts").read_text()
    assert 'state: components["schemas"]["JobState"]' in types
    assert 'JobState: "queued" | "running" | "succeeded" | "failed" | "cancelled";' in types
    checked = _run([str(bin_ / "tsc"), "--noEmit", "-p", "tsconfig.json"], work)
    assert checked.returncode == 0, checked.stdout + checked.stderr
    built = _run([str(bin_ / "tsc"), "-p", "tsconfig.json"], work)
    assert built.returncode == 0, built.stdout + built.stderr
    ran = _run([shutil.which("node"), "out/tour.js", base], work)
    assert ran.returncode == 0, ran.stdout + ran.stderr
    lines = ran.stdout.splitlines()
    assert lines[0].startswith("models=pump-typescript answered_by=1 ") and lines[0].endswith("history=null->1")
    assert lines[1].startswith("models=pump-typescript answered_by=2 ") and lines[1].endswith("history=null->1 1->2")
    assert re.match(r"key=[0-9a-f]{12} scopes=admin$", lines[2])

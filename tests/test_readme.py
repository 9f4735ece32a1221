"""The README's promises, checked.

* The "Set up" section holds exactly two commands. The first runs, unchanged, in a fresh virtual
  environment (``python -m venv``, no system site-packages: every dependency comes from the package's
  own declaration) on a copy of this source tree in a temporary folder; the server it starts answers
  ``/readyz``, and a prediction from the demo model carries its metadata and an interval. The README's
  Python tour then runs against that server, and the scheduled-retrain command line as well.
* The second command is the one ``.ci/run`` runs; here it is run in its cheap form: its install step
  in the same fresh environment, then ``pytest --collect-only`` (collecting every test module imports
  it, so a dependency missing from ``pyproject.toml`` fails here), not the whole suite again.
* The configuration table lists every ``Settings`` field, and the spec reference every spec field.
"""

from __future__ import annotations

import os
import re
import shutil
import signal
import socket
import subprocess
import sys
import time
import tomllib
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
README = ROOT / "README.md"
DEMO_URL = "http://127.0.0.1:8000"


def section(title: str) -> str:
    text = README.read_text(encoding="utf-8")
    start = text.index(f"\n## {title}\n")
    end = text.find("\n## ", start + 1)
    return text[start:end if end != -1 else None]


def setup_commands() -> list[str]:
    blocks = re.findall(r"```sh\n(.*?)```", section("Set up"), re.S)
    return [line.strip() for block in blocks for line in block.splitlines() if line.strip()]


def python_tour() -> str:
    (block,) = re.findall(r"```python\n(.*?)```", section("Five-minute tour"), re.S)
    return block


def test_set_up_holds_exactly_the_two_commands():
    commands = setup_commands()
    assert len(commands) == 2, commands
    assert commands[0].startswith("pip install -e . && ") and commands[0].endswith("tikhon serve --demo")
    assert commands[1] == 'pip install -e ".[test]" && pytest'


def test_the_test_command_is_what_ci_runs():
    ci = (ROOT / ".ci" / "run").read_text(encoding="utf-8")
    runs = [line.strip() for line in ci.splitlines() if "pytest" in line and not line.lstrip().startswith("#")
            and "pip install" in line]
    assert runs == [setup_commands()[1]]
    extras = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]["optional-dependencies"]
    assert any(req.startswith("pytest") for req in extras["test"])
    scripts = tomllib.loads((ROOT / "pyproject.toml").read_text())["project"]["scripts"]
    assert scripts["tikhon"] == "service.cli:main"


def test_configuration_lists_every_setting():
    from service.settings import Settings

    text = section("Configuration")
    missing = [f"TIKHON_{name.upper()}" for name in Settings.model_fields if f"`TIKHON_{name.upper()}`" not in text]
    assert not missing, f"README 'Configuration' lacks {missing}; add a row for each"


def test_spec_reference_lists_every_spec_field():
    from pydantic import BaseModel

    from service.engine.spec import LinearBasis, PolynomialBasis, RBFBasis, StrengthRange, TuneSpec

    def paths(model: type[BaseModel], prefix: str) -> list[str]:
        out = []
        for name, field in model.model_fields.items():
            ann = field.annotation
            groups = [c for c in getattr(ann, "__args__", (ann,))
                      if isinstance(c, type) and issubclass(c, BaseModel) and c is not StrengthRange]
            if groups:  # a group such as cv or penalty: its fields are listed one by one
                for group in groups:
                    out.extend(paths(group, f"{prefix}{name}."))
            else:
                out.append(prefix + name)
        return out

    wanted = paths(TuneSpec, "")
    for basis in (LinearBasis, PolynomialBasis, RBFBasis):
        wanted += [f"bases[].{n}" for n in basis.model_fields]
    wanted += ["penalty.strengths.min"]
    text = section("Training spec reference")
    missing = sorted({w for w in wanted if f"`{w}`" not in text})
    assert not missing, f"README 'Training spec reference' lacks {missing}"


def test_spec_example_is_the_demo_models_spec():
    import json

    from service.demo import DEMO_SPEC

    (example,) = re.findall(r"Example \(the demo model's spec\):\n\n```json\n(.*?)```", section("Training spec reference"),
                            re.S)
    assert json.loads(example) == DEMO_SPEC


# ----------------------------------------------------------------------------------------------------
# the first command, for real


def _free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _copy_source(dest: Path) -> None:
    """The files of this source tree a clone would hold (tracked and new files, not ignored ones),
    without any local store or data, so the demo starts on an empty store as on a fresh machine."""
    try:
        listed = subprocess.run(["git", "ls-files", "-co", "--exclude-standard", "-z"], cwd=ROOT, check=True,
                                capture_output=True).stdout.decode().split("\0")
    except (OSError, subprocess.CalledProcessError):
        listed = [str(p.relative_to(ROOT)) for p in ROOT.rglob("*") if p.is_file() and ".git" not in p.parts]
    for rel in filter(None, listed):
        parts = Path(rel).parts
        if parts[0] in ("models_store", "data") and Path(rel).name != ".gitkeep":
            continue
        if "__pycache__" in parts or not (ROOT / rel).is_file():
            continue
        target = dest / rel
        target.parent.mkdir(parents=True, exist_ok=True)
        shutil.copy2(ROOT / rel, target)


@pytest.fixture(scope="module")
def fresh(tmp_path_factory):
    """(source copy, environment variables) of a new virtual environment without system site-packages."""
    root = tmp_path_factory.mktemp("fresh")
    src = root / "tikhon"
    _copy_source(src)
    venv = root / "venv"
    subprocess.run([sys.executable, "-m", "venv", str(venv)], check=True)
    env = {k: v for k, v in os.environ.items()
           if not k.startswith(("TIKHON_", "PYTHON", "VIRTUAL_ENV", "CONDA", "PYENV_VERSION"))}
    env["VIRTUAL_ENV"] = str(venv)
    env["PATH"] = f"{venv / 'bin'}{os.pathsep}{env.get('PATH', '')}"
    env["PIP_DISABLE_PIP_VERSION_CHECK"] = "1"
    return src, env


def _stop(proc: subprocess.Popen) -> None:
    """Stop the process group this test started (the shell, the server and its training processes)."""
    if proc.poll() is None:
        os.killpg(proc.pid, signal.SIGTERM)
        try:
            proc.wait(timeout=30)
        except subprocess.TimeoutExpired:
            os.killpg(proc.pid, signal.SIGKILL)
            proc.wait(timeout=30)


@pytest.fixture(scope="module")
def demo(fresh):
    """The README's first command, unchanged, running in the fresh environment on a free loopback port
    (TIKHON_PORT); yields (url, source copy, environment) once /readyz answers 200."""
    import httpx

    src, env = fresh
    port = _free_port()
    url = f"http://127.0.0.1:{port}"
    env = {**env, "TIKHON_PORT": str(port)}
    log = src.parent / "serve.log"
    with open(log, "wb") as out:
        # The README's command, unchanged, after a watchdog that ends the whole group (the server and its
        # training processes) if this test process dies without stopping them (a SIGKILLed test run).
        watchdog = f"( while kill -0 {os.getpid()} 2>/dev/null; do sleep 2; done; kill -KILL -- -$$ ) & "
        proc = subprocess.Popen(["bash", "-c", watchdog + setup_commands()[0]], cwd=src, env=env, stdout=out,
                                stderr=subprocess.STDOUT, start_new_session=True)
    try:
        # Wait for readiness: the install, the demo training and the start-up. A bound on waiting for
        # an event, not a timed assertion; it fails only if the server never becomes ready.
        deadline = time.monotonic() + 1800
        while True:
            if proc.poll() is not None:
                pytest.fail(f"the first command ended with {proc.returncode}:\n{log.read_text()[-4000:]}")
            try:
                if httpx.get(f"{url}/readyz", timeout=5).status_code == 200:
                    break
            except httpx.TransportError:
                pass
            if time.monotonic() > deadline:
                pytest.fail(f"the server never became ready:\n{log.read_text()[-4000:]}")
            time.sleep(1)
        yield url, src, env
    finally:
        _stop(proc)


@pytest.mark.slow
def test_first_command_serves_the_demo_model_from_a_fresh_environment(demo):
    from service.client import Client

    url, src, _ = demo
    with Client(url) as tk:
        rows = [{"station": "mill-lane", "flow_lps": 70.0, "head_m": 35.0},
                {"station": "mill-lane", "flow_lps": 400.0, "head_m": 35.0}]
        answer = tk.predict("pump-energy", version=1, rows=rows, interval_level=0.9)
        meta = tk.version("pump-energy", 1)
    model = answer["model"]
    assert model["name"] == "pump-energy" and model["version"] == 1 and model["created_at"]
    assert model["basis"] == meta["chosen"]["basis"] and model["penalty"] == meta["chosen"]["penalty"]
    assert model["cv"]["metric"] == "rmse" and model["cv"]["splits"] == 5
    assert meta["job_id"] and meta["spec"]["target"] == "energy_kwh"  # trained by a job, not written directly
    inside, outside = answer["predictions"]
    lo, hi = inside["interval"]
    assert lo < inside["value"] < hi and inside["warnings"] == []
    # The demo's noise is N(0, 0.6²) (service/demo.py); a 90 % interval of a good model is about
    # 2 × 1.645 × (its CV RMSE) wide (1.645: the standard normal 95th percentile, from standard
    # normal tables), and no narrower than the noise alone allows.
    width = hi - lo
    assert 0.8 * 2 * 1.645 * 0.6 < width < 1.25 * 2 * 1.645 * model["cv"]["mean"], (width, model["cv"])
    assert any("flow_lps" in w for w in outside["warnings"]), outside  # 400 L/s: outside the training range
    # What the README's tour says of this row: a fitted polynomial, orders of magnitude off out there.
    assert model["basis"]["kind"] == "polynomial" and outside["value"] > 100 * inside["value"], answer
    next_month = src / "data" / "demo" / "pump-stations-next-month.csv"
    assert next_month.read_text().startswith("station,hour,flow_lps,head_m,energy_kwh\n")


def curl_tour() -> list[str]:
    text = section("Five-minute tour")
    part = text[text.index("### With curl"):text.index("### With the Python client")]
    import shlex

    commands = []
    for block in re.findall(r"```sh\n(.*?)```", part, re.S):
        buffer = ""
        for line in block.splitlines():
            buffer = f"{buffer}\n{line}" if buffer else line
            if buffer.endswith("\\"):
                continue
            try:
                shlex.split(buffer)
            except ValueError:  # an open quotation: the command goes on on the next line
                continue
            if buffer.strip():
                commands.append(buffer.strip())
            buffer = ""
        assert not buffer, f"unfinished command in the curl tour: {buffer!r}"
    return commands


@pytest.mark.slow
def test_curl_tour_runs_as_written(demo):
    """Every curl line of the tour against the demo server; the job id placeholder is filled in from the
    submission's answer, and the job is waited for before the lines that read its version."""
    import json

    from service.client import Client

    url, src, env = demo
    if shutil.which("curl", path=env["PATH"]) is None:
        pytest.skip("curl is not installed here; the curl tour needs it")
    commands = curl_tour()
    assert len(commands) == 7, commands
    job_id = None
    with Client(url) as tk:
        before = tk.model("pump-energy")["versions"][-1]
        for command in commands:
            command = command.replace(DEMO_URL, url)
            if "<job id from the answer>" in command:
                command = command.replace("<job id from the answer>", job_id)
            run = subprocess.run(["bash", "-c", command + " --fail"], cwd=src, env=env, capture_output=True,
                                 text=True, timeout=300)
            assert run.returncode == 0, (command, run.stdout[-2000:], run.stderr[-2000:])
            if "/trainings" in command and "-F" in command:
                job = json.loads(run.stdout)
                job_id = job["id"]
                done = tk.wait(job_id, poll=0.5)
                assert done["state"] == "succeeded" and done["version"] == before + 1 == 2, done
            if "/predictions" in command:
                body = json.loads(run.stdout)
                assert len(body["predictions"]) == 2 and body["predictions"][1]["warnings"]
            if command.rstrip().endswith("/cv") and "/plots/" not in command:
                assert json.loads(run.stdout)["chosen"]["basis"]
        assert (src / "cv.svg").read_bytes().lstrip()[:5] in (b"<?xml", b"<svg ")
        assert tk.model("pump-energy")["live_version"] == 2
        assert tk.history("pump-energy")[-1]["reason"] == "retrained on next month after pump wear"


@pytest.mark.slow
def test_python_tour_runs_as_written(demo):
    from service.client import Client

    url, src, env = demo
    tour = python_tour().replace(DEMO_URL, url)
    run = subprocess.run(["python", "-c", tour], cwd=src, env=env, capture_output=True, text=True, timeout=900)
    assert run.returncode == 0, run.stderr[-4000:]
    assert "422" in run.stdout and "head_m" in run.stdout, run.stdout
    with Client(url) as tk:
        newest = tk.model("pump-energy")["versions"][-1]
        last = tk.history("pump-energy")[-1]
    assert last["to_version"] == newest and last["reason"] == "retrained on next month after pump wear"


@pytest.mark.slow
def test_scheduled_retrain_line_runs_through_the_console_script(demo):
    url, src, env = demo
    next_month = src / "data" / "demo" / "pump-stations-next-month.csv"
    retrain = subprocess.run(["tikhon", "train", "pump-energy", "--data", str(next_month), "--promote", "if_better",
                              "--wait"], cwd=src, env=env, capture_output=True, text=True, timeout=900)
    went = re.search(r"live\s+│ (yes|no): ", retrain.stdout)
    assert went, retrain.stdout
    # the README's exit codes: 0 made live, 3 trained but not made live
    assert retrain.returncode == (0 if went.group(1) == "yes" else 3), retrain.stderr
    assert re.search(r"pump-energy version \d+", retrain.stdout)


@pytest.mark.slow
def test_second_command_installs_and_collects_in_the_fresh_environment(fresh):
    src, env = fresh
    install, _, run = setup_commands()[1].partition(" && ")
    assert run == "pytest"
    done = subprocess.run(["bash", "-c", install], cwd=src, env=env, capture_output=True, text=True, timeout=1800)
    assert done.returncode == 0, done.stderr[-4000:]
    collected = subprocess.run(["bash", "-c", f"{run} --collect-only -q -p no:cacheprovider"], cwd=src, env=env,
                               capture_output=True, text=True, timeout=900)
    assert collected.returncode == 0, (collected.stdout[-4000:], collected.stderr[-2000:])
    found = re.search(r"(\d+) tests? collected", collected.stdout)
    assert found and int(found.group(1)) > 50, collected.stdout[-2000:]

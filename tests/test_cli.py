"""The ``tikhon`` command line against a real server (uvicorn on a loopback port, embedded worker).

The CLI runs as a separate process (``python -m service.cli``), as a user runs it. ``train --wait``
runs under a pseudo-terminal so rich draws its live progress bar as it would for a person.
"""

from __future__ import annotations

import json
import os
import re
import select
import socket
import statistics
import subprocess
import sys
import time

import numpy as np
import pytest

from service.cli import _globals_first, cv_text_plot, parse_basis, parse_ref
from service.client import Client

ANSI = re.compile(r"\x1b\[[0-9;?]*[A-Za-z]|\x1b\][^\x07]*\x07")


def write_table(path, n: int, seed: int) -> dict[str, np.ndarray]:
    """energy = 3 + 0.5 flow + 0.02 flow*head - 0.004 flow^2 + N(0, 1) (invented, known structure)."""
    rng = np.random.default_rng(seed)
    flow = rng.uniform(5.0, 120.0, n)
    head = rng.uniform(10.0, 60.0, n)
    energy = 3 + 0.5 * flow + 0.02 * flow * head - 0.004 * flow**2 + rng.normal(0, 1, n)
    cols = {"flow_lps": flow, "head_m": head, "energy_kwh": energy}
    path.write_text("flow_lps,head_m,energy_kwh\n" + "\n".join(
        f"{a!r},{b!r},{c!r}" for a, b, c in zip(flow.tolist(), head.tolist(), energy.tolist())) + "\n")
    return cols


def cli(url: str, *args: str, key: str | None = None, env: dict | None = None) -> subprocess.CompletedProcess:
    full = dict(os.environ, TIKHON_URL=url, COLUMNS="120", **(env or {}))
    full.pop("TIKHON_KEY", None)
    if key:
        full["TIKHON_KEY"] = key
    return subprocess.run([sys.executable, "-m", "service.cli", *args], capture_output=True, text=True, env=full,
                          timeout=300)


def cli_tty(url: str, *args: str, answer: str | None = None, columns: int = 120) -> tuple[int, str]:
    """Run the CLI with stdin, stdout and stderr on a pseudo-terminal; return (exit code, everything it
    wrote). With ``answer``, type it (and Enter) once the CLI asks a ``[y/N]`` question."""
    master, slave = os.openpty()
    env = dict(os.environ, TIKHON_URL=url, COLUMNS=str(columns), LINES="40", TERM="xterm-256color")
    for var in ("NO_COLOR", "TIKHON_KEY", "TTY_COMPATIBLE", "TTY_INTERACTIVE"):
        env.pop(var, None)
    proc = subprocess.Popen([sys.executable, "-m", "service.cli", *args], stdin=slave, stdout=slave, stderr=slave,
                            env=env, close_fds=True)
    os.close(slave)
    chunks, sent = [], answer is None
    while True:
        ready, _, _ = select.select([master], [], [], 300)
        if not ready:
            proc.kill()
            break
        try:
            chunk = os.read(master, 65536)
        except OSError:  # EIO: the child closed the terminal
            break
        if not chunk:
            break
        chunks.append(chunk)
        if not sent and b"[y/N]" in b"".join(chunks):
            os.write(master, answer.encode() + b"\r")
            sent = True
    os.close(master)
    code = proc.wait(timeout=60)
    return code, ANSI.sub("", b"".join(chunks).decode("utf-8", "replace"))


@pytest.fixture(scope="module")
def server(live_service, tmp_path_factory):
    with live_service(tmp_path_factory.mktemp("cli"), worker=True) as s:
        yield s


# ----------------------------------------------------------------------------------------------------
# pure helpers


def test_parse_basis_forms():
    assert parse_basis("linear") == {"kind": "linear"}
    assert parse_basis("poly:1-6") == {"kind": "polynomial", "degrees": [1, 2, 3, 4, 5, 6]}
    assert parse_basis("poly:2,3,5") == {"kind": "polynomial", "degrees": [2, 3, 5]}
    assert parse_basis("rbf:0.5,1,2") == {"kind": "rbf", "widths": [0.5, 1.0, 2.0]}
    assert parse_basis("rbf:0.5,1:60") == {"kind": "rbf", "widths": [0.5, 1.0], "centers": 60}
    for bad in ("spline:3", "poly:", "poly:a-b", "rbf:x"):
        with pytest.raises(Exception) as err:
            parse_basis(bad)
        assert bad in str(err.value) and "poly:1-6" in str(err.value)


def test_parse_ref():
    assert parse_ref("pump-energy") == ("pump-energy", None)
    assert parse_ref("pump-energy@12") == ("pump-energy", 12)
    for bad in ("pump@0", "pump@x", "@3"):
        with pytest.raises(Exception):
            parse_ref(bad)


def test_global_options_may_follow_the_command():
    assert _globals_first(["models", "--json"]) == ["--json", "models"]
    assert _globals_first(["show", "m@2", "--url", "http://h:1", "--key=k"]) == ["--url", "http://h:1", "--key=k",
                                                                               "show", "m@2"]
    assert _globals_first(["promote", "m", "2", "--reason", "r"]) == ["promote", "m", "2", "--reason", "r"]


def test_version_and_help_exit_0():
    for args in (["--version"], ["--help"], ["train", "--help"]):
        r = subprocess.run([sys.executable, "-m", "service.cli", *args], capture_output=True, text=True, timeout=120)
        assert r.returncode == 0 and r.stdout and not r.stderr, (args, r.stderr)
    assert r.stdout.count("--basis") >= 1 and "--promote" in r.stdout


def test_cv_text_plot_places_points_by_value():
    basis = {"kind": "polynomial", "degree": 2}
    table = [{"basis": basis, "l1_ratio": None, "strength": s, "mean": m}
             for s, m in ((0.01, 3.0), (0.1, 2.0), (1.0, 1.0), (10.0, 2.5))]
    table.append({"basis": {"kind": "linear"}, "l1_ratio": None, "strength": 1.0, "mean": 9.0})  # other setting: left out
    chosen = {"basis": basis, "penalty": {"kind": "l2", "strength": 1.0, "l1_ratio": None}, "metric": "rmse"}
    lines = cv_text_plot(table, chosen, width=31, height=5).splitlines()
    rows = [line.split("|", 1)[1] for line in lines[1:6]]
    assert lines[1].startswith("3 |") and lines[5].startswith("1 |")  # y axis from the highest to the lowest mean
    # log10 strengths -2, -1, 0, 1 map to columns 0, 10, 20, 30; means 3, 2, 1, 2.5 to rows 0, 2, 4, 1.
    assert rows[0][0] == "*" and rows[2][10] == "*" and rows[4][20] == "O" and rows[1][30] == "*"
    assert sum(r.count("*") + r.count("O") for r in rows) == 4


# ----------------------------------------------------------------------------------------------------
# against a live server


def test_train_wait_shows_progress_then_the_chosen_point(server, tmp_path):
    url, _, _ = server
    data = tmp_path / "pumps.csv"
    write_table(data, 300, seed=4)
    code, out = cli_tty(url, "train", "pump-cli", "--data", str(data), "--target", "energy_kwh",
                        "--feature", "flow_lps", "--feature", "head_m", "--basis", "linear", "--basis", "poly:2-3",
                        "--promote", "always", "--wait")
    assert code == 0, out
    assert "training pump-cli" in out and "━" in out and re.search(r"\d+/\d+ units", out), out  # rich's bar
    with Client(url) as tk:
        meta = tk.version("pump-cli", 1)
    chosen = meta["chosen"]
    assert meta["live"] is True
    summary = out[out.index("pump-cli version 1"):]
    degree = chosen["basis"].get("degree")
    assert (f"polynomial, degree {degree}" if degree else "linear") in summary
    assert f"λ = {chosen['penalty']['strength']:.4g}" in summary
    # the one-standard-error rule's standard error: sample standard deviation of the split errors over
    # sqrt(splits) (Hastie, Tibshirani & Friedman, The Elements of Statistical Learning, 2nd ed., 7.10)
    with Client(url) as tk:
        table = tk.cv("pump-cli", 1)["table"]
    folds = next(r["split_values"] for r in table if r["basis"] == chosen["basis"]
                 and r["strength"] == chosen["penalty"]["strength"])
    se = statistics.stdev(folds) / meta["cv_summary"]["splits"] ** 0.5
    assert f"{chosen['mean']:.6g} ± {se:.3g} (1 SE over {meta['cv_summary']['splits']} folds)" in summary
    assert "O = chosen" in summary and "(λ, log)" in summary


def test_retrain_reuses_the_live_spec_and_reports_the_if_better_decision(server, tmp_path):
    url, _, settings = server
    first, second = tmp_path / "a.csv", settings.data_dir / "next" / "b.csv"  # the second one on the server
    second.parent.mkdir(parents=True, exist_ok=True)
    write_table(first, 200, seed=5)
    write_table(second, 200, seed=6)
    spec = tmp_path / "spec.json"
    spec.write_text(json.dumps({"target": "energy_kwh", "bases": [{"kind": "polynomial", "degrees": [2]}],
                                "penalty": {"strengths": [0.001, 0.1, 10.0]}, "cv": {"folds": 4, "seed": 2}}))
    r = cli(url, "--json", "train", "pump-re", "--data", str(first), "--spec", str(spec), "--wait")
    assert r.returncode == 0, r.stderr
    assert json.loads(r.stdout)["job"]["version"] == 1
    r = cli(url, "--json", "train", "pump-re", "--source", "next/b.csv", "--promote", "if_better", "--wait")
    done = json.loads(r.stdout)
    decision = done["job"]["decision"]
    assert r.returncode == (0 if decision["went_live"] else 3), r.stderr  # 3: trained, not made live
    assert decision["promote"] == "if_better" and decision["live_version"] == 1
    assert decision["went_live"] == (decision["new_cv_mean"] < decision["live_on_new_data"])
    assert done["job"]["data"]["source"] == "next/b.csv"
    with Client(url) as tk:
        assert tk.version("pump-re", 2)["spec"]["cv"]["seed"] == 2  # the live version's spec, reused


def test_failing_job_exits_1_with_a_one_line_reason(live_service, tmp_path):
    # A training time limit no job can meet: the worker stops the job and fails it.
    with live_service(tmp_path / "svc", worker=True, max_training_seconds=0.001) as (url, _, _):
        data = tmp_path / "pumps.csv"
        write_table(data, 120, seed=7)
        r = cli(url, "train", "pump-slow", "--data", str(data), "--target", "energy_kwh", "--wait")
    assert r.returncode == 1, (r.stdout, r.stderr)
    errors = [line for line in r.stderr.splitlines() if line.startswith("tikhon: error:")]
    assert len(errors) == 1 and "Traceback" not in r.stderr
    assert re.match(r"tikhon: error: training job [0-9a-f]+ of pump-slow failed: .*max_training_seconds", errors[0])


def test_bad_usage_exits_2_with_one_line(server, tmp_path):
    url, _, _ = server
    data = tmp_path / "pumps.csv"
    write_table(data, 60, seed=8)
    cases = [
        (["train", "pump-x", "--data", str(data), "--target", "energy"], "target column 'energy'"),  # 422 answer
        (["train", "pump-x", "--data", str(data), "--target", "energy_kwh", "--basis", "cubic"], "--basis 'cubic'"),
        (["train", "pump-x", "--data", str(tmp_path / "missing.csv")], "is not a file"),
        (["train", "pump-x", "--data", str(data), "--source", "a.csv"], "exactly one of --data"),
        (["train", "pump-x", "--source", "../etc/passwd", "--target", "energy_kwh"], "'..'"),  # 422 from the server
        (["predict", "pump-x@zero", "--data", str(data)], "pump-x@zero"),
        (["predict", "no-such-model", "--data", str(data)], "no-such-model"),  # 404 answer
        (["show", "pump-x", "--bogus"], "--bogus"),
        (["frobnicate"], "frobnicate"),
    ]
    for args, needle in cases:
        r = cli(url, *args)
        assert r.returncode == 2, (args, r.stderr)
        lines = r.stderr.strip().splitlines()
        assert len(lines) == 1 and lines[0].startswith("tikhon: error:") and needle in lines[0], (args, r.stderr)


def test_predict_show_promote_history_prune_and_keys(server, tmp_path):
    url, _, _ = server
    data = tmp_path / "pumps.csv"
    write_table(data, 150, seed=9)
    for promote in ("always", "never", "never"):
        r = cli(url, "train", "pump-ops", "--data", str(data), "--target", "energy_kwh", "--basis", "poly:2",
                "--promote", promote, "--wait")
        assert r.returncode == 0, r.stderr

    queries = tmp_path / "q.json"
    queries.write_text(json.dumps([{"flow_lps": 40.0, "head_m": 22.0}, {"flow_lps": 200.0, "head_m": 22.0}]))
    out_csv = tmp_path / "p.csv"
    r = cli(url, "predict", "pump-ops@2", "--data", str(queries), "--interval-level", "0.9", "--out", str(out_csv))
    assert r.returncode == 0, r.stderr
    with Client(url) as tk:
        ref = tk.predict("pump-ops", version=2, file=queries, interval_level=0.9)
    lines = out_csv.read_text().splitlines()
    assert lines[0] == "model,version,value,lower,upper,warnings"
    for line, p in zip(lines[1:], ref["predictions"]):
        cells = line.split(",", 5)
        assert cells[:2] == ["pump-ops", "2"]
        assert [float(c) for c in cells[2:5]] == [p["value"], *p["interval"]]  # shortest round-trip decimals
    assert ref["predictions"][1]["warnings"] and "flow_lps" in lines[2]  # 200 L/s lies outside the training range

    r = cli(url, "--json", "predict", "pump-ops", "--data", str(queries))
    assert r.returncode == 0 and json.loads(r.stdout)["model"]["version"] == 1

    # A file with a column the model does not use: refused as it is, accepted with --only-inputs.
    extra = tmp_path / "extra.csv"
    extra.write_text("site,flow_lps,head_m\nA7,40.0,22.0\nB2,200.0,22.0\n")
    r = cli(url, "predict", "pump-ops@2", "--data", str(extra))
    assert r.returncode == 2 and "site" in r.stderr and len(r.stderr.strip().splitlines()) == 1
    r = cli(url, "--json", "predict", "pump-ops@2", "--data", str(extra), "--only-inputs", "--interval-level", "0.9")
    assert r.returncode == 0, r.stderr
    assert json.loads(r.stdout)["predictions"] == ref["predictions"]

    r = cli(url, "--json", "plot", "pump-ops@2", "--kind", "path", "--out", str(tmp_path / "path.png"))
    assert r.returncode == 0, r.stderr
    assert (tmp_path / "path.png").read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # PNG signature (ISO/IEC 15948)
    with Client(url) as tk:
        assert (tmp_path / "path.png").read_bytes() == tk.plot_path("pump-ops", 2, format="png")
    r = cli(url, "plot", "pump-ops", "--kind", "history", "--out", str(tmp_path / "h.svg"))
    assert r.returncode == 0 and b"<svg" in (tmp_path / "h.svg").read_bytes()[:400]
    r = cli(url, "plot", "pump-ops", "--kind", "bars")
    assert r.returncode == 2 and "--kind 'bars'" in r.stderr

    r = cli(url, "show", "pump-ops@3")
    assert r.returncode == 0 and "pump-ops version 3" in r.stdout and "trained on" in r.stdout
    r = cli(url, "promote", "pump-ops", "3", "--reason", "operator check of version 3")
    assert r.returncode == 0 and "1 -> 3" in r.stdout, r.stdout
    r = cli(url, "--json", "history", "pump-ops")
    # The two 'never' trainings are in the history too, as decisions that kept version 1 live.
    assert [(h["from_version"], h["to_version"], h["version"], h["went_live"]) for h in json.loads(r.stdout)] == [
        (None, 1, 1, True), (1, 1, 2, False), (1, 1, 3, False), (1, 3, 3, True)]
    r = cli(url, "--json", "prune", "pump-ops", "--keep", "0")
    assert r.returncode == 0 and json.loads(r.stdout)[0]["deleted"] == [1, 2]
    r = cli(url, "--json", "models")
    assert {m["name"]: m["versions"] for m in json.loads(r.stdout)}["pump-ops"] == 1

    r = cli(url, "keys", "create", "--scope", "admin", "--label", "cli test")
    assert r.returncode == 0, r.stderr
    secret = r.stdout.strip()
    assert secret.startswith("tikhon_") and "shown only now" in r.stderr
    r = cli(url, "models")
    assert r.returncode == 2 and "API key" in r.stderr  # 401 now that a key exists
    r = cli(url, "--json", "keys", "list", key=secret)
    (entry,) = json.loads(r.stdout)
    assert entry["active"] and entry["label"] == "cli test" and "secret" not in entry
    # The last admin key cannot be revoked over HTTP (409, exit 2, naming the way that works) ...
    r = cli(url, "keys", "revoke", entry["key_id"], key=secret)
    assert r.returncode == 2 and "last active admin key" in r.stderr and "--local" in r.stderr, r.stderr
    assert cli(url, "--json", "models", key=secret).returncode == 0  # still active
    # ... only on the server's machine; the running server then stays closed (401), never open again.
    _, _, settings = server
    local = {"TIKHON_STORE": str(settings.store), "TIKHON_DATA_DIR": str(settings.data_dir)}
    r = cli(url, "keys", "revoke", "--local", entry["key_id"], env=local)
    assert r.returncode == 0 and "revoked" in r.stdout, r.stderr
    # A revocation made by another process reaches the server within TIKHON_AUTH_CACHE_S (0 here) plus the
    # store's one-second catalog cache (README, Configuration): wait for it (a readiness wait, bounded).
    deadline = time.monotonic() + 30
    while True:
        r = cli(url, "--json", "models")
        if "no active key exists" in r.stderr or time.monotonic() > deadline:
            break
        assert r.returncode == 2 and "needs an API key" in r.stderr, r.stderr  # closed meanwhile, never open
        time.sleep(0.5)
    assert r.returncode == 2 and "no active key exists" in r.stderr, r.stderr


def test_serve_refuses_an_open_network_bind_and_local_key_bootstrap(tmp_path):
    """No key: `serve` refuses a non-loopback address in one line (exit 2). `keys create --local` writes the
    first key into the catalog without a server; the store then verifies it."""
    env = {k: v for k, v in os.environ.items() if not k.startswith("TIKHON_")}
    env.update(TIKHON_STORE=str(tmp_path / "store"), TIKHON_DATA_DIR=str(tmp_path / "data"), TIKHON_LOG_LEVEL="warning")
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        port = str(s.getsockname()[1])
    r = subprocess.run([sys.executable, "-m", "service.cli", "serve", "--host", "0.0.0.0", "--port", port],
                       capture_output=True, text=True, env=env, timeout=120)
    errors = [line for line in r.stderr.splitlines() if line.startswith("tikhon: error:")]
    assert r.returncode == 2 and len(errors) == 1 and "tikhon keys create" in errors[0], r.stderr
    assert "Traceback" not in r.stderr

    r = subprocess.run([sys.executable, "-m", "service.cli", "--json", "keys", "create", "--local", "--scope", "admin",
                        "--label", "bootstrap"], capture_output=True, text=True, env=env, timeout=120)
    assert r.returncode == 0, r.stderr
    made = json.loads(r.stdout)
    from service.settings import Settings
    from service.store import Store

    with Store(Settings(store=tmp_path / "store", data_dir=tmp_path / "data")) as store:
        found = store.keys.verify(made["secret"])
    assert found is not None and found["key_id"] == made["key_id"] and found["scopes"] == ["admin"]

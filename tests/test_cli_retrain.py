"""Scriptable retraining with the ``tikhon`` command line against a real server: the exit code of a
retrain that is not made live, every decision in ``history`` and ``jobs``, version warnings in
``train --wait`` and ``show``, one meaning of ±, ``prune --dry-run`` and its confirmation on a terminal,
and ``promote`` to the version that is already live."""

from __future__ import annotations

import os
import statistics
import subprocess
import sys

import numpy as np
import pytest

from service.client import Client
from test_cli import cli, cli_tty, write_table  # tests/ is on pytest's pythonpath


def tk_cv(url: str, name: str, version: int) -> list[dict]:
    with Client(url) as tk:
        return tk.cv(name, version)["table"]


def cli_answering(url: str, answer: str, *args: str) -> tuple[int, str]:
    """Run the CLI on a pseudo-terminal (stdin too), type ``answer`` once it asks; return (code, output)."""
    return cli_tty(url, *args, answer=answer, columns=160)


@pytest.fixture(scope="module")
def server(live_service, tmp_path_factory):
    with live_service(tmp_path_factory.mktemp("cli-retrain"), worker=True) as s:
        yield s


def test_a_retrain_not_made_live_exits_3_and_every_decision_is_listed(server, tmp_path):
    url, _, _ = server
    data = tmp_path / "pumps.csv"
    write_table(data, 300, seed=11)
    base = ["train", "pump-s", "--data", str(data), "--target", "energy_kwh", "--basis", "poly:2", "--wait"]
    r = cli(url, *base, "--promote", "always")
    assert r.returncode == 0, r.stderr
    # The same data again, asking for an improvement no retrain can show: trained, not made live -> 3.
    r = cli(url, *base, "--promote", "if_better", "--min-improvement", "1000")
    assert r.returncode == 3, (r.stdout, r.stderr)
    assert r.stderr.splitlines()[-1].startswith("tikhon: version 2 of pump-s was trained but not made live: new rmse ")
    assert "pump-s version 2" in r.stdout  # the summary is still printed
    r = cli(url, *base, "--promote", "never")
    assert r.returncode == 0, r.stderr  # never: not made live, as asked

    with Client(url) as tk:
        hist = tk.history("pump-s")
    assert [(h["version"], h["decision"], h["from_version"], h["to_version"]) for h in hist] == [
        (1, "went live", None, 1), (2, "not made live", 1, 1), (3, "not made live", 1, 1)]
    assert hist[1]["reason"].startswith("training job ") and "new rmse" in hist[1]["reason"]
    assert hist[2]["reason"].endswith("promote is 'never': the version was only published")

    r = cli(url, "history", "pump-s")
    assert r.returncode == 0, r.stderr
    lines = [line for line in r.stdout.splitlines() if "worker:" in line]
    assert len(lines) == 3
    assert " 1 " in lines[0] and "went live" in lines[0] and "- -> 1" in lines[0]
    assert " 2 " in lines[1] and "not made live" in lines[1] and "1 (unchanged)" in lines[1]

    r = cli(url, "jobs", "pump-s")
    assert r.returncode == 0, r.stderr
    rows = [line for line in r.stdout.splitlines() if "pump-s" in line]
    assert len(rows) == 3
    assert "went live: the model had no live version" in rows[2]  # newest first
    assert "not live:" in rows[1] and "not live: promote is 'never'" in rows[0]

    # promote to the version that is already live says so, and adds no history entry.
    r = cli(url, "promote", "pump-s", "1", "--reason", "check")
    assert r.returncode == 0 and r.stdout.strip() == "pump-s: version 1 is already live; nothing changed (no history entry)"
    with Client(url) as tk:
        assert len(tk.history("pump-s")) == 3


def test_version_warnings_in_train_wait_and_show(server, tmp_path):
    url, _, _ = server
    rng = np.random.default_rng(12)
    flow = rng.uniform(5, 120, 12)
    path = tmp_path / "small.csv"
    path.write_text("flow_lps,zone,energy_kwh\n" + "\n".join(
        f"{f!r},{'ab'[i % 2]},{3 + 0.5 * f + rng.normal()!r}" for i, f in enumerate(flow.tolist())) + "\n")
    code, out = cli_tty(url, "train", "pump-w", "--data", str(path), "--target", "energy_kwh", "--basis", "linear",
                        "--promote", "always", "--wait")
    assert code == 0, out
    assert "warning: column zone is text and was not used; list it under categorical to use it" in out
    assert "warning: little data: 2.4 rows per validation fold (12 rows, 5 folds; floor 10)" in " ".join(out.split())
    r = cli(url, "show", "pump-w")
    assert r.returncode == 0, r.stderr
    assert "warning: column zone is text and was not used" in r.stdout
    with Client(url) as tk:
        meta = tk.version("pump-w", 1)
    # the one-standard-error rule's standard error (sample standard deviation of the split errors over
    # sqrt(5); Hastie, Tibshirani & Friedman, The Elements of Statistical Learning, 2nd ed., section 7.10)
    folds = next(r["split_values"] for r in tk_cv(url, "pump-w", 1) if r["basis"] == meta["chosen"]["basis"]
                 and r["strength"] == meta["chosen"]["penalty"]["strength"])
    se = statistics.stdev(folds) / 5 ** 0.5
    assert f"{meta['chosen']['mean']:.6g} ± {se:.3g} (1 SE over 5 folds)" in r.stdout


def test_prune_dry_run_and_confirmation_on_a_terminal(server, tmp_path):
    url, _, _ = server
    data = tmp_path / "pumps.csv"
    write_table(data, 120, seed=13)
    for promote in ("always", "never", "never"):
        r = cli(url, "train", "pump-p", "--data", str(data), "--target", "energy_kwh", "--basis", "linear",
                "--promote", promote, "--wait")
        assert r.returncode == 0, r.stderr
    r = cli(url, "prune", "pump-p", "--keep", "0", "--dry-run")
    assert r.returncode == 0 and r.stdout.strip() == "pump-p: would delete 2, 3; would keep 1 (live 1)", r.stdout
    with Client(url) as tk:
        assert sorted(v["version"] for v in tk.versions("pump-p")) == [1, 2, 3]
    # On a terminal it asks; "n" deletes nothing (exit 1), "y" deletes.
    code, out = cli_answering(url, "n", "prune", "pump-p", "--keep", "0")
    assert code == 1 and "pump-p: will delete version(s) 2, 3" in out and "nothing deleted" in out, out
    with Client(url) as tk:
        assert len(tk.versions("pump-p")) == 3
    code, out = cli_answering(url, "y", "prune", "pump-p", "--keep", "1")
    assert code == 0 and "Delete 1 version(s)?" in out and "pump-p: deleted 2" in out, out
    # --yes skips the question on a terminal.
    code, out = cli_tty(url, "prune", "pump-p", "--keep", "0", "--yes")
    assert code == 0 and "[y/N]" not in out and "pump-p: deleted 3" in out, out


def test_help_names_values_in_words_and_the_port_in_use():
    env = dict(os.environ, TIKHON_PORT="8123", COLUMNS="200")
    for args in (["--help"], ["train", "--help"], ["prune", "--help"], ["predict", "--help"], ["keys", "create", "--help"]):
        r = subprocess.run([sys.executable, "-m", "service.cli", *args], capture_output=True, text=True, env=env,
                           timeout=120)
        assert r.returncode == 0, r.stderr
        assert "<list[str]>" not in r.stdout and "range>" not in r.stdout and "<str>" not in r.stdout, r.stdout
    r = subprocess.run([sys.executable, "-m", "service.cli", "--help"], capture_output=True, text=True, env=env, timeout=120)
    flat = " ".join(r.stdout.split())
    assert "http://127.0.0.1:8123, from TIKHON_PORT" in flat and "8000" not in flat
    assert "3 trained, not made live" in " ".join(r.stdout.split())  # the exit codes are documented in the help
    r = subprocess.run([sys.executable, "-m", "service.cli", "prune", "--help"], capture_output=True, text=True,
                       env=env, timeout=120)
    assert "--keep COUNT" in r.stdout and "NAME  Models to prune" in r.stdout


def test_a_missing_or_wrong_key_is_explained_in_cli_terms(live_service, tmp_path):
    with live_service(tmp_path / "svc", worker=False) as (url, store, _):
        store.keys.create(["admin"], "test")
        r = cli(url, "models")
        assert r.returncode == 2 and "Authorization" not in r.stderr
        assert r.stderr.strip() == ("tikhon: error: this server needs an API key: pass --key KEY or set TIKHON_KEY (an "
                                    "admin makes one with 'tikhon keys create --scope predict|train|admin').")
        r = cli(url, "models", key="tikhon_not-a-key")
        assert r.returncode == 2 and "Authorization" not in r.stderr
        assert r.stderr.startswith("tikhon: error: the API key given with --key or TIKHON_KEY is unknown or revoked")

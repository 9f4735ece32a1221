"""``tikhon train NAME --data new.csv --continue-from V [--old-weight W]`` against a real server: the
continued version's lineage is printed, and bad flag combinations are one-line usage errors (exit 2)."""

from __future__ import annotations

import json

import pytest

from service.client import Client
from test_cli import cli, write_table  # tests/ is on pytest's pythonpath


@pytest.fixture(scope="module")
def server(live_service, tmp_path_factory):
    with live_service(tmp_path_factory.mktemp("cli-continue"), worker=True) as s:
        yield s


def test_train_continue_from_prints_the_lineage(server, tmp_path):
    url, _, _ = server
    spec = tmp_path / "spec.json"
    spec.write_text(json.dumps({"target": "energy_kwh", "bases": [{"kind": "polynomial", "degrees": [1, 2]}],
                                "cv": {"folds": 5, "assignment": "hash"}}))
    first, month = tmp_path / "first.csv", tmp_path / "month.csv"
    write_table(first, 300, seed=31)
    write_table(month, 80, seed=32)
    r = cli(url, "train", "pump-m", "--data", str(first), "--spec", str(spec), "--promote", "always", "--wait")
    assert r.returncode == 0, r.stderr
    r = cli(url, "train", "pump-m", "--data", str(month), "--continue-from", "1", "--old-weight", "0.8",
            "--promote", "always", "--wait")
    assert r.returncode == 0, r.stderr
    assert "continued from version 1: 80 new rows merged (380 in all), earlier rows weighted 0.8" in r.stdout
    with Client(url) as tk:
        lineage = tk.version("pump-m", 2)["lineage"]
    assert lineage["parent_version"] == 1 and lineage["old_weight"] == 0.8 and lineage["rows"] == 380
    # a third month continues the continued version
    write_table(month, 60, seed=33)
    r = cli(url, "--json", "train", "pump-m", "--data", str(month), "--continue-from", "2", "--old-weight", "0.8",
            "--promote", "always", "--wait")
    assert r.returncode == 0, r.stderr
    assert json.loads(r.stdout)["lineage"]["rows"] == 440


def test_bad_continuation_flags_are_usage_errors(server, tmp_path):
    url, _, _ = server
    data = tmp_path / "d.csv"
    write_table(data, 20, seed=34)
    r = cli(url, "train", "pump-m", "--data", str(data), "--old-weight", "0.8")
    assert r.returncode == 2 and "--continue-from" in r.stderr
    r = cli(url, "train", "pump-m", "--data", str(data), "--continue-from", "1", "--old-weight", "1.5")
    assert r.returncode == 2 and "(0, 1]" in r.stderr
    r = cli(url, "train", "pump-m", "--data", str(data), "--continue-from", "1", "--target", "energy_kwh")
    assert r.returncode == 2 and "keeps the continued version's spec" in r.stderr


def test_the_readme_monthly_continuation_script_runs(server, tmp_path):
    import os
    import re
    import subprocess
    import sys
    from pathlib import Path

    url, _, _ = server
    text = (Path(__file__).resolve().parents[1] / "README.md").read_text(encoding="utf-8")
    (script,) = [b for b in re.findall(r"```sh\n(.*?)```", text, re.S) if "cron.monthly/pump-energy" in b]
    spec = tmp_path / "spec.json"
    spec.write_text(json.dumps({"target": "energy_kwh", "bases": [{"kind": "linear"}],
                                "cv": {"folds": 4, "assignment": "hash"}}))
    first, month = tmp_path / "first.csv", tmp_path / "last-month.csv"
    write_table(first, 200, seed=41)
    write_table(month, 50, seed=42)
    r = cli(url, "train", "pump-readme", "--data", str(first), "--spec", str(spec), "--promote", "always", "--wait")
    assert r.returncode == 0, r.stderr
    log = tmp_path / "retrain.log"
    script = (script.replace("pump-energy", "pump-readme").replace("/srv/pumps/last-month.csv", str(month))
              .replace("/var/log/tikhon-retrain.log", str(log)))
    bindir = tmp_path / "bin"  # `tikhon` as the console script would run it, with this interpreter
    bindir.mkdir()
    (bindir / "tikhon").write_text(f"#!/bin/sh\nexec {sys.executable} -m service.cli \"$@\"\n")
    (bindir / "tikhon").chmod(0o755)
    env = dict(os.environ, TIKHON_URL=url, PATH=f"{bindir}:{os.environ['PATH']}")
    env.pop("TIKHON_KEY", None)
    run = subprocess.run(["sh", "-c", script], env=env, capture_output=True, text=True, timeout=300)
    # 0: made live; 3: trained but not better than the live version on the new rows (the README's exit codes)
    assert run.returncode in (0, 3), (run.stderr, log.read_text() if log.exists() else "")
    assert "continued from version 1: 50 new rows merged (250 in all), earlier rows weighted 0.8" in log.read_text()

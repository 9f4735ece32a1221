"""Eight processes publish to one model name at the same moment: versions 1..8, no gaps, no
duplicates, every one loadable (store issue, "Done means"). Run on SQLite and on PostgreSQL."""

from __future__ import annotations

import json
import subprocess
import sys
import time

import pytest

N_PROCS = 8


def _start_together(kit, tmp_path, args_for, n):
    """Start n procs.py processes, release them at once with a go file, return their outputs."""
    go = tmp_path / "go"
    procs = []
    for i in range(n):
        ready = tmp_path / f"ready-{i}"
        cmd = [sys.executable, str(kit.PROCS), *args_for(i), "--ready", str(ready), "--go", str(go)]
        procs.append((subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True,
                                       env=kit.proc_env()), ready))
    deadline = time.monotonic() + 120
    while not all(r.exists() for _, r in procs):  # a start barrier, not a timing check
        assert time.monotonic() < deadline, "publishers never became ready"
        assert all(p.poll() is None for p, _ in procs), [p.communicate() for p, _ in procs if p.poll() is not None]
        time.sleep(0.01)
    go.write_text("go")
    outs = []
    for p, _ in procs:
        out, err = p.communicate(timeout=120)
        assert p.returncode == 0, err
        outs.append(out)
    return outs


def test_eight_processes_publish_at_once(store, kit, tmp_path):
    url = store.settings.database_url or ""
    outs = _start_together(
        kit, tmp_path,
        lambda i: ["publish", "--store", str(store.root), "--url", url, "--name", "shared",
                   "--count", "1", "--seed", str(i)],
        N_PROCS,
    )
    got = sorted(int(line) for out in outs for line in out.split() if line.isdigit())
    assert got == list(range(1, N_PROCS + 1))
    versions = store.list_versions("shared")
    assert [v["version"] for v in versions] == list(range(1, N_PROCS + 1))
    assert len({v["checksum"] for v in versions}) == N_PROCS  # eight different artifacts
    seeds = set()
    for v in versions:
        loaded = store.load("shared", v["version"])
        seeds.add(loaded.manifest["training"]["cv_summary"]["seed"])
    assert seeds == set(range(N_PROCS))
    assert sorted(p.name for p in (store.root / "shared").iterdir()) == sorted(str(i) for i in range(1, 9))


def test_concurrent_publishes_to_different_names_do_not_block_numbering(store, kit, tmp_path):
    url = store.settings.database_url or ""
    _start_together(
        kit, tmp_path,
        lambda i: ["publish", "--store", str(store.root), "--url", url, "--name", f"m{i % 2}",
                   "--count", "3", "--seed", str(10 * i)],
        4,
    )
    for name in ("m0", "m1"):
        assert [v["version"] for v in store.list_versions(name)] == list(range(1, 7))


def test_concurrent_claims_take_each_job_once(store, kit, tmp_path):
    url = store.settings.database_url or ""
    ids = {store.jobs.submit("m", {"n": i})[0]["id"] for i in range(24)}
    outs = _start_together(
        kit, tmp_path,
        lambda i: ["claim", "--store", str(store.root), "--url", url, "--worker", f"w{i}"],
        4,
    )
    claimed = [j for out in outs for j in json.loads(out)]
    assert sorted(claimed) == sorted(ids)  # every job once: none twice, none lost
    assert all(j["state"] == "running" and j["attempts"] == 1 for j in store.jobs.list(limit=100))

"""Crash consistency of publish (store issue, "Done means"): a publishing process is SIGKILLed, and no
partial version is ever listed or loadable, and the next publish takes the next number.

Two tests: (1) SIGKILL at every named step of the publish protocol (``_fault_point`` in
``service.store.store``), checking what is visible before and after the start-up sweep; (2) SIGKILL at
20 seeded random moments of a process that publishes without pause.
"""

from __future__ import annotations

import random
import signal
import subprocess
import sys
import time

import pytest

from service.errors import NotFound
from service.store import Store

STEPS = ["staged", "locked", "before_rename", "after_rename", "before_commit", "committed"]


def _assert_consistent(store: Store, name: str, *, loaded: set[int]) -> int:
    """Everything listed is whole and loadable, nothing else is on disk; return the newest version."""
    versions = [v["version"] for v in store.list_versions(name)] if store.list_models() else []
    n = len(versions)
    assert versions == list(range(1, n + 1)), f"gap or duplicate in {versions}"
    if n:
        assert store.get_model(name)["newest_version"] == n
    for v in versions:
        if v not in loaded:
            store.load(name, v)  # verifies checksums of manifest and arrays
            loaded.add(v)
    on_disk = sorted(int(p.name) for p in (store.root / name).iterdir()) if (store.root / name).exists() else []
    assert on_disk == versions, f"folders {on_disk} but catalog lists {versions}"
    assert list((store.root / ".staging").iterdir()) == []
    assert list((store.root / ".trash").iterdir()) == []
    return n


@pytest.mark.parametrize("step", STEPS)
def test_sigkill_at_each_step_of_publish(store, kit, step):
    store.publish("m", *kit.linear_artifact(seed=100))
    res = kit.run_proc("fault", "--store", str(store.root), "--url", store.settings.database_url or "",
                       "--name", "m", "--step", step, "--seed", "1", check=False)
    assert res.returncode == -signal.SIGKILL, res.stderr
    committed = step == "committed"
    # Seen by a process that was already running (no sweep yet): only whole versions.
    assert [v["version"] for v in store.list_versions("m")] == ([1, 2] if committed else [1])
    if not committed:
        with pytest.raises(NotFound):
            store.load("m", 2)
    if step in ("after_rename", "before_commit"):
        assert (store.root / "m" / "2" / "manifest.json").exists()  # the orphan the protocol expects
    if step in ("staged", "locked", "before_rename", "after_rename", "before_commit"):
        assert any((store.root / ".staging").iterdir()) or step in ("after_rename", "before_commit")
    # A restarted process sweeps, and numbering continues without a gap.
    restarted = Store(store.settings, model_loader=kit.linear_loader)
    expected = 2 if committed else 1
    assert _assert_consistent(restarted, "m", loaded=set()) == expected
    assert restarted.publish("m", *kit.linear_artifact(seed=2))["version"] == expected + 1
    assert restarted.load("m", expected + 1).manifest["training"]["cv_summary"]["seed"] == 2
    restarted.close()


def test_next_publish_clears_an_orphan_without_a_restart(store, kit):
    store.publish("m", *kit.linear_artifact(seed=100))
    kit.run_proc("fault", "--store", str(store.root), "--url", store.settings.database_url or "",
                 "--name", "m", "--step", "after_rename", check=False)
    orphan = (store.root / "m" / "2" / "manifest.json").read_bytes()
    row = store.publish("m", *kit.linear_artifact(seed=3))  # same process, no sweep in between
    assert row["version"] == 2
    assert (store.root / "m" / "2" / "manifest.json").read_bytes() != orphan
    assert store.load("m", 2).manifest["training"]["cv_summary"]["seed"] == 3


def test_sigkill_at_random_moments_twenty_times(store, kit):
    rng = random.Random(20260509)  # seeded: the same kill moments on every run
    url = store.settings.database_url or ""
    loaded: set[int] = set()
    swept = {"staging": 0, "orphan_versions": 0}
    n = 0
    for _ in range(20):
        proc = subprocess.Popen(
            [sys.executable, str(kit.PROCS), "publish", "--forever", "--store", str(store.root), "--url", url,
             "--name", "m", "--terms", "50000", "--seed", str(rng.randrange(10**6))],
            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=kit.proc_env(),
        )
        assert proc.stdout.readline().strip() == "ready", proc.stderr.read()
        time.sleep(rng.uniform(0.0, 0.3))
        proc.send_signal(signal.SIGKILL)
        out, _ = proc.communicate(timeout=60)
        assert proc.returncode == -signal.SIGKILL
        printed = [int(x) for x in out.split()]
        # Seen by the running process before any sweep: listed versions are all whole.
        before = [v["version"] for v in store.list_versions("m")] if store.list_models() else []
        assert before == list(range(1, len(before) + 1))
        restarted = Store(store.settings, model_loader=kit.linear_loader)
        n_after = _assert_consistent(restarted, "m", loaded=loaded)
        # Every version the killed process reported is there; at most one more (killed after commit).
        assert printed == list(range(n + 1, n + 1 + len(printed)))
        assert n_after in (n + len(printed), n + len(printed) + 1)
        n = n_after
        for key in swept:
            swept[key] += restarted.last_sweep[key]
        restarted.close()
    assert store.publish("m", *kit.linear_artifact(seed=1))["version"] == n + 1
    assert n >= 1  # the loop did publish between kills
    print(f"20 kills: {n} versions committed, swept {swept['staging']} staging folders and "
          f"{swept['orphan_versions']} renamed-but-uncommitted versions")

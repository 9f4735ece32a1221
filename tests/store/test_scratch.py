"""Training jobs' scratch folders: removed when the job ends, and after a killed worker only when provably ours.

The rule under test is the developers' brief: every operation that deletes must be proven safe against a
foreign folder; when unsure, keep the files and report them. Each case builds what a killed worker (or
someone else) leaves under ``<store>/.scratch`` and opens the store again, which sweeps at start.
"""

from __future__ import annotations

import multiprocessing as mp
import os
import signal
import uuid

from service.store import Store
from service.store.scratch import FOLDER_MARKER, SCRATCH_MARK, job_scratch, scratch_root, share


def _reopen(store) -> Store:
    """The store opened again, as by another process starting (its start-up sweep runs)."""
    again = Store(store.settings)
    again.close()
    return again


def _left_by_a_killed_job(root, *, mark=SCRATCH_MARK, folder_mark=None, files=("part-0.arrow", "part-1.arrow.part")):
    """What ``job_scratch`` leaves when its process is killed: a marked lock file nobody holds, the folder with
    its own marker, and the cache's files."""
    token = uuid.uuid4().hex
    scratch = scratch_root(root)
    scratch.mkdir(exist_ok=True)
    (scratch / f"{token}.lock").write_bytes(mark + b"job\n")
    folder = scratch / token
    folder.mkdir()
    (folder / FOLDER_MARKER).write_bytes(folder_mark if folder_mark is not None else SCRATCH_MARK + token.encode() + b"\n")
    for name in files:
        (folder / name).write_bytes(b"x" * 100)
    return token, folder


def test_the_folder_is_removed_when_the_block_ends_even_by_an_error(store):
    try:
        with job_scratch(store.root, "a" * 32) as folder:
            (folder / "part-0.arrow").write_bytes(b"cached")
            assert folder.parent == store.root / ".scratch" and (folder / FOLDER_MARKER).is_file()
            raise RuntimeError("the job failed")
    except RuntimeError:
        pass
    assert list((store.root / ".scratch").iterdir()) == []


def test_a_killed_jobs_scratch_is_swept_at_the_next_start(store):
    token, folder = _left_by_a_killed_job(store.root)
    again = _reopen(store)
    assert again.last_sweep["scratch"] == 1
    assert not folder.exists() and not (scratch_root(store.root) / f"{token}.lock").exists()
    assert again.kept == []


def _hold_scratch(root, ready):
    import time

    with job_scratch(root, "b" * 32) as folder:
        (folder / "part-0.arrow").write_bytes(b"cached")
        ready.set()
        time.sleep(120)  # until the test kills it (a process killed in Condition.wait would hang notify)


def test_a_running_jobs_scratch_is_left_alone_and_a_sigkilled_ones_is_swept(store):
    ctx = mp.get_context("spawn")
    ready = ctx.Event()
    proc = ctx.Process(target=_hold_scratch, args=(store.root, ready))
    proc.start()
    try:
        assert ready.wait(60)
        [folder] = [p for p in scratch_root(store.root).iterdir() if p.is_dir()]
        again = _reopen(store)  # another process starts while the job runs: its lock is held
        assert again.last_sweep["scratch"] == 0 and again.kept == []
        assert (folder / "part-0.arrow").read_bytes() == b"cached"
        os.kill(proc.pid, signal.SIGKILL)  # no clean-up ran; the kernel released the lock
        proc.join(10)
        assert (folder / "part-0.arrow").exists()
        third = _reopen(store)
        assert third.last_sweep["scratch"] == 1 and not folder.exists()
        assert list(scratch_root(store.root).iterdir()) == []
    finally:
        if proc.is_alive():
            proc.kill()
        proc.join(10)


def test_foreign_entries_are_kept_and_reported(store, tmp_path):
    scratch = scratch_root(store.root)
    # a folder named like ours with no lock file
    lone = scratch / uuid.uuid4().hex
    lone.mkdir(parents=True)
    (lone / "part-0.arrow").write_bytes(b"theirs")
    # a lock file without our mark, beside a folder of the same token
    t1, f1 = _left_by_a_killed_job(store.root, mark=b"someone else's lock\n")
    # our lock, but the folder's marker names another token
    t2, f2 = _left_by_a_killed_job(store.root, folder_mark=SCRATCH_MARK + b"0" * 32 + b"\n")
    # our lock and marker, plus a file we never write: our cache files go, theirs and the folder stay
    t3, f3 = _left_by_a_killed_job(store.root, files=("part-0.arrow", "notes.txt"))
    # a name we never use, and a link named like a cache file that points outside
    (scratch / "keep-me").write_text("x")
    outside = tmp_path / "outside.arrow"
    outside.write_bytes(b"outside")
    t4, f4 = _left_by_a_killed_job(store.root, files=())
    (f4 / "part-0.arrow").symlink_to(outside)
    again = _reopen(store)
    assert again.last_sweep["scratch"] == 0
    assert (lone / "part-0.arrow").read_bytes() == b"theirs"
    assert (f1 / "part-0.arrow").exists() and (scratch / f"{t1}.lock").exists()
    assert (f2 / "part-0.arrow").exists() and (f2 / "part-1.arrow.part").exists()
    assert (f3 / "notes.txt").read_text() == "x" * 100 and not (f3 / "part-0.arrow").exists()
    assert (scratch / f"{t3}.lock").exists()
    assert (scratch / "keep-me").exists()
    assert (f4 / "part-0.arrow").is_symlink() and outside.read_bytes() == b"outside"
    assert sorted(again.kept) == sorted([f".scratch/{lone.name}", f".scratch/{t1}.lock", f".scratch/{t2}",
                                         f".scratch/{t3}", ".scratch/keep-me", f".scratch/{t4}"])


def test_a_scratch_link_to_a_foreign_folder_is_never_followed(store, tmp_path):
    foreign = tmp_path / "foreign"
    foreign.mkdir()
    token = uuid.uuid4().hex
    (foreign / f"{token}.lock").write_bytes(SCRATCH_MARK)
    (foreign / token).mkdir()
    (foreign / token / FOLDER_MARKER).write_bytes(SCRATCH_MARK + token.encode() + b"\n")
    (foreign / token / "part-0.arrow").write_bytes(b"theirs")
    scratch_root(store.root).symlink_to(foreign)
    again = _reopen(store)
    assert again.last_sweep["scratch"] == 0 and ".scratch" in again.kept
    assert (foreign / token / "part-0.arrow").read_bytes() == b"theirs"
    try:
        with job_scratch(store.root, "c" * 32):
            raise AssertionError("a scratch folder was made through a link")
    except OSError:
        pass
    assert sorted(p.name for p in foreign.iterdir()) == sorted([f"{token}.lock", token])


def test_a_training_process_sharing_the_folder_keeps_it_busy_after_its_worker_died(store):
    """The worker makes the folder and its training process shares it (``share``): killed, the worker
    releases its lock, but the folder stays busy until the training process ends too."""
    ctx = mp.get_context("spawn")
    ready = ctx.Event()
    proc = ctx.Process(target=_hold_scratch, args=(store.root, ready))
    proc.start()
    try:
        assert ready.wait(60)
        [folder] = [p for p in scratch_root(store.root).iterdir() if p.is_dir()]
        with share(folder):
            os.kill(proc.pid, signal.SIGKILL)
            proc.join(10)
            assert _reopen(store).last_sweep["scratch"] == 0 and (folder / "part-0.arrow").exists()
        assert _reopen(store).last_sweep["scratch"] == 1 and not folder.exists()
    finally:
        if proc.is_alive():
            proc.kill()
        proc.join(10)


def test_share_refuses_a_folder_without_our_marked_lock(tmp_path):
    folder = tmp_path / ("a" * 32)
    folder.mkdir()
    (tmp_path / f"{folder.name}.lock").write_bytes(b"not ours\n")
    try:
        with share(folder):
            raise AssertionError("shared a folder whose lock holds no mark")
    except OSError:
        pass

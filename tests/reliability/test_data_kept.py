"""Data kept: a lost, emptied or wrong catalog, or a foreign store folder, never costs a stored version.

Each case is what an operator can do by mistake: empty or delete the SQLite catalog, point
TIKHON_DATABASE_URL at another (empty) database, point TIKHON_STORE at a folder of other files, or
lose the catalog file while the server runs. Before this suite, the first three made the next start
(``tikhon serve`` or ``tikhon keys create --local``) delete every version folder, the fourth deleted the
folder's files, and the last let writes go into an unlinked file.
"""

from __future__ import annotations

import hashlib
import json
import os
import subprocess
import sys
from pathlib import Path

import httpx
import pytest


def _cli(rk, settings: dict, *args: str, timeout: float = 180) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "service.cli", *args], env=rk.settings_env(settings),
                          cwd=str(rk.REPO), capture_output=True, text=True, timeout=timeout)


def _tree(root: Path) -> dict[str, str]:
    """Every file below ``root`` with its SHA-256 (folders as 'dir')."""
    out = {}
    for p in sorted(root.rglob("*")):
        rel = p.relative_to(root).as_posix()
        out[rel] = "dir" if p.is_dir() else hashlib.sha256(p.read_bytes()).hexdigest()
    return out


def _versions_tree(store_root: Path, name: str) -> dict[str, str]:
    return {k: v for k, v in _tree(store_root / name).items() if not k.endswith((".publishing", ".deleting"))}


def _two_versions(rk, settings: dict) -> None:
    with rk.open_store(settings) as store:
        rk.publish_demo(store, "pumps", seed=0, live=False)
        rk.publish_demo(store, "pumps", seed=1, live=True)


def _lose_catalog(settings: dict, how: str, tmp_path: Path) -> dict:
    db = Path(settings["store"]) / "catalog.db"
    if how == "emptied":  # ': > catalog.db'
        db.write_bytes(b"")
        for side in ("catalog.db-wal", "catalog.db-shm"):
            (Path(settings["store"]) / side).unlink(missing_ok=True)
    elif how == "deleted":  # 'rm catalog.db*'
        for side in ("catalog.db", "catalog.db-wal", "catalog.db-shm"):
            (Path(settings["store"]) / side).unlink(missing_ok=True)
    elif how == "other-database":  # TIKHON_DATABASE_URL at another, empty database
        settings = {**settings, "database_url": f"sqlite:///{tmp_path / 'elsewhere' / 'other.db'}"}
    return settings


@pytest.mark.parametrize("how", ["emptied", "deleted", "other-database"])
def test_a_lost_catalog_keeps_every_version_and_recover_brings_them_back(rk, tmp_path, how):
    settings = rk.base_settings(tmp_path)
    _two_versions(rk, settings)
    before = _versions_tree(Path(settings["store"]), "pumps")
    assert {"1/manifest.json", "2/arrays.npz"} <= set(before)

    settings = _lose_catalog(settings, how, tmp_path)
    # The reported reproduction: a local key creation opens the store (and used to sweep it).
    r = _cli(rk, settings, "--json", "keys", "create", "--local", "--scope", "admin")
    assert r.returncode == 0, r.stderr
    secret = json.loads(r.stdout)["secret"]
    assert _versions_tree(Path(settings["store"]), "pumps") == before

    # A server on it starts, keeps the folders, and is not ready until they are recovered.
    with rk.server_process(tmp_path, **{k: v for k, v in settings.items() if k != "data_dir"}) as srv:
        ready = httpx.get(f"{srv.base}/readyz", timeout=30)
        body = rk.assert_problem(ready, 503)
        assert "2 version folders are not in the catalog (pumps/1, pumps/2)" in body["detail"]
        assert "tikhon store recover" in body["detail"]
        assert ready.headers["Retry-After"].isdigit()
        assert "not in the catalog and were kept" in srv.log_text()
        assert _versions_tree(Path(settings["store"]), "pumps") == before

        # Recovery while the server runs (another process): readiness clears, the versions answer again.
        r = _cli(rk, settings, "--json", "store", "recover", "--live", "newest")
        assert r.returncode == 0, r.stderr
        report = json.loads(r.stdout)
        assert report["registered"] == [{"name": "pumps", "version": 1}, {"name": "pumps", "version": 2}]
        assert report["made_live"] == [{"name": "pumps", "version": 2}] and report["refused"] == []
        assert httpx.get(f"{srv.base}/readyz", timeout=30).status_code == 200
        answer = httpx.post(f"{srv.base}/v1/models/pumps/predictions", json={"rows": [{"flow_lps": 70, "head_m": 35}]},
                            headers={"Authorization": f"Bearer {secret}"}, timeout=30)
        assert answer.status_code == 200, answer.text
        assert answer.json()["model"]["version"] == 2
    # Every byte of both versions is what was published, and the checksums in the catalog vouch for it.
    assert _versions_tree(Path(settings["store"]), "pumps") == before
    with rk.open_store(settings) as store:
        assert [v["version"] for v in store.list_versions("pumps")] == [1, 2]
        assert store.load("pumps", 1).version == 1 and store.unlisted == []
        assert store.history("pumps")[-1]["actor"] == "tikhon store recover"
        assert store.publish("pumps", *_artifact(rk))["version"] == 3  # numbering continues after them


def _artifact(rk):
    from service.engine import tune

    return tune(rk.demo_rows(200, 7), rk.QUICK_SPEC).to_artifact()


def test_recover_refuses_a_version_that_fails_verification(rk, tmp_path):
    settings = rk.base_settings(tmp_path)
    _two_versions(rk, settings)
    store_root = Path(settings["store"])
    # Swap the arrays of the two versions: each folder is complete, but its manifest no longer matches.
    a, b = store_root / "pumps" / "1" / "arrays.npz", store_root / "pumps" / "2" / "arrays.npz"
    tmp = store_root / "swap"
    os.rename(a, tmp), os.rename(b, a), os.rename(tmp, b)
    settings = _lose_catalog(settings, "deleted", tmp_path)
    r = _cli(rk, settings, "store", "recover")
    assert r.returncode == 1
    assert "refused pumps/1:" in r.stderr and "refused pumps/2:" in r.stderr
    assert "arrays.npz" in r.stderr and "SHA-256" in r.stderr
    assert (store_root / "pumps" / "1" / "manifest.json").is_file()  # refused, still kept
    with rk.open_store(settings) as store:
        assert store.unlisted == [("pumps", 1), ("pumps", 2)]


def test_a_foreign_folder_is_refused_and_nothing_in_it_is_touched(rk, tmp_path):
    foreign = tmp_path / "holiday"
    (foreign / "photos").mkdir(parents=True)
    (foreign / "photos" / "beach.jpg").write_bytes(b"\xff\xd8 not really a picture")
    (foreign / "notes.txt").write_text("do not delete\n")
    (foreign / "budget" / "2026").mkdir(parents=True)  # looks like <name>/<version>, holds no manifest
    (foreign / "budget" / "2026" / "sheet.csv").write_text("a,b\n1,2\n")
    before = _tree(foreign)
    settings = rk.base_settings(tmp_path, store=str(foreign))

    r = _cli(rk, settings, "keys", "create", "--local", "--scope", "admin")
    assert r.returncode != 0
    assert r.stderr.count("\n") == 1 and "holds 3 entries that Tikhon did not write" in r.stderr
    assert "'budget', 'notes.txt', 'photos'" in r.stderr and str(tmp_path) not in r.stderr
    srv = rk.ServerProcess(settings, tmp_path / "server.log")
    assert srv.proc.wait(120) != 0
    assert "holds 3 entries that Tikhon did not write" in srv.log_text()
    srv.stop()
    assert _tree(foreign) == before  # not a file added, changed or removed


def test_an_existing_unmarked_store_is_adopted(rk, tmp_path):
    """A store written before the marker existed (only Tikhon's own entries) opens and gets its marker."""
    settings = rk.base_settings(tmp_path)
    _two_versions(rk, settings)
    marker = Path(settings["store"]) / ".tikhon-store"
    marker.unlink()
    with rk.open_store(settings) as store:
        assert store.folder_state == "adopted" and store.list_versions("pumps")[1]["live"]
    assert json.loads(marker.read_text())["format"] == "tikhon-store"


@pytest.mark.parametrize("how", ["deleted", "emptied", "replaced"])
def test_a_catalog_lost_while_the_server_runs_stops_every_write(rk, tmp_path, how):
    settings = rk.base_settings(tmp_path, embedded_worker=False)
    with rk.open_store(settings) as store:
        rk.publish_demo(store, "pumps", seed=0)
        rk.publish_demo(store, "pumps", seed=1, live=False)
    store_root = Path(settings["store"])
    db = store_root / "catalog.db"
    with rk.server_process(tmp_path, **{k: v for k, v in settings.items() if k != "data_dir"}) as srv:
        assert httpx.get(f"{srv.base}/readyz", timeout=30).status_code == 200
        old = os.open(db, os.O_RDONLY)  # the file the server opened, whatever happens to its name
        try:
            old_bytes = os.pread(old, 1 << 24, 0)
            if how == "deleted":
                for side in ("catalog.db", "catalog.db-wal", "catalog.db-shm"):
                    (store_root / side).unlink(missing_ok=True)
            elif how == "emptied":
                with open(db, "r+b") as fh:
                    fh.truncate(0)
            else:  # another valid catalog renamed over it
                other = tmp_path / "other"
                with rk.open_store(rk.base_settings(other)):
                    pass
                os.rename(other / "store" / "catalog.db", db)
            ready = httpx.get(f"{srv.base}/readyz", timeout=30)
            body = rk.assert_problem(ready, 503)
            assert "catalog" in body["detail"] and str(tmp_path) not in body["detail"]

            writes = [
                httpx.put(f"{srv.base}/v1/models/pumps/live", json={"version": 2, "reason": "after the loss"}, timeout=30),
                httpx.post(f"{srv.base}/v1/models/pumps/trainings",
                           json={"spec": rk.QUICK_SPEC, "data": {"rows": rk.as_rows(rk.demo_rows(60, 3))}}, timeout=30),
                httpx.post(f"{srv.base}/v1/keys", json={"scopes": ["predict"], "label": "x"}, timeout=30),
            ]
            for w in writes:
                problem = rk.assert_problem(w, 503)
                assert problem["type"] == "/problems/catalog-unavailable", problem
                assert w.headers["Retry-After"].isdigit()
                assert str(tmp_path) not in problem["detail"]
            if how != "emptied":  # the unlinked file took no write
                assert os.pread(old, 1 << 24, 0) == old_bytes
        finally:
            os.close(old)

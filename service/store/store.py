"""The model store: immutable, checksummed versions on disk plus a catalog in SQL.

Publish protocol
----------------
A version becomes visible only through its catalog row, and the row is committed only after the
folder is complete and durable in its final place. Step by step (``name`` already validated)::

    1. stage   mkdir <store>/.staging/<token>/ (its lock file <token>.lock is held with flock for
               the whole publish); write arrays.npz; fsync it.
    2. lock    open a write transaction and take the per-name write lock
               (SQLite: BEGIN IMMEDIATE, one writer at a time; PostgreSQL: pg_advisory_xact_lock).
    3. number  version = models.last_version + 1 (the row is created on the first publish).
               Under the lock, a folder <store>/<name>/<version>/ that already exists cannot be
               anyone's work in progress. When its .publishing marker names this catalog it is the
               orphan of a publish that crashed after its rename and before its commit: it is moved to
               <store>/.trash/ and removed. Otherwise (a lost or replaced catalog) it is kept and the
               publish is refused until ``tikhon store recover`` registers it.
    4. write   manifest.json (which records name, version and the SHA-256 of arrays.npz) and the
               .publishing marker (this catalog's id) into the staging folder; fsync it and the folder.
    5. rename  os.rename(<staging>/<token>, <store>/<name>/<version>); fsync <store>/<name>/.
    6. record  UPDATE models.last_version; INSERT the versions row with the manifest's SHA-256.
    7. commit  the transaction; the lock is released. Then the .publishing marker is removed (the
               sweep clears one left by a crash here, since the row now vouches for the folder).

What a SIGKILL leaves behind, by the step it interrupts:

* 1-4: a staging folder and nothing else. The transaction, if open, is rolled back by the database
  (SQLite's WAL, or PostgreSQL dropping the dead session), so ``last_version`` is unchanged.
* 5-6 (after the rename, before the commit): a complete folder with no catalog row. Nothing lists or
  loads it, because every read goes through the catalog. The next publish of that name takes the same
  number (the counter was rolled back) and clears the orphan in step 3; ``sweep`` clears it too.
* after 7: a whole version.

So versions are gapless and never duplicated: numbers come from a counter that is bumped in the same
transaction that records the version, under a lock held across the rename. A committed row implies a
durable folder (its rename was fsynced before the commit). A deleted version keeps its row as a
tombstone, so its number is never handed out again.

Start-up sweep
--------------
``Store()`` first claims the folder (``service.store.layout``: a ``.tikhon-store`` marker; a folder of
files Tikhon did not write is refused before anything is touched), then calls ``sweep()``, which removes
only what this service wrote and can prove unfinished: staging folders whose marked lock file is no
longer held (flock is released when its process dies), ``.trash`` entries of its own naming, version
folders with a ``.publishing`` marker naming *this* catalog and no row (a publish that crashed between
rename and commit; checked under the per-name lock, so a publish in flight elsewhere is never touched),
version folders with a ``.deleting`` marker naming this catalog and a tombstone row, job data folders
of jobs this catalog lists as finished, and scratch folders of training processes that are gone
(``service.store.scratch``: a marked lock file no process holds, and only the cache's own files). Every other version folder without a catalog row is kept,
logged and reported by ``ping()`` (readiness) until ``recover()`` registers it: an empty, lost or wrong
catalog never costs a stored version. In step 3 above, a folder already at the target number is
discarded only under the same proof; otherwise the publish is refused (``Conflict``) and the folder kept.
Staging locks rely on flock, which works on a local file system; several hosts sharing one store over
NFS should share the catalog on PostgreSQL and keep the store on a file system with working flock.

Reading
-------
``load(name, version)`` verifies a version fully on its first load in a process (see
``service.store.artifact``) and keeps the result in an LRU cache bounded by count and bytes, keyed by
(name, version, manifest SHA-256). Catalog lookups (the live version of a name, the row of a version)
are cached for ``catalog_ttl_s`` seconds (default 1 s), so a live-version change made by any process is
seen by every other process within that time, and at once by the process that made it.
"""

from __future__ import annotations

import difflib
import fcntl
import logging
import operator
import os
import shutil
import threading
import time
import uuid
from contextlib import contextmanager
from dataclasses import dataclass, field
from datetime import datetime
from pathlib import Path
from typing import Any, Callable, Iterator, Mapping

import numpy as np
from sqlalchemy import and_, event, func, insert, select, update

from service.errors import (
    CatalogUnavailable,
    Conflict,
    IntegrityFailure,
    InvalidSpec,
    NotFound,
    StorageFailure,
    TikhonError,
)
from service.settings import Settings
from service.store import artifact, layout, scratch
from service.store.layout import JOBS_DIR, STAGING_DIR, TRASH_DIR
from service.store.cache import LRUCache, footprint
from service.store.catalog import (
    CatalogAccess,
    create_catalog_engine,
    lock_name,
    migrate,
    normalize_url,
    safe_url,
)
from service.store.names import validate_name
from service.store.schema import catalog_info as catalog_info_t
from service.store.schema import history as history_t
from service.store.schema import models as models_t
from service.store.schema import VERSION_MAX
from service.store.schema import versions as versions_t
from service.store.util import as_utc, iso, row_dict, utcnow

log = logging.getLogger("tikhon.store")



def _fault_point(step: str) -> None:
    """A named point of the publish protocol. Does nothing; the crash tests replace it to SIGKILL the
    process exactly there (``tests/store/test_crash.py``)."""


ModelLoader = Callable[[dict, dict], Any]
_UNSET: Any = object()  # "no condition" for set_live's expect_live


def _engine_loader(manifest_body: dict, arrays: dict) -> Any:
    from service.engine import load_model  # layer 1; imported on first load only

    return load_model(manifest_body, arrays)


@dataclass(frozen=True)
class LoadedVersion:
    """A verified, rebuilt version. ``checksum`` is the SHA-256 of its manifest.json, which pins the
    SHA-256 of arrays.npz (``arrays_sha256``): together they fix every stored byte."""

    name: str
    version: int
    checksum: str
    arrays_sha256: str
    created_at: str
    manifest: dict = field(repr=False)
    model: Any = field(repr=False)
    nbytes: int = 0


class Store:
    """Filesystem + SQL model store. Thread-safe; one instance per process is the intended use."""

    def __init__(self, settings: Settings, *, model_loader: ModelLoader | None = None, catalog_ttl_s: float = 1.0):
        from service.store.jobs import Jobs  # local: jobs and keys import this module's helpers
        from service.store.keys import Keys

        self.settings = settings
        self.root = Path(settings.store).resolve()
        self.folder_state = layout.claim(self.root)  # refuses a foreign folder before touching anything
        try:
            for sub in (STAGING_DIR, TRASH_DIR, JOBS_DIR):
                (self.root / sub).mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise StorageFailure(
                f"the store folder {self.root.name!r} cannot be created or written ({exc.strerror}); "
                "set TIKHON_STORE to a writable folder."
            ) from None
        sql = create_catalog_engine(normalize_url(settings.catalog_url()))
        # what Jobs and Keys get of the store: the catalog database, its label, id and cache lifetime
        self.db = CatalogAccess(sql, _catalog_label(sql, self.root), ttl_s=catalog_ttl_s)
        self.catalog = self.db.label
        self.schema_revision = migrate(self.db.sql)
        self.catalog_id = self.db.catalog_id = self._read_catalog_id()
        self._catalog_file = _sqlite_file(self.db.sql)
        self._catalog_identity = _file_identity(self._catalog_file) if self._catalog_file else None
        if self._catalog_file is not None:
            event.listen(self.db.sql, "begin", self._guard_catalog_file, insert=True)  # before BEGIN runs
        self.unlisted: list[tuple[str, int]] = []  # version folders the catalog does not list (kept)
        self.kept: list[str] = []  # other entries the sweep could not prove its own (kept)
        self._loader: ModelLoader = model_loader or _engine_loader
        self._cache = LRUCache(settings.cache_models, settings.cache_bytes)
        self._lock = threading.Lock()
        self._rows: dict[tuple[str, int], tuple[dict, float]] = {}
        self._live: dict[str, tuple[int | None, float]] = {}
        self.jobs = Jobs(self.db, self.root / JOBS_DIR)
        self.keys = Keys(self.db)
        self.last_sweep = self.sweep()

    # ------------------------------------------------------------------------------------------------
    # lifecycle

    def close(self) -> None:
        self.db.sql.dispose()

    def __enter__(self) -> "Store":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()

    def ping(self) -> dict[str, str]:
        """Readiness: the catalog answers and is the one opened at start, the store folder takes a write,
        and every version folder is listed by the catalog. Returns one entry per check (``"ok"`` or
        what is wrong); raises StorageFailure only when the catalog cannot be asked at all."""
        checks = {"catalog": "ok", "store": "ok", "versions": "ok"}
        try:
            self._check_catalog_identity()
        except StorageFailure as exc:
            checks["catalog"] = str(exc)
        probe = self.root / STAGING_DIR / f"ping-{uuid.uuid4().hex}"
        try:
            probe.write_bytes(b"ok")
            probe.unlink()
        except OSError as exc:
            checks["store"] = f"the store folder {self.root.name!r} is not writable ({exc.strerror})"
        if checks["catalog"] == "ok":
            unlisted = self.unlisted_versions()
            if unlisted:
                shown = ", ".join(f"{n}/{v}" for n, v in unlisted[:5]) + (" ..." if len(unlisted) > 5 else "")
                checks["versions"] = (
                    f"{len(unlisted)} version folder{'s are' if len(unlisted) > 1 else ' is'} not in the catalog "
                    f"({shown}); they were kept: run `tikhon store recover` to register them")
        return checks

    def _read_catalog_id(self) -> str:
        with self.db.errors("reading the catalog's id"), self.db.read() as conn:
            value = conn.execute(select(catalog_info_t.c.value).where(catalog_info_t.c.key == "catalog_id")).scalar()
        if not value:
            raise StorageFailure(f"the catalog at {self.catalog} has no catalog id; it was not made by Tikhon's "
                                 "migrations. Point TIKHON_DATABASE_URL at a Tikhon catalog or an empty database.")
        return value

    def _check_catalog_identity(self) -> None:
        """Raise CatalogUnavailable when the catalog is gone, emptied or not the one opened at start."""
        if self._catalog_file is not None:
            self._guard_catalog_file(None)
        try:
            with self.db.errors("a readiness query"), self.db.read() as conn:
                value = conn.execute(select(catalog_info_t.c.value)
                                     .where(catalog_info_t.c.key == "catalog_id")).scalar()
        except StorageFailure as exc:
            raise CatalogUnavailable(str(exc)) from None
        if value != self.catalog_id:
            raise CatalogUnavailable(
                f"the catalog at {self.catalog} is not the one this process opened at start (its id changed); "
                "restart the service with the right TIKHON_DATABASE_URL.")

    def _guard_catalog_file(self, _conn: Any) -> None:
        """SQLite: refuse every transaction (and report not ready) once the catalog file was deleted,
        emptied or replaced under the running process, so no write goes into an unlinked or foreign file
        and no read answers from one. One ``stat`` per transaction."""
        now = _file_identity(self._catalog_file)
        if now is None:
            what = "deleted"
        elif now[:2] != self._catalog_identity[:2]:
            what = "replaced"
        elif now[2] == 0:
            what = "emptied"
        else:
            return
        raise CatalogUnavailable(
            f"the catalog file {layout.relative(self._catalog_file, self.root)!r} was {what} while the service ran; "
            "nothing was written. Restore it (or run `tikhon store recover` on a fresh one) and restart the service.")

    def cache_stats(self) -> dict[str, int]:
        return self._cache.stats()

    # ------------------------------------------------------------------------------------------------
    # paths

    def _version_dir(self, name: str, version: int) -> Path:
        return self.root / name / str(version)

    def version_folder(self, name: str, version: int) -> Path:
        """The folder holding one version's files (what a prediction process reads, ``service.api.predict_lane``)."""
        return self._version_dir(validate_name(name), version)

    def _discard(self, path: Path) -> Path | None:
        """Move ``path`` out of sight into .trash atomically; return where it went (None if gone)."""
        dest = self.root / TRASH_DIR / uuid.uuid4().hex
        try:
            os.rename(path, dest)
        except FileNotFoundError:
            return None
        return dest

    @staticmethod
    def _erase(paths: list[Path | None]) -> None:
        for p in paths:
            if p is not None:
                shutil.rmtree(p, ignore_errors=True)

    @contextmanager
    def _staging(self) -> Iterator[Path]:
        """A fresh staging folder, held by a flock on its marked lock file until the block ends."""
        staging_root = self.root / STAGING_DIR
        # the mark proves to a later sweep that this staging folder is ours
        token, fd, lock_path = layout.new_held_lock(staging_root, layout.STAGING_MARK, fcntl.LOCK_EX)
        folder = staging_root / token
        try:
            folder.mkdir()
            yield folder
        finally:
            shutil.rmtree(folder, ignore_errors=True)  # already gone when it was renamed into place
            try:
                lock_path.unlink()
            except FileNotFoundError:
                pass
            os.close(fd)

    # ------------------------------------------------------------------------------------------------
    # publish

    def publish(
        self, name: str, manifest_body: dict, arrays: Mapping[str, np.ndarray], *, job_id: str | None = None,
        holder: str | None = None,
    ) -> dict[str, Any]:
        """Store a new version of ``name``; return its catalog row. See the module docstring.

        ``holder``: the worker publishing for job ``job_id``. The publish then commits only if, inside its
        transaction, that worker still holds the job and no version of the job exists yet (``Conflict``
        otherwise), so a job re-queued from a worker that was presumed dead publishes once."""
        validate_name(name)
        arrays = artifact.check_arrays(arrays)
        artifact.dump_json(manifest_body, what="the manifest body")  # fail before touching the disk
        if job_id is not None and (not isinstance(job_id, str) or not 0 < len(job_id) <= 64):
            raise IntegrityFailure(f"job_id must be a string of 1-64 characters or None, received {job_id!r}.")
        summary = _summary_of(manifest_body)
        cv_split = artifact.split_cv_table(manifest_body.get("cv_table")) if isinstance(manifest_body, Mapping) else None
        model_dir = self.root / name
        if model_dir.exists() and not model_dir.is_dir():
            raise StorageFailure(f"{model_dir} exists and is not a folder; move it away to publish {name!r}.")
        trash: list[Path | None] = []
        try:
            with self._staging() as staging:
                arrays_info = artifact.write_arrays(staging, arrays)
                side_bytes = 0
                if cv_split is not None:  # the CV table goes to cv.npz; the manifest keeps a reference
                    cv_info = artifact.write_arrays(staging, cv_split[0], file=artifact.CV_FILE)
                    side_bytes = cv_info["bytes"]
                    manifest_body = {**manifest_body, "cv_table": {**cv_info, **cv_split[1]}}
                _fault_point("staged")
                renamed = False
                try:
                    with self.db.errors(f"publishing a version of {name!r}"), self.db.write() as conn:
                        lock_name(conn, name)
                        if job_id is not None and holder is not None:
                            self.jobs.check_holder(conn, job_id, holder, name)
                        _fault_point("locked")
                        now = utcnow()
                        m = conn.execute(select(models_t.c.last_version).where(models_t.c.name == name)).first()
                        if m is None:
                            conn.execute(insert(models_t).values(
                                name=name, created_at=now, updated_at=now, last_version=0, live_version=None))
                            last = 0
                        else:
                            last = m.last_version
                        version = last + 1
                        target = self._version_dir(name, version)
                        if os.path.lexists(target):
                            if not self._crashed_publish(target):
                                raise Conflict(
                                    f"version folder {name}/{version} exists but the catalog has no row for it, so "
                                    "it was kept and nothing was published; run `tikhon store recover` to register "
                                    "it (the catalog may have been lost or replaced), then train again.")
                            trash.append(self._discard(target))  # orphan of a crashed publish (see step 3)
                        manifest = artifact.build_manifest(
                            name=name, version=version, created_at=now.isoformat(), job_id=job_id,
                            arrays_info=arrays_info, body=manifest_body)
                        manifest_bytes = artifact.dump_json(manifest, what="the manifest")
                        artifact.write_manifest(staging, manifest_bytes)
                        layout.write_publishing_marker(staging, self.catalog_id, staging.name)
                        artifact.fsync_dir(staging)
                        if not model_dir.is_dir():
                            model_dir.mkdir(exist_ok=True)
                            artifact.fsync_dir(self.root)
                        _fault_point("before_rename")
                        os.rename(staging, target)
                        renamed = True
                        artifact.fsync_dir(model_dir)
                        _fault_point("after_rename")
                        conn.execute(update(models_t).where(models_t.c.name == name)
                                     .values(last_version=version, updated_at=now))
                        row = {
                            "model_name": name, "version": version, "created_at": now, "job_id": job_id,
                            "manifest_sha256": artifact.sha256_bytes(manifest_bytes),
                            "arrays_sha256": arrays_info["sha256"],
                            "bytes": arrays_info["bytes"] + side_bytes + len(manifest_bytes),
                            "summary": summary, "deleted_at": None,
                        }
                        conn.execute(insert(versions_t).values(**row))
                        _fault_point("before_commit")
                    _fault_point("committed")
                except BaseException:
                    if renamed:  # the folder may sit in place without a row: clear it under the lock
                        try:
                            self._sweep_model(name)
                        except TikhonError:
                            pass  # the next publish or start-up sweep will
                    raise
        except OSError as exc:
            raise StorageFailure(
                f"could not write a version of {name!r} in the store ({exc.strerror or exc}); "
                "nothing was published."
            ) from exc
        layout.clear_markers(target)  # committed: from now on the catalog row vouches for it
        self._erase(trash)
        live = self.live_version(name)
        return self._version_out(row, live)

    def _crashed_publish(self, folder: Path) -> bool:
        """True when ``folder`` is provably the leftover of a publish into *this* catalog that never
        committed: it holds a ``.publishing`` marker naming this catalog's id. Call under the name's
        write lock, after checking that the catalog has no row for it."""
        return layout.marker_catalog(folder, layout.PUBLISHING_MARKER) == self.catalog_id

    @staticmethod
    def _version_out(row: Mapping[str, Any], live: int | None) -> dict[str, Any]:
        return {
            "name": row["model_name"],
            "version": row["version"],
            "created_at": iso(row["created_at"]),
            "job_id": row["job_id"],
            "checksum": row["manifest_sha256"],
            "arrays_sha256": row["arrays_sha256"],
            "bytes": row["bytes"],
            "summary": row["summary"],
            "live": row["version"] == live,
        }

    # ------------------------------------------------------------------------------------------------
    # reads

    @staticmethod
    def _check_version(name: str, version: Any) -> int:
        try:
            if isinstance(version, bool):
                raise TypeError
            v = operator.index(version)
        except TypeError:
            raise NotFound(
                f"version {version!r} of model {name!r} does not exist; versions are whole numbers from 1.",
                errors=[{"field": "version", "value": repr(version), "message": "must be a whole number >= 1"}],
            ) from None
        if v < 1:
            raise NotFound(f"version {v} of model {name!r} does not exist; versions are numbered from 1.")
        if v > VERSION_MAX:  # beyond the catalog's integer column: no such version (never an OverflowError)
            raise NotFound(f"version {v} of model {name!r} does not exist; version numbers go up to {VERSION_MAX}.",
                           errors=[{"field": "version", "value": str(v), "message": f"at most {VERSION_MAX}"}])
        return v

    def _fresh(self, stamp: float) -> bool:
        return self.db.fresh(stamp)

    def _version_row(self, name: str, version: int) -> dict[str, Any]:
        with self._lock:
            hit = self._rows.get((name, version))
        if hit is not None and self._fresh(hit[1]):
            return hit[0]
        with self.db.errors(f"reading version {version} of {name!r}"), self.db.read() as conn:
            row = conn.execute(select(versions_t).where(and_(
                versions_t.c.model_name == name, versions_t.c.version == version))).first()
            last = None
            if row is None or row.deleted_at is not None:
                last = conn.execute(select(models_t.c.last_version).where(models_t.c.name == name)).scalar()
                missing = unknown_model(conn, name) if last is None else None
        if row is None or row.deleted_at is not None:
            with self._lock:
                self._rows.pop((name, version), None)
            if last is None:
                raise missing
            if row is not None:
                raise NotFound(f"version {version} of model {name!r} was deleted at {iso(row.deleted_at)}.")
            raise NotFound(f"model {name!r} has no version {version} (its newest version number is {last}).")
        d = row_dict(row)
        with self._lock:
            self._rows[(name, version)] = (d, time.monotonic())
        return d

    def load(self, name: str, version: int, *, fresh: bool = False) -> LoadedVersion:
        """Return the verified, rebuilt model of one version (from the cache when possible; ``fresh``
        verifies the files on disk again and replaces the cached copy)."""
        validate_name(name)
        version = self._check_version(name, version)
        row = self._version_row(name, version)
        key = (name, version, row["manifest_sha256"])
        hit = None if fresh else self._cache.get(key)
        if hit is not None:
            return hit
        folder = self._version_dir(name, version)
        manifest, manifest_size = artifact.read_manifest(
            folder, expected_sha256=row["manifest_sha256"], name=name, version=version)
        arrays, arrays_size = artifact.read_arrays(folder, manifest, name=name, version=version)
        try:
            model = self._loader(manifest["training"], arrays)
        except Exception as exc:
            raise IntegrityFailure(
                f"model {name!r} version {version} passed its checksums but could not be rebuilt "
                f"({type(exc).__name__}: {exc}); it was written by Tikhon {manifest['libraries'].get('tikhon')}."
            ) from exc
        loaded = LoadedVersion(
            name=name, version=version, checksum=row["manifest_sha256"], arrays_sha256=row["arrays_sha256"],
            created_at=manifest["created_at"], manifest=manifest, model=model,
            # what it holds in memory (the rebuilt model may keep derived arrays), at least the file's arrays
            nbytes=max(arrays_size + manifest_size, footprint((model, manifest))),
        )
        self._cache.put(key, loaded, loaded.nbytes)
        return loaded

    def load_parts(self, name: str, version: int) -> tuple[dict[str, Any], dict[str, Any]]:
        """(engine body, every array) of one version, read from its files and verified by their checksums as
        ``load`` does, but not rebuilt nor cached: what a continued training merges its new rows into."""
        validate_name(name)
        version = self._check_version(name, version)
        row = self._version_row(name, version)
        folder = self._version_dir(name, version)
        manifest, _ = artifact.read_manifest(folder, expected_sha256=row["manifest_sha256"], name=name, version=version)
        arrays, _ = artifact.read_arrays(folder, manifest, name=name, version=version)
        return manifest["training"], dict(arrays)

    def verify(self, name: str, version: int) -> LoadedVersion:
        """Verify one version from its files as a first load does (checksums, format, members, rebuilt by
        the loader), whatever the cache holds. Raises ``IntegrityFailure`` naming the failed check."""
        try:
            return self.load(name, version, fresh=True)
        except FileNotFoundError as exc:
            raise IntegrityFailure(f"{layout.relative(exc.filename or '', self.root)} is missing") from None
        except OSError as exc:
            raise IntegrityFailure(f"its files cannot be read ({exc.strerror or exc})") from None

    def live_version(self, name: str) -> int | None:
        """The live version of ``name``; None when it has none or the model does not exist."""
        validate_name(name)
        with self._lock:
            hit = self._live.get(name)
        if hit is not None and self._fresh(hit[1]):
            return hit[0]
        with self.db.errors(f"reading the live version of {name!r}"), self.db.read() as conn:
            live = conn.execute(select(models_t.c.live_version).where(models_t.c.name == name)).scalar()
        with self._lock:
            self._live[name] = (live, time.monotonic())
        return live

    def _model_row(self, conn, name: str) -> Any:
        m = conn.execute(select(models_t).where(models_t.c.name == name)).first()
        if m is None:
            raise unknown_model(conn, name)
        return m

    def _models(self, name: str | None) -> list[dict[str, Any]]:
        alive = versions_t.select().where(versions_t.c.deleted_at.is_(None)).subquery()
        q = (
            select(models_t, func.count(alive.c.version).label("n"), func.max(alive.c.version).label("newest"))
            .select_from(models_t.outerjoin(alive, alive.c.model_name == models_t.c.name))
            .group_by(*models_t.c)
            .order_by(models_t.c.name)
        )
        if name is not None:
            q = q.where(models_t.c.name == name)
        with self.db.errors("listing models"), self.db.read() as conn:
            rows = conn.execute(q).all()
        return [
            {
                "name": r.name, "live_version": r.live_version, "newest_version": r.newest,
                "versions": r.n, "created_at": iso(r.created_at), "updated_at": iso(r.updated_at),
            }
            for r in rows
        ]

    def list_models(self) -> list[dict[str, Any]]:
        """Every model with its live version, newest version number and count of versions, by name."""
        return self._models(None)

    def get_model(self, name: str) -> dict[str, Any]:
        validate_name(name)
        found = self._models(name)
        if not found:
            with self.db.errors(f"reading the model {name!r}"), self.db.read() as conn:
                raise unknown_model(conn, name)
        return found[0]

    def list_versions(self, name: str) -> list[dict[str, Any]]:
        """The versions of ``name`` that exist (deleted ones are left out), oldest first."""
        validate_name(name)
        with self.db.errors(f"listing versions of {name!r}"), self.db.read() as conn:
            m = self._model_row(conn, name)
            rows = conn.execute(
                select(versions_t)
                .where(and_(versions_t.c.model_name == name, versions_t.c.deleted_at.is_(None)))
                .order_by(versions_t.c.version)
            ).all()
        return [self._version_out(row_dict(r), m.live_version) for r in rows]

    def get_version(self, name: str, version: int) -> dict[str, Any]:
        """The catalog row of one version (cheap; no file is read)."""
        validate_name(name)
        version = self._check_version(name, version)
        with self._lock:
            self._rows.pop((name, version), None)
        return self._version_out(self._version_row(name, version), self.live_version(name))

    def get_manifest(self, name: str, version: int, *, cv_table: bool = True) -> dict[str, Any]:
        """The verified manifest of one version, read from disk (a fresh dict the caller may keep).

        With ``cv_table`` (the default) a CV table kept in ``cv.npz`` is read back into
        ``training.cv_table`` as a list of rows, so the manifest looks as the engine wrote it; without it,
        ``training.cv_table`` stays the small reference (what metadata routes should read)."""
        validate_name(name)
        version = self._check_version(name, version)
        row = self._version_row(name, version)
        folder = self._version_dir(name, version)
        manifest, _ = artifact.read_manifest(folder, expected_sha256=row["manifest_sha256"], name=name, version=version)
        body = manifest.get("training")
        if cv_table and isinstance(body, dict) and _is_cv_reference(body.get("cv_table")):
            columns, meta = self.cv_columns(name, version, manifest)
            body["cv_table"] = artifact.cv_rows(columns, meta, slice(None))
        return manifest

    def cv_columns(self, name: str, version: int, manifest: dict[str, Any] | None = None
                   ) -> tuple[dict[str, np.ndarray], dict[str, Any]]:
        """The CV table of one version in column form (``artifact.split_cv_table``): ``(columns, meta)``.
        Read from ``cv.npz`` (verified against the manifest); for a format-1 version with the table inline,
        converted from it. A version without a CV table gives empty columns and ``meta["rows"] == 0``."""
        if manifest is None:
            manifest = self.get_manifest(name, version, cv_table=False)
        body = manifest.get("training") if isinstance(manifest.get("training"), dict) else {}
        ref = body.get("cv_table")
        if _is_cv_reference(ref):
            columns, _ = artifact.read_arrays(self._version_dir(name, version), manifest, name=name,
                                              version=version, info=ref)
            return artifact.upgrade_cv_columns(columns), {"rows": int(ref["rows"]), "keys": list(ref["keys"]), "bases": list(ref["bases"])}
        split = artifact.split_cv_table(ref)
        if split is None:
            return {"basis": np.zeros(0, dtype=np.int32)}, {"rows": 0, "keys": [], "bases": []}
        return split

    # ------------------------------------------------------------------------------------------------
    # live version and history

    def set_live(
        self, name: str, version: int, *, actor: str, reason: str, details: dict | None = None,
        expect_live: Any = _UNSET,
    ) -> dict[str, Any]:
        """Make ``version`` the live version of ``name`` and append the change to the history.

        ``expect_live`` (a version number or None) makes the change conditional: when the live version is
        no longer the one the caller saw (someone changed it since), nothing changes, and a history entry
        that keeps the live version and says why is appended instead (``superseded`` is True in the
        answer). A training job passes the live version it saw at submission, so its promotion never
        undoes an operator's later change.

        Returns the history entry (``changed`` is False, and nothing is written, when the version was
        already live)."""
        validate_name(name)
        version = self._check_version(name, version)
        if not isinstance(actor, str) or not actor.strip() or len(actor) > 200:
            raise InvalidSpec(f"actor must name who makes the change (1-200 characters), received {actor!r}.",
                              errors=[{"field": "actor", "value": repr(actor), "message": "1-200 characters"}])
        if not isinstance(reason, str):
            raise InvalidSpec(f"reason must be a string, received {type(reason).__name__}.",
                              errors=[{"field": "reason", "value": repr(reason), "message": "must be a string"}])
        if details is not None:
            artifact.dump_json(details, what="the history details")
        with self.db.errors(f"setting the live version of {name!r}"), self.db.write() as conn:
            lock_name(conn, name)
            m = self._model_row(conn, name)
            row = conn.execute(select(versions_t.c.deleted_at).where(and_(
                versions_t.c.model_name == name, versions_t.c.version == version))).first()
            if row is None:
                raise NotFound(f"model {name!r} has no version {version} (its newest version number is "
                               f"{m.last_version}); it cannot go live.")
            if row.deleted_at is not None:
                raise NotFound(f"version {version} of model {name!r} was deleted at {iso(row.deleted_at)}; "
                               "it cannot go live.")
            now = utcnow()
            entry = {"name": name, "at": now, "actor": actor, "from_version": m.live_version,
                     "to_version": version, "reason": reason, "details": details}
            if expect_live is not _UNSET and m.live_version != expect_live and m.live_version != version:
                because = (f"version {version} was not made live because the live version changed from "
                           f"{expect_live if expect_live is not None else 'none'} to {m.live_version} after the job "
                           "was submitted (that later change stands)")
                why = f"{reason}; {because}"
                kept = {**(details or {}), "not_made_live": version, "live_seen": expect_live,
                        "live_now": m.live_version}
                res = conn.execute(insert(history_t).values(
                    model_name=name, at=now, actor=actor, from_version=m.live_version,
                    to_version=m.live_version, reason=why, details=kept))
                return {**entry, "to_version": m.live_version, "reason": why, "details": kept,
                        "id": res.inserted_primary_key[0], "at": iso(now), "changed": False, "superseded": True,
                        "because": because}
            if m.live_version == version:
                out = {**entry, "id": None, "at": iso(now), "changed": False}
            else:
                conn.execute(update(models_t).where(models_t.c.name == name)
                             .values(live_version=version, updated_at=now))
                res = conn.execute(insert(history_t).values(
                    model_name=name, at=now, actor=actor, from_version=m.live_version, to_version=version,
                    reason=reason, details=details))
                out = {**entry, "id": res.inserted_primary_key[0], "at": iso(now), "changed": True}
        with self._lock:
            self._live[name] = (version, time.monotonic())
        return out

    def history(self, name: str) -> list[dict[str, Any]]:
        """Every change of the live version of ``name``, oldest first."""
        validate_name(name)
        with self.db.errors(f"reading the history of {name!r}"), self.db.read() as conn:
            self._model_row(conn, name)
            rows = conn.execute(select(history_t).where(history_t.c.model_name == name)
                                .order_by(history_t.c.id)).all()
        return [
            {"id": r.id, "name": r.model_name, "at": iso(r.at), "actor": r.actor, "from_version": r.from_version,
             "to_version": r.to_version, "reason": r.reason, "details": r.details}
            for r in rows
        ]

    def record_decision(self, name: str, version: int, *, actor: str, reason: str,
                        details: dict | None = None) -> dict[str, Any]:
        """Append a history entry saying that ``version`` was published but not made live, and why (a
        training job's ``if_better`` refusal or ``promote: never``). The live version does not change: the
        entry's ``from_version`` and ``to_version`` are both the live version, and ``details.not_made_live``
        names ``version`` (the same shape as a job whose promotion was superseded)."""
        validate_name(name)
        version = self._check_version(name, version)
        if details is not None:
            artifact.dump_json(details, what="the history details")
        with self.db.errors(f"recording a decision for {name!r}"), self.db.write() as conn:
            lock_name(conn, name)
            m = self._model_row(conn, name)
            now = utcnow()
            kept = {**(details or {}), "not_made_live": version}
            res = conn.execute(insert(history_t).values(
                model_name=name, at=now, actor=actor[:200], from_version=m.live_version, to_version=m.live_version,
                reason=reason, details=kept))
        return {"id": res.inserted_primary_key[0], "name": name, "at": iso(now), "actor": actor[:200],
                "from_version": m.live_version, "to_version": m.live_version, "reason": reason, "details": kept}

    # ------------------------------------------------------------------------------------------------
    # retention

    def delete_version(self, name: str, version: int) -> dict[str, Any]:
        """Delete one version (refused while it is live). Its number is never reused."""
        validate_name(name)
        version = self._check_version(name, version)
        self._delete(name, lambda live, alive: [version], explicit=version)
        return {"name": name, "version": version, "deleted": True}

    def prune(self, name: str, keep: int) -> list[int]:
        """Delete all versions of ``name`` except the live one and the newest ``keep``; return the
        deleted version numbers."""
        validate_name(name)
        if isinstance(keep, bool) or not isinstance(keep, int) or keep < 0:
            raise InvalidSpec(f"keep must be a whole number >= 0, received {keep!r}; it is how many of the newest "
                              "versions to keep besides the live one.",
                              errors=[{"field": "keep", "value": repr(keep), "message": "whole number >= 0"}])

        return self._delete(name, _prune_choice(keep), explicit=None)

    def prune_plan(self, name: str, keep: int) -> list[int]:
        """The versions ``prune(name, keep)`` would delete now, deleting nothing (``tikhon prune --dry-run``)."""
        validate_name(name)
        if isinstance(keep, bool) or not isinstance(keep, int) or keep < 0:
            raise InvalidSpec(f"keep must be a whole number >= 0, received {keep!r}.",
                              errors=[{"field": "keep", "value": repr(keep), "message": "whole number >= 0"}])
        alive = [int(v["version"]) for v in self.list_versions(name)]
        live = self.get_model(name).get("live_version")
        return _prune_choice(keep)(live, alive)

    def _delete(self, name: str, choose: Callable[[int | None, list[int]], list[int]], *, explicit: int | None) -> list[int]:
        with self.db.errors(f"deleting versions of {name!r}"), self.db.write() as conn:
            lock_name(conn, name)
            m = self._model_row(conn, name)
            rows = conn.execute(select(versions_t.c.version, versions_t.c.deleted_at)
                                .where(versions_t.c.model_name == name)).all()
            alive = sorted(r.version for r in rows if r.deleted_at is None)
            if explicit is not None:
                known = {r.version: r.deleted_at for r in rows}
                if explicit not in known:
                    raise NotFound(f"model {name!r} has no version {explicit} (its newest version number is "
                                   f"{m.last_version}).")
                if known[explicit] is not None:
                    raise NotFound(f"version {explicit} of model {name!r} was already deleted at "
                                   f"{iso(known[explicit])}.")
                if explicit == m.live_version:
                    raise Conflict(f"version {explicit} of model {name!r} is live and cannot be deleted; "
                                   "make another version live first.")
            doomed = sorted(choose(m.live_version, alive))
            for v in doomed:  # so that a crash after the commit leaves folders the sweep may prove deleted
                if self._version_dir(name, v).is_dir():
                    layout.write_deleting_marker(self._version_dir(name, v), self.catalog_id)
            if doomed:
                conn.execute(update(versions_t).where(and_(
                    versions_t.c.model_name == name, versions_t.c.version.in_(doomed))).values(deleted_at=utcnow()))
        # Committed: the rows are tombstones, so no publish can ever want these folders again.
        self._erase([self._discard(self._version_dir(name, v)) for v in doomed])
        with self._lock:
            for v in doomed:
                self._rows.pop((name, v), None)
        self._cache.discard_where(lambda k: k[0] == name and k[1] in doomed)
        return doomed

    # ------------------------------------------------------------------------------------------------
    # sweeping

    def sweep(self) -> dict[str, int]:
        """Remove what this service wrote and can prove unfinished (safe while other processes publish);
        keep and report everything else (``self.unlisted``: version folders the catalog does not list;
        ``self.kept``: other entries it cannot prove its own). See ``service.store.layout``."""
        kept: list[str] = []
        unlisted: list[tuple[str, int]] = []
        counts = {"staging": self._sweep_staging(kept), "orphan_versions": 0, "trash": 0, "job_folders": 0}
        for entry in sorted(self.root.iterdir()):
            if entry.is_dir() and not entry.is_symlink():
                try:
                    validate_name(entry.name)
                except TikhonError:
                    continue
                removed, left = self._sweep_model(entry.name)
                counts["orphan_versions"] += removed
                unlisted.extend((entry.name, v) for v in left)
        for entry in (self.root / TRASH_DIR).iterdir():
            if not layout.HEX_TOKEN.fullmatch(entry.name):
                kept.append(f"{TRASH_DIR}/{entry.name}")
                continue
            shutil.rmtree(entry, ignore_errors=True) if entry.is_dir() and not entry.is_symlink() \
                else entry.unlink(missing_ok=True)
            counts["trash"] += 1
        counts["job_folders"] = self.jobs.sweep_folders()
        kept.extend(self.jobs.kept_folders)
        counts["scratch"] = scratch.sweep(self.root, kept)
        counts["unlisted_versions"] = len(unlisted)
        counts["kept"] = len(kept)
        self.unlisted, self.kept = sorted(unlisted), kept
        if unlisted:
            log.warning(
                "%d version folder(s) are not in the catalog and were kept (%s); run `tikhon store recover` to "
                "register them", len(unlisted), ", ".join(f"{n}/{v}" for n, v in self.unlisted[:10]))
        if kept:
            log.warning("kept %d entr(ies) in the store that the sweep could not prove its own: %s",
                        len(kept), ", ".join(kept[:10]))
        return counts

    def recover(self, *, dry_run: bool = False, live: str = "none") -> dict[str, Any]:
        """Register every complete, checksum-valid version folder that the catalog does not list (after a
        catalog was lost, emptied or replaced). Each one is verified as a first load would (manifest
        format, name and version, SHA-256 and members of arrays.npz, rebuilt by the model loader) and
        refused, with the reason, when any check fails; a number the catalog holds as deleted is left
        alone. ``live="newest"`` makes the newest version of each model that has no live version live
        (recorded in its history). Nothing is moved or removed.

        Returns ``{"registered": [{"name", "version"}], "refused": [{"path", "reason"}],
        "made_live": [{"name", "version"}]}``."""
        if live not in ("none", "newest"):
            raise InvalidSpec(f"live must be 'none' or 'newest', received {live!r}.")
        out: dict[str, list] = {"registered": [], "refused": [], "made_live": []}
        for entry in sorted(self.root.iterdir()):
            if not entry.is_dir() or entry.is_symlink():
                continue
            try:
                validate_name(entry.name)
            except TikhonError:
                continue
            name = entry.name
            folders = self._version_folders(name)
            with self.db.errors(f"reading versions of {name!r}"), self.db.read() as conn:
                known = {r.version: r.deleted_at for r in conn.execute(
                    select(versions_t.c.version, versions_t.c.deleted_at).where(versions_t.c.model_name == name))}
            found = []
            for v, folder in sorted(folders.items()):
                if v in known:
                    continue
                where = f"{name}/{v}"
                try:
                    found.append((v, self._verify_folder(name, v, folder)))
                except (TikhonError, OSError) as exc:
                    out["refused"].append({"path": where, "reason": " ".join(str(exc).split())})
            if not found or dry_run:
                out["registered"].extend({"name": name, "version": v} for v, _ in found)
                continue
            with self.db.errors(f"registering versions of {name!r}"), self.db.write() as conn:
                lock_name(conn, name)
                now = utcnow()
                m = conn.execute(select(models_t.c.last_version).where(models_t.c.name == name)).first()
                if m is None:
                    conn.execute(insert(models_t).values(
                        name=name, created_at=now, updated_at=now, last_version=0, live_version=None))
                taken = set(conn.execute(select(versions_t.c.version)
                                         .where(versions_t.c.model_name == name)).scalars())
                for v, row in found:
                    if v in taken:
                        continue  # registered by a concurrent recover
                    conn.execute(insert(versions_t).values(**row))
                    out["registered"].append({"name": name, "version": v})
                newest = max(v for v, _ in found)
                conn.execute(update(models_t).where(and_(models_t.c.name == name, models_t.c.last_version < newest))
                             .values(last_version=newest, updated_at=now))
            for v, _ in found:
                layout.clear_markers(folders[v])
            with self._lock:
                self._live.pop(name, None)
        if live == "newest" and not dry_run:
            for name in sorted({r["name"] for r in out["registered"]}):
                if self.live_version(name) is None:
                    newest = max(r["version"] for r in out["registered"] if r["name"] == name)
                    self.set_live(name, newest, actor="tikhon store recover",
                                  reason="made live by `tikhon store recover --live newest` after the catalog was rebuilt")
                    out["made_live"].append({"name": name, "version": newest})
        self.unlisted = [(n, v) for n, v in self.unlisted
                         if {"name": n, "version": v} not in out["registered"]] if not dry_run else self.unlisted
        return out

    def _verify_folder(self, name: str, version: int, folder: Path) -> dict[str, Any]:
        """Verify an unlisted version folder fully; return the catalog row it would get."""
        manifest_bytes = (folder / artifact.MANIFEST_FILE).read_bytes()
        sha = artifact.sha256_bytes(manifest_bytes)
        manifest, manifest_size = artifact.read_manifest(folder, expected_sha256=sha, name=name, version=version)
        arrays, arrays_size = artifact.read_arrays(folder, manifest, name=name, version=version)
        try:
            self._loader(manifest["training"], arrays)
        except Exception as exc:
            raise IntegrityFailure(f"it passed its checksums but could not be rebuilt ({type(exc).__name__}: {exc})") from None
        try:
            created = as_utc(datetime.fromisoformat(manifest["created_at"]))
        except (TypeError, ValueError):
            raise IntegrityFailure(f"its manifest's created_at {manifest.get('created_at')!r} is not an ISO-8601 time") from None
        job_id = manifest.get("job_id")
        return {
            "model_name": name, "version": version, "created_at": created,
            "job_id": job_id if isinstance(job_id, str) and 0 < len(job_id) <= 64 else None,
            "manifest_sha256": sha, "arrays_sha256": manifest["arrays"]["sha256"],
            "bytes": arrays_size + manifest_size, "summary": _summary_of(manifest.get("training")), "deleted_at": None,
        }

    def unlisted_versions(self) -> list[tuple[str, int]]:
        """The version folders found without a catalog row at start that still have none (re-checked, so a
        ``tikhon store recover`` run by another process clears the report)."""
        if not self.unlisted:
            return []
        names = sorted({n for n, _ in self.unlisted})
        with self.db.errors("checking unlisted version folders"), self.db.read() as conn:
            listed = set(conn.execute(select(versions_t.c.model_name, versions_t.c.version)
                                      .where(versions_t.c.model_name.in_(names))).tuples())
        still = [(n, v) for n, v in self.unlisted
                 if (n, v) not in listed and self._version_dir(n, v).is_dir()]
        self.unlisted = still
        return list(still)

    def _sweep_staging(self, kept: list[str]) -> int:
        staging_root = self.root / STAGING_DIR
        removed = 0
        for entry in staging_root.iterdir():
            token = entry.name[: -len(".lock")] if entry.name.endswith(".lock") else entry.name
            if entry.name.endswith(".lock") and layout.HEX_TOKEN.fullmatch(token):
                try:
                    fd = os.open(entry, os.O_RDWR | os.O_NOFOLLOW)
                except (FileNotFoundError, OSError):
                    continue
                try:
                    try:
                        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
                    except BlockingIOError:
                        continue  # a live publish holds it
                    if os.pread(fd, len(layout.STAGING_MARK), 0) != layout.STAGING_MARK:
                        kept.append(f"{STAGING_DIR}/{entry.name}")
                        continue
                    folder = staging_root / token
                    if folder.is_symlink():
                        folder.unlink()
                    else:
                        shutil.rmtree(folder, ignore_errors=True)
                    entry.unlink(missing_ok=True)
                    removed += 1
                finally:
                    os.close(fd)
            elif entry.name.startswith("ping-") and layout.HEX_TOKEN.fullmatch(entry.name[5:]) and entry.is_file():
                entry.unlink(missing_ok=True)  # a readiness probe whose process died between write and unlink
            elif not os.path.lexists(entry):
                continue  # a staging folder this sweep removed with its lock file, listed before that
            elif not (layout.HEX_TOKEN.fullmatch(token) and (staging_root / f"{token}.lock").exists()):
                kept.append(f"{STAGING_DIR}/{entry.name}")
        return removed

    def _version_folders(self, name: str) -> dict[int, Path]:
        model_dir = self.root / name
        out: dict[int, Path] = {}
        if model_dir.is_dir():
            for entry in model_dir.iterdir():
                if entry.name.isdigit() and str(int(entry.name)) == entry.name:
                    out[int(entry.name)] = entry
        return out

    def _sweep_model(self, name: str) -> tuple[int, list[int]]:
        """Remove the version folders of ``name`` that are provably crashed publishes into this catalog
        (no catalog row, a ``.publishing`` marker naming this catalog); clear the marker of listed ones.
        Returns (how many were removed, the numbers of unlisted folders that were kept)."""
        folders = self._version_folders(name)
        if not folders:
            return 0, []
        with self.db.errors(f"sweeping {name!r}"), self.db.read() as conn:
            rows = conn.execute(select(versions_t.c.version, versions_t.c.deleted_at)
                                .where(versions_t.c.model_name == name)).all()
        listed = {r.version for r in rows if r.deleted_at is None}
        for v in set(folders) & listed:
            layout.clear_markers(folders[v])  # a publish that died after its commit, a delete that failed
        if set(folders) <= listed:
            return 0, []
        with self.db.errors(f"sweeping {name!r}"), self.db.write() as conn:
            lock_name(conn, name)
            rows = conn.execute(select(versions_t.c.version, versions_t.c.deleted_at)
                                .where(versions_t.c.model_name == name)).all()
            alive = {r.version for r in rows if r.deleted_at is None}
            tombstones = {r.version for r in rows if r.deleted_at is not None}
            trash, left = [], []
            for v, p in self._version_folders(name).items():
                if v in alive:
                    continue
                deleted_here = v in tombstones and layout.marker_catalog(p, layout.DELETING_MARKER) == self.catalog_id
                if p.is_dir() and not p.is_symlink() and (self._crashed_publish(p) or deleted_here):
                    # a crashed publish into this catalog, or a version deleted in it whose erase was interrupted
                    trash.append(self._discard(p))
                else:
                    left.append(v)
        self._erase(trash)
        return len(trash), sorted(left)


def _prune_choice(keep: int) -> Callable[[int | None, list[int]], list[int]]:
    """The pruning rule: every version but the live one and the newest ``keep``."""
    def choose(live: int | None, alive: list[int]) -> list[int]:
        kept = set(sorted(alive, reverse=True)[:keep]) | ({live} if live is not None else set())
        return [v for v in alive if v not in kept]

    return choose


def unknown_model(conn: Any, name: str) -> NotFound:
    """The error for a model name the catalog does not hold, naming the closest names it does hold
    (a mistyped name is the usual cause)."""
    names = [r[0] for r in conn.execute(select(models_t.c.name).order_by(models_t.c.name)).all()]
    close = difflib.get_close_matches(name, names, n=3, cutoff=0.75)
    if close:
        hint = f"the closest name{'s' if len(close) > 1 else ''} on this server: {', '.join(repr(c) for c in close)}"
    elif names:
        hint = f"this server holds {len(names)} model{'s' if len(names) > 1 else ''}, none with a similar name (GET /v1/models lists them)"
    else:
        hint = "this server holds no models yet"
    return NotFound(
        f"no model named {name!r} exists; {hint}. Check the spelling, or train it first.",
        errors=[{"field": "name", "value": name, "message": "no such model", "closest": close}],
    )


def _summary_of(body: Any) -> Any:
    """The small parts of the manifest body kept in the catalog row for listings: the engine's chosen
    point and CV summary (``chosen``, ``cv_summary``)."""
    if not isinstance(body, Mapping):
        return None
    summary = {k: body[k] for k in ("chosen", "cv_summary") if isinstance(body.get(k), Mapping)}
    if summary and len(artifact.dump_json(summary, what="the summary")) <= 16384:
        return summary
    return None


def _sqlite_file(sql: Any) -> Path | None:
    if sql.dialect.name != "sqlite" or not sql.url.database:
        return None
    return Path(sql.url.database).resolve()


def _file_identity(path: Path | None) -> tuple[int, int, int] | None:
    """(device, inode, size) of ``path``, None when it does not exist."""
    try:
        st = os.stat(path)
    except (FileNotFoundError, TypeError):
        return None
    return st.st_dev, st.st_ino, st.st_size


def _catalog_label(sql: Any, root: Path) -> str:
    """How messages name the catalog: a SQLite file relative to the store (no host paths in answers),
    a server URL without its password."""
    db = _sqlite_file(sql)
    if db is None:
        return safe_url(sql)
    inside = db.is_relative_to(root)
    return f"{db.relative_to(root).as_posix()} (SQLite, in the store folder)" if inside else f"{db.name} (SQLite)"


def _is_cv_reference(ref: Any) -> bool:
    return isinstance(ref, dict) and ref.get("file") == artifact.CV_FILE

"""Training jobs in the catalog: submission with idempotency keys, claiming, heartbeats, re-queueing.

States: ``queued`` → ``running`` → ``succeeded`` | ``failed`` | ``cancelled``; ``queued`` →
``cancelled``; ``running`` → ``queued`` again when its worker stops sending heartbeats (up to
``max_attempts`` claims, then ``failed``).

* ``claim`` takes the oldest queued job: on PostgreSQL with ``SELECT ... FOR UPDATE SKIP LOCKED`` (many
  workers, no blocking, no double claims), on SQLite inside a ``BEGIN IMMEDIATE`` transaction (one
  writer at a time, so the select-then-update cannot interleave).
* ``heartbeat`` returns the job's state: ``running``, or ``cancelled`` when someone cancelled it (the
  worker should stop and call ``finish(..., "cancelled")``). It raises ``Conflict`` when the worker no
  longer holds the job (it was re-queued after a missed heartbeat, maybe claimed by another worker):
  the worker must drop its work.
* ``cancel`` of a queued job ends it at once; of a running job it marks it ``cancelled`` at once, and the
  worker learns it at its next heartbeat. A ``finish`` that arrives for a cancelled job keeps the state
  ``cancelled`` but records what it carries (a version that was published meanwhile stays traceable).
* An idempotency key is unique per model name. Submitting again with the same key and the same request
  (and data) returns the first job with ``created=False``; the same key with a different request is a
  ``Conflict``.

A job's data file (if the caller has one) is moved into ``<store>/_jobs/<id>/`` at submission and removed
when the job ends. ``incoming_dir`` is a folder on the same file system for callers to write uploads to
first, so the move is a rename.

Times come from the clock of the process that writes them; keep the hosts of a multi-host set-up on NTP.
"""

from __future__ import annotations

import hashlib
import json
import re
import shutil
import time
import uuid
from datetime import timedelta
from pathlib import Path
from typing import Any, Mapping

from sqlalchemy import and_, insert, select, update
from sqlalchemy.exc import IntegrityError

from service.jobstates import FINAL_STATES, STATES
from service.errors import Busy, Conflict, InvalidData, InvalidSpec, JobTaken, NotFound, StorageFailure
from service.store import artifact, layout
from service.store.catalog import CatalogAccess
from service.store.names import validate_name
from service.store.schema import jobs as jobs_t
from service.store.schema import models as models_t
from service.store.util import iso, row_dict, utcnow

IDEMPOTENCY_KEY_RULE = r"^[\x21-\x7e]{1,255}$"  # printable ASCII without spaces, as HTTP header values go
_KEY_RE = re.compile(IDEMPOTENCY_KEY_RULE)
_ID_RE = re.compile(r"^[0-9a-f]{32}$")
ORPHAN_FOLDER_AGE_S = 3600.0  # a job folder with no job row is left alone this long (a submit in flight)
INCOMING_AGE_S = 24 * 3600.0
RETRY_AFTER_S = 30  # the Retry-After of a refusal because the queue is full
SUBMITTER = "submitted_by"  # request member naming who submitted (key id or client); not part of the request hash


class Jobs:
    """Training jobs in the catalog, and their data folders under ``<store>/_jobs`` (``folder``)."""

    def __init__(self, db: CatalogAccess, folder: Path):
        self._db = db
        self.folder = Path(folder)
        self.incoming_dir = self.folder / ".incoming"
        self.incoming_dir.mkdir(parents=True, exist_ok=True)

    # ------------------------------------------------------------------------------------------------

    @staticmethod
    def _out(r: Any) -> dict[str, Any]:
        d = row_dict(r) if not isinstance(r, Mapping) else dict(r)
        return {
            "id": d["id"],
            "name": d["model_name"],
            "state": d["state"],
            "request": d["request"],
            "data_path": d["data_path"],
            "idempotency_key": d["idempotency_key"],
            "attempts": d["attempts"],
            "worker_id": d["worker_id"],
            "progress": {"done": d["progress_done"], "total": d["progress_total"]},
            "created_at": iso(d["created_at"]),
            "started_at": iso(d["started_at"]),
            "heartbeat_at": iso(d["heartbeat_at"]),
            "finished_at": iso(d["finished_at"]),
            "version": d["version"],
            "problem": d["problem"],
            "decision": d["decision"],
            "live_at_submit": d.get("live_at_submit"),
        }

    def _row(self, conn, job_id: str, *, lock: bool = False) -> Any:
        if not isinstance(job_id, str) or not _ID_RE.fullmatch(job_id):
            raise NotFound(f"training job {job_id!r} does not exist (job ids are 32 hexadecimal characters).")
        q = select(jobs_t).where(jobs_t.c.id == job_id)
        if lock and conn.dialect.name == "postgresql":
            q = q.with_for_update()
        row = conn.execute(q).first()
        if row is None:
            raise NotFound(f"training job {job_id!r} does not exist.")
        return row

    def _drop_folder(self, job_id: str) -> None:
        shutil.rmtree(self.folder / job_id, ignore_errors=True)

    # ------------------------------------------------------------------------------------------------

    def submit(
        self,
        name: str,
        request: dict,
        *,
        data_path: str | Path | None = None,
        idempotency_key: str | None = None,
        queue_limit: int | None = None,
        submitter_limit: int | None = None,
    ) -> tuple[dict[str, Any], bool]:
        """Queue a training job; return ``(job, created)``. With an idempotency key already used for this
        model name, the first job comes back and ``created`` is False (the data file is then dropped).

        ``queue_limit``: refuse (``Busy``) when that many jobs are already queued; ``submitter_limit``: the
        same per ``request["submitted_by"]``. Both are counted in the transaction that inserts the job
        (on SQLite it holds the write lock, so the limits are exact; on PostgreSQL concurrent submissions
        may pass them by a few)."""
        validate_name(name)
        if not isinstance(request, Mapping):
            raise InvalidSpec(f"the training request must be a JSON object, received {type(request).__name__}.")
        problem = artifact._json_problem(request)
        if problem is not None:
            raise InvalidSpec(f"the training request cannot be stored as JSON: {problem}.")
        if idempotency_key is not None and (not isinstance(idempotency_key, str)
                                            or not _KEY_RE.fullmatch(idempotency_key)):
            raise InvalidSpec(
                f"Idempotency-Key {idempotency_key!r} is not allowed; use 1-255 printable ASCII characters "
                "without spaces (a UUID is a good choice).",
                errors=[{"field": "Idempotency-Key", "value": repr(idempotency_key),
                         "message": "1-255 printable ASCII characters"}],
            )
        source: Path | None = None
        hashed = {k: v for k, v in request.items() if k != SUBMITTER}
        h = hashlib.sha256(json.dumps(hashed, sort_keys=True, separators=(",", ":")).encode())
        if data_path is not None:
            source = Path(data_path)
            if not source.is_file():
                raise InvalidData(f"data file {source.name!r} of the training job does not exist or is not a file.")
            h.update(b"\0data\0")
            h.update(artifact.sha256_file(source).encode())
        request_sha = h.hexdigest()

        if idempotency_key is not None:
            existing = self._by_key(name, idempotency_key)
            if existing is not None:
                return self._replay(existing, request_sha, idempotency_key, source)

        job_id = uuid.uuid4().hex
        final_path: Path | None = None
        if source is not None:
            target_dir = self.folder / job_id
            final_path = target_dir / source.name
            try:
                target_dir.mkdir(parents=True)
                layout.write_publishing_marker(target_dir, self._db.catalog_id, job_id)  # until the row commits
                shutil.move(str(source), str(final_path))
            except OSError as exc:  # full or read-only store: a storage problem (507), nothing half-moved
                self._drop_folder(job_id)
                raise StorageFailure(
                    f"the training data could not be moved into the job area of the store folder (TIKHON_STORE) "
                    f"({exc.strerror or type(exc).__name__}); nothing was stored and no job was created. Check "
                    "that the store folder is writable and has free space, then submit again."
                ) from None
        now = utcnow()
        try:
            with self._db.errors(f"submitting a training job for {name!r}"):
                try:
                    with self._db.write() as conn:
                        if idempotency_key is not None:
                            existing = conn.execute(select(jobs_t).where(and_(
                                jobs_t.c.model_name == name, jobs_t.c.idempotency_key == idempotency_key))).first()
                            if existing is not None:
                                raise _Replay(existing)
                        live = conn.execute(select(models_t.c.live_version)
                                            .where(models_t.c.name == name)).scalar()
                        self._check_capacity(conn, queue_limit, request.get(SUBMITTER), submitter_limit)
                        conn.execute(insert(jobs_t).values(
                            live_at_submit={"version": live},
                            id=job_id, model_name=name, state="queued", request=dict(request),
                            request_sha256=request_sha, data_path=str(final_path) if final_path else None,
                            idempotency_key=idempotency_key, attempts=0, worker_id=None, progress_done=0,
                            progress_total=None, created_at=now,
                        ))
                except IntegrityError:
                    # PostgreSQL: a concurrent submit with the same key committed first.
                    existing = self._by_key(name, idempotency_key) if idempotency_key else None
                    if existing is None:
                        raise
                    raise _Replay(existing) from None
        except _Replay as replay:
            self._drop_folder(job_id)
            return self._replay(replay.row, request_sha, idempotency_key, None)
        except BaseException:
            self._drop_folder(job_id)
            raise
        if source is not None:
            layout.clear_markers(self.folder / job_id)
        return self.get(job_id), True

    def _check_capacity(self, conn, queue_limit: int | None, submitter: Any, submitter_limit: int | None) -> None:
        from sqlalchemy import func

        queued = jobs_t.c.state == "queued"
        if queue_limit is not None:
            n = conn.execute(select(func.count()).select_from(jobs_t).where(queued)).scalar() or 0
            if n >= queue_limit:
                raise Busy(
                    f"{n} training jobs are queued, the limit max_queued_jobs={queue_limit}; retry in "
                    f"{RETRY_AFTER_S} s (the Retry-After header), or raise TIKHON_MAX_QUEUED_JOBS on the server.",
                    limit="max_queued_jobs", allowed=queue_limit, received=n + 1, retry_after=RETRY_AFTER_S)
        if submitter_limit is not None and isinstance(submitter, str):
            mine = conn.execute(select(func.count()).select_from(jobs_t).where(and_(
                queued, jobs_t.c.request[SUBMITTER].as_string() == submitter))).scalar() or 0
            if mine >= submitter_limit:
                raise Busy(
                    f"{submitter} already has {mine} training jobs queued, the limit max_queued_jobs_per_key="
                    f"{submitter_limit}; wait until some have started (or cancel some), then retry.",
                    limit="max_queued_jobs_per_key", allowed=submitter_limit, received=mine + 1,
                    retry_after=RETRY_AFTER_S)

    def check_capacity(self, *, queue_limit: int | None = None, submitter: str | None = None,
                       submitter_limit: int | None = None) -> None:
        """Raise ``Busy`` when a job submitted now would exceed the queue limits (a cheap early check;
        ``submit`` checks again in its own transaction)."""
        with self._db.errors("counting queued training jobs"), self._db.read() as conn:
            self._check_capacity(conn, queue_limit, submitter, submitter_limit)

    def _by_key(self, name: str, key: str) -> Any:
        with self._db.errors("reading a training job"), self._db.read() as conn:
            return conn.execute(select(jobs_t).where(and_(
                jobs_t.c.model_name == name, jobs_t.c.idempotency_key == key))).first()

    def _replay(self, row: Any, request_sha: str, key: str, source: Path | None) -> tuple[dict[str, Any], bool]:
        if row.request_sha256 != request_sha:
            raise Conflict(
                f"Idempotency-Key {key!r} was already used for training job {row.id} of model "
                f"{row.model_name!r} with a different request or data; send a new key for a new job."
            )
        if source is not None:
            source.unlink(missing_ok=True)
        return self._out(row), False

    def get(self, job_id: str) -> dict[str, Any]:
        with self._db.errors("reading a training job"), self._db.read() as conn:
            return self._out(self._row(conn, job_id))

    def list(self, name: str | None = None, *, state: str | None = None, limit: int = 100) -> list[dict[str, Any]]:
        """Jobs, newest first (of one model name and/or one state when given)."""
        q = select(jobs_t).order_by(jobs_t.c.created_at.desc(), jobs_t.c.id.desc()).limit(max(1, int(limit)))
        if name is not None:
            validate_name(name)
            q = q.where(jobs_t.c.model_name == name)
        if state is not None:
            if state not in STATES:
                raise InvalidSpec(f"job state {state!r} is unknown; use one of {', '.join(STATES)}.")
            q = q.where(jobs_t.c.state == state)
        with self._db.errors("listing training jobs"), self._db.read() as conn:
            return [self._out(r) for r in conn.execute(q).all()]

    def counts(self) -> dict[str, int]:
        """How many jobs are in each state (all states present, zeros included), e.g. for metrics."""
        from sqlalchemy import func

        with self._db.errors("counting training jobs"), self._db.read() as conn:
            found = dict(conn.execute(select(jobs_t.c.state, func.count()).group_by(jobs_t.c.state)).all())
        return {state: int(found.get(state, 0)) for state in STATES}

    # ------------------------------------------------------------------------------------------------
    # worker side

    def claim(self, worker_id: str) -> dict[str, Any] | None:
        """Take the oldest queued job for ``worker_id`` (state → running, attempts + 1), or None."""
        _check_worker(worker_id)
        with self._db.errors("claiming a training job"), self._db.write() as conn:
            q = (select(jobs_t.c.id).where(jobs_t.c.state == "queued")
                 .order_by(jobs_t.c.created_at, jobs_t.c.id).limit(1))
            if conn.dialect.name == "postgresql":
                q = q.with_for_update(skip_locked=True)
            job_id = conn.execute(q).scalar()
            if job_id is None:
                return None
            now = utcnow()
            conn.execute(update(jobs_t).where(and_(jobs_t.c.id == job_id, jobs_t.c.state == "queued")).values(
                state="running", worker_id=worker_id, attempts=jobs_t.c.attempts + 1, started_at=now,
                heartbeat_at=now, progress_done=0, progress_total=None))
            return self._out(self._row(conn, job_id))

    def heartbeat(self, job_id: str, worker_id: str, progress: Any = None) -> str:
        """Record that ``worker_id`` still works on the job (and its progress); return the job's state."""
        _check_worker(worker_id)
        done, total = _progress(progress)
        values: dict[str, Any] = {"heartbeat_at": utcnow()}
        if done is not None:
            values["progress_done"] = done
        if total is not None:
            values["progress_total"] = total
        with self._db.errors("recording a heartbeat"), self._db.write() as conn:
            res = conn.execute(update(jobs_t).where(and_(
                jobs_t.c.id == job_id, jobs_t.c.state == "running", jobs_t.c.worker_id == worker_id)).values(**values))
            if res.rowcount == 1:
                return "running"
            row = self._row(conn, job_id)
            if row.state == "cancelled" and row.worker_id == worker_id:
                return "cancelled"
            raise Conflict(
                f"training job {job_id} is no longer held by worker {worker_id!r} (state {row.state}, "
                f"worker {row.worker_id!r}); its heartbeat came too late or it was re-queued; drop this work."
            )

    def finish(
        self,
        job_id: str,
        worker_id: str,
        state: str,
        *,
        version: int | None = None,
        problem: dict | None = None,
        decision: dict | None = None,
    ) -> dict[str, Any]:
        """End a running job held by ``worker_id`` with ``state`` (succeeded, failed or cancelled)."""
        _check_worker(worker_id)
        if state not in FINAL_STATES:
            raise InvalidSpec(f"a job finishes as succeeded, failed or cancelled, not {state!r}.")
        for label, value in (("problem", problem), ("decision", decision)):
            if value is not None and (p := artifact._json_problem(value)) is not None:
                raise InvalidSpec(f"the job's {label} cannot be stored as JSON: {p}.")
        now = utcnow()
        with self._db.errors("finishing a training job"), self._db.write() as conn:
            row = self._row(conn, job_id, lock=True)
            extra = {k: v for k, v in (("version", version), ("problem", problem), ("decision", decision))
                     if v is not None}
            if row.state == "cancelled" and row.worker_id == worker_id:
                if extra:  # keep the state, record what the worker brings (e.g. a version it published)
                    conn.execute(update(jobs_t).where(jobs_t.c.id == job_id).values(**extra))
            elif row.state != "running" or row.worker_id != worker_id:
                raise Conflict(
                    f"training job {job_id} is not running under worker {worker_id!r} (state {row.state}, "
                    f"worker {row.worker_id!r}); its result is not recorded."
                )
            else:
                conn.execute(update(jobs_t).where(jobs_t.c.id == job_id).values(
                    state=state, finished_at=now, heartbeat_at=now, **extra))
            out = self._out(self._row(conn, job_id))
        self._drop_folder(job_id)
        return out

    def check_holder(self, conn, job_id: str, worker_id: str, name: str) -> None:
        """Inside a publish's transaction: raise ``Conflict`` unless ``worker_id`` still holds job ``job_id``
        (running, or cancelled while it ran) and the job has no version of ``name`` yet. The job row is
        locked (PostgreSQL: ``FOR UPDATE``, which ``requeue_stale`` skips; SQLite: the write transaction) until
        the publish commits."""
        from service.store.schema import versions as versions_t

        row = self._row(conn, job_id, lock=True)
        if row.state not in ("running", "cancelled") or row.worker_id != worker_id:
            raise JobTaken(
                f"training job {job_id} is no longer held by worker {worker_id!r} (state {row.state}, worker "
                f"{row.worker_id!r}); it was re-queued, so this worker does not publish its result."
            )
        done = conn.execute(select(versions_t.c.version).where(and_(
            versions_t.c.model_name == name, versions_t.c.job_id == job_id,
            versions_t.c.deleted_at.is_(None)))).scalar()
        if done is not None:
            raise JobTaken(f"training job {job_id} already published version {done} of {name!r}; a job publishes once.")

    def cancel(self, job_id: str) -> dict[str, Any]:
        """Cancel a queued or running job (a running one stops at its worker's next heartbeat)."""
        with self._db.errors("cancelling a training job"), self._db.write() as conn:
            row = self._row(conn, job_id, lock=True)
            if row.state in ("succeeded", "failed"):
                raise Conflict(f"training job {job_id} already {row.state} at {iso(row.finished_at)}; "
                               "there is nothing to cancel.")
            if row.state != "cancelled":
                conn.execute(update(jobs_t).where(jobs_t.c.id == job_id).values(
                    state="cancelled", finished_at=utcnow()))
            out = self._out(self._row(conn, job_id))
        if row.state == "queued":
            self._drop_folder(job_id)
        return out

    def requeue_stale(self, stale_s: float, max_attempts: int, *, caller: str | None = None) -> list[dict[str, Any]]:
        """Re-queue running jobs whose last heartbeat is older than ``stale_s`` seconds; fail those that
        already had ``max_attempts`` claims. Returns the jobs changed (in their new state). ``caller``: the
        worker asking; its own jobs are left alone (it is alive, so they are not a dead worker's)."""
        cutoff = utcnow() - timedelta(seconds=float(stale_s))
        changed: list[str] = []
        failed: list[str] = []
        stale = and_(jobs_t.c.state == "running", jobs_t.c.heartbeat_at < cutoff)
        if caller is not None:
            stale = and_(stale, jobs_t.c.worker_id != caller)
        # Every worker calls this every few seconds: look before taking the write lock (SQLite has one).
        with self._db.errors("looking for stale training jobs"), self._db.read() as conn:
            if conn.execute(select(jobs_t.c.id).where(stale).limit(1)).first() is None:
                return []
        with self._db.errors("re-queueing stale training jobs"), self._db.write() as conn:
            q = select(jobs_t).where(stale)
            if conn.dialect.name == "postgresql":
                q = q.with_for_update(skip_locked=True)
            now = utcnow()
            for row in conn.execute(q).all():
                if row.attempts >= max_attempts:
                    detail = (
                        f"training job {row.id} was claimed {row.attempts} times and each time its worker stopped "
                        f"sending heartbeats (last worker {row.worker_id!r}, last heartbeat {iso(row.heartbeat_at)}); "
                        f"it is not retried again. Check the worker logs (memory, time limits) and submit again."
                    )
                    conn.execute(update(jobs_t).where(jobs_t.c.id == row.id).values(
                        state="failed", finished_at=now,
                        problem={"type": "worker-lost", "title": "Training worker lost", "detail": detail,
                                 "attempts": row.attempts}))
                    failed.append(row.id)
                else:
                    conn.execute(update(jobs_t).where(jobs_t.c.id == row.id).values(
                        state="queued", worker_id=None, heartbeat_at=None, started_at=None,
                        progress_done=0, progress_total=None))
                changed.append(row.id)
            out = [self._out(self._row(conn, j)) for j in changed]
        for j in failed:
            self._drop_folder(j)
        return out

    # ------------------------------------------------------------------------------------------------

    def sweep_folders(self) -> int:
        """Remove data folders of jobs this catalog lists as finished, folders of submits into this catalog
        that never committed (a ``.publishing`` marker naming it, older than an hour), and stale uploads.
        A folder of a job the catalog does not know otherwise is kept and reported in ``kept_folders``."""
        removed = 0
        self.kept_folders: list[str] = []
        now = time.time()
        candidates = {p.name: p for p in self.folder.iterdir() if p.is_dir() and _ID_RE.fullmatch(p.name)}
        if candidates:
            with self._db.errors("sweeping job folders"), self._db.read() as conn:
                states = dict(conn.execute(select(jobs_t.c.id, jobs_t.c.state)
                                           .where(jobs_t.c.id.in_(list(candidates)))).all())
            for job_id, path in candidates.items():
                st = states.get(job_id)
                if st is None:
                    if layout.marker_catalog(path, layout.PUBLISHING_MARKER) != self._db.catalog_id:
                        self.kept_folders.append(f"{layout.JOBS_DIR}/{job_id}")
                        continue
                    if now - _mtime(path) <= ORPHAN_FOLDER_AGE_S:
                        continue  # a submit in flight
                elif st not in FINAL_STATES:
                    continue
                shutil.rmtree(path, ignore_errors=True)
                removed += 1
        for p in self.incoming_dir.iterdir():
            if now - _mtime(p) > INCOMING_AGE_S:
                shutil.rmtree(p, ignore_errors=True) if p.is_dir() else p.unlink(missing_ok=True)
                removed += 1
        return removed


class _Replay(Exception):
    def __init__(self, row: Any):
        self.row = row


def _mtime(p: Path) -> float:
    try:
        return p.stat().st_mtime
    except FileNotFoundError:
        return time.time()


def _check_worker(worker_id: Any) -> None:
    if not isinstance(worker_id, str) or not 0 < len(worker_id) <= 200:
        raise InvalidSpec(f"worker_id must be a string of 1-200 characters, received {worker_id!r}.")


def _progress(progress: Any) -> tuple[int | None, int | None]:
    if progress is None:
        return None, None
    if isinstance(progress, Mapping):
        done, total = progress.get("done"), progress.get("total")
    else:
        try:
            done, total = progress
        except (TypeError, ValueError):
            raise InvalidSpec(f"progress must be (done, total) or {{'done': ..., 'total': ...}}, "
                              f"received {progress!r}.") from None
    return (None if done is None else int(done)), (None if total is None else int(total))

"""Durable batch jobs: their state in SQLite in the data directory, and the worker threads that run them.

A job moves queued -> running -> succeeded | failed, or to cancelled from queued or running. Its result is
written to ``<id>.<format>.partial`` and renamed when complete, so a partial result is never served as
finished. A server killed in the middle of a job puts that job back in the queue when it starts again; the
run is deterministic, so the re-run gives the same bytes as an uninterrupted one.

Each job belongs to the owner of the token that submitted it (CONTRACTS.md "Tokens and owners"): only its
owner, or an admin, sees, fetches or cancels it, and Idempotency-Keys are scoped per owner. A full disk never
stops a worker: the job fails with a 507 problem document, its partial files are removed, and new jobs are
refused while the data directory stays below ``min_free_bytes``.
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import pickle
import shutil
import sqlite3
import threading
import time
import uuid
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any, BinaryIO

from service.encode.formats import SUFFIXES
from service.errors import (
    JobNotFoundError,
    JobStateError,
    RequestError,
    RunCancelledError,
    StorageFullError,
    problem_for,
    storage_full,
)
from service.memory import release_memory

if TYPE_CHECKING:
    from service.prepared import Prepared
    from service.registry import StoreRegistry
    from service.schemas import IndicatorRequest
    from service.settings import Settings

log = logging.getLogger("wxshock.jobs")

STATES = ("queued", "running", "succeeded", "failed", "cancelled")
FINISHED_STATES = frozenset({"succeeded", "failed", "cancelled"})
# A job that was running when the server stopped this many times is failed instead of re-queued, so that a
# request that brings the server down cannot keep bringing it down.
MAX_ATTEMPTS = 3

_SCHEMA = """
CREATE TABLE IF NOT EXISTS jobs (
    id TEXT PRIMARY KEY,
    state TEXT NOT NULL,
    dataset TEXT NOT NULL,
    format TEXT NOT NULL,
    request TEXT NOT NULL,
    request_hash TEXT NOT NULL,
    idempotency_key TEXT UNIQUE,
    features_total INTEGER NOT NULL,
    features_done INTEGER NOT NULL DEFAULT 0,
    created_at REAL NOT NULL,
    started_at REAL,
    finished_at REAL,
    attempts INTEGER NOT NULL DEFAULT 0,
    error TEXT,
    result_file TEXT,
    media_type TEXT,
    headers TEXT
);
CREATE INDEX IF NOT EXISTS jobs_state ON jobs (state, created_at);
"""
# Schema changes after the first, applied in order to older databases (PRAGMA user_version counts them).
_MIGRATIONS = (
    # 1: owners and skipped features. Jobs from before owners have owner '' (visible to admins only).
    """
    ALTER TABLE jobs ADD COLUMN owner TEXT NOT NULL DEFAULT '';
    ALTER TABLE jobs ADD COLUMN skipped TEXT;
    CREATE INDEX IF NOT EXISTS jobs_owner ON jobs (owner, created_at);
    """,
)
_COLUMNS = (
    "id, state, dataset, format, request_hash, idempotency_key, features_total, features_done, created_at, "
    "started_at, finished_at, attempts, error, result_file, media_type, headers, owner, skipped"
)


@dataclass(frozen=True)
class Principal:
    """Who asks: the owner of a bearer token (a user or project name), and whether it is an admin."""

    owner: str
    admin: bool = False

    def sees(self, job: Job) -> bool:
        """Whether this caller may see, fetch or cancel ``job``: its owner, or an admin."""
        return self.admin or job.owner == self.owner


# With no token configured the server has one user, who sees every job.
ANONYMOUS = Principal("anonymous", admin=True)


@dataclass(frozen=True)
class Job:
    """One job's record (without its request body)."""

    id: str
    state: str
    dataset: str
    format: str
    request_hash: str
    idempotency_key: str | None
    features_total: int
    features_done: int
    created_at: float
    started_at: float | None
    finished_at: float | None
    attempts: int
    error: dict[str, Any] | None
    result_file: str | None
    media_type: str | None
    headers: dict[str, str] = field(default_factory=dict)
    owner: str = ANONYMOUS.owner
    skipped: list[dict[str, Any]] = field(default_factory=list)

    @classmethod
    def from_row(cls, row: tuple[Any, ...]) -> Job:
        """A Job from a row selected with _COLUMNS."""
        values = list(row)
        values[12] = json.loads(values[12]) if values[12] else None
        values[15] = json.loads(values[15]) if values[15] else {}
        values[17] = json.loads(values[17]) if values[17] else []
        return cls(*values)

    def seconds_left(self, now: float | None = None) -> float | None:
        """Estimated seconds until a running job finishes (from its pace so far); 0 when finished."""
        if self.state in FINISHED_STATES:
            return 0.0
        if self.state != "running" or self.started_at is None or self.features_done <= 0:
            return None
        elapsed = max((now or time.time()) - self.started_at, 0.0)
        return elapsed / self.features_done * max(self.features_total - self.features_done, 0)


def request_digest(request_json: str, fmt: str) -> str:
    """SHA-256 of a job's request text (canonical JSON, see service.request_text) and output format."""
    digest = hashlib.sha256(f"{fmt}\n".encode())
    digest.update(request_json.encode("utf-8"))
    return digest.hexdigest()


def scoped_key(owner: str, key: str | None) -> str | None:
    """An Idempotency-Key as stored: scoped to its owner, so that owners never meet each other's keys."""
    return None if key is None else f"{owner}\x1f{key}"


def feature_count(request: IndicatorRequest) -> int:
    """How many features a request sends (a single Feature counts one)."""
    return len(getattr(request.features, "features", None) or [request.features])


class JobDatabase:
    """The jobs table in SQLite; every method is one short transaction, safe from any thread."""

    def __init__(self, path: Path) -> None:
        path.parent.mkdir(parents=True, exist_ok=True)
        self._lock = threading.Lock()
        self._connection = sqlite3.connect(path, timeout=30, isolation_level=None, check_same_thread=False)
        with self._lock:
            self._connection.execute("PRAGMA journal_mode=WAL")
            self._connection.execute("PRAGMA synchronous=FULL")
            self._connection.executescript(_SCHEMA)
            version = int(self._connection.execute("PRAGMA user_version").fetchone()[0])
            for number, script in enumerate(_MIGRATIONS[version:], start=version + 1):
                self._connection.executescript(f"BEGIN; {script} PRAGMA user_version = {number}; COMMIT;")

    @contextmanager
    def _transaction(self) -> Iterator[sqlite3.Connection]:
        """The connection inside BEGIN IMMEDIATE ... COMMIT (rolled back on error).

        A full disk can make the COMMIT fail and SQLite roll back by itself; the ROLLBACK is then only tried,
        so the error raised is always the one that happened (a failed ROLLBACK once killed the worker).
        """
        with self._lock:
            self._connection.execute("BEGIN IMMEDIATE")
            try:
                yield self._connection
                self._connection.execute("COMMIT")
            except BaseException:
                if self._connection.in_transaction:
                    try:
                        self._connection.execute("ROLLBACK")
                    except sqlite3.Error:
                        log.warning("ROLLBACK failed after an error; the connection is reset by SQLite")
                raise

    def close(self) -> None:
        """Close the connection."""
        with self._lock:
            self._connection.close()

    def insert(self, job: Job, request_json: str) -> Job:
        """Record a new queued job, or return the job already recorded under its (owner-scoped) key."""
        with self._transaction() as db:
            if job.idempotency_key is not None:
                row = db.execute(
                    f"SELECT {_COLUMNS} FROM jobs WHERE idempotency_key = ?", (job.idempotency_key,)
                ).fetchone()
                if row is not None:
                    return Job.from_row(row)
            db.execute(
                "INSERT INTO jobs (id, state, dataset, format, request, request_hash, idempotency_key, "
                "features_total, created_at, owner, skipped) VALUES (?, 'queued', ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                (
                    job.id,
                    job.dataset,
                    job.format,
                    request_json,
                    job.request_hash,
                    job.idempotency_key,
                    job.features_total,
                    job.created_at,
                    job.owner,
                    json.dumps(job.skipped) if job.skipped else None,
                ),
            )
        return job

    def list_jobs(self, owner: str | None, state: str | None, limit: int) -> list[Job]:
        """Jobs newest first: of one owner (None: every owner), in one state (None: any), at most ``limit``."""
        where, values = [], []
        if owner is not None:
            where.append("owner = ?")
            values.append(owner)
        if state is not None:
            where.append("state = ?")
            values.append(state)
        clause = f"WHERE {' AND '.join(where)} " if where else ""
        with self._lock:
            rows = self._connection.execute(
                f"SELECT {_COLUMNS} FROM jobs {clause}ORDER BY created_at DESC, rowid DESC LIMIT ?",
                (*values, limit),
            ).fetchall()
        return [Job.from_row(r) for r in rows]

    def get(self, job_id: str) -> Job | None:
        """The job of that id, or None."""
        with self._lock:
            row = self._connection.execute(f"SELECT {_COLUMNS} FROM jobs WHERE id = ?", (job_id,)).fetchone()
        return Job.from_row(row) if row else None

    def request_of(self, job_id: str) -> str:
        """The request JSON a job was submitted with."""
        with self._lock:
            row = self._connection.execute("SELECT request FROM jobs WHERE id = ?", (job_id,)).fetchone()
        if row is None:
            raise JobNotFoundError(f"no job {job_id!r}")
        return str(row[0])

    def claim_next(self, now: float) -> Job | None:
        """Move the oldest queued job to running and return it (None when the queue is empty)."""
        with self._transaction() as db:
            row = db.execute(
                f"SELECT {_COLUMNS} FROM jobs WHERE state = 'queued' ORDER BY created_at, rowid LIMIT 1"
            ).fetchone()
            if row is None:
                return None
            job_id = row[0]
            db.execute(
                "UPDATE jobs SET state = 'running', started_at = ?, features_done = 0, attempts = attempts + 1 "
                "WHERE id = ?",
                (now, job_id),
            )
            row = db.execute(f"SELECT {_COLUMNS} FROM jobs WHERE id = ?", (job_id,)).fetchone()
        return Job.from_row(row)

    def progress(self, job_id: str, done: int, total: int) -> None:
        """Record features done and total of a running job."""
        with self._transaction() as db:
            db.execute(
                "UPDATE jobs SET features_done = ?, features_total = ? WHERE id = ? AND state = 'running'",
                (done, total, job_id),
            )

    def finish(
        self,
        job_id: str,
        state: str,
        now: float,
        *,
        error: dict[str, Any] | None = None,
        result_file: str | None = None,
        media_type: str | None = None,
        headers: dict[str, str] | None = None,
    ) -> bool:
        """Move a running job to a finished state; False when it was no longer running (cancelled meanwhile)."""
        with self._transaction() as db:
            cursor = db.execute(
                "UPDATE jobs SET state = ?, finished_at = ?, error = ?, result_file = ?, media_type = ?, "
                "headers = ?, features_done = CASE WHEN ? = 'succeeded' THEN features_total ELSE features_done END "
                "WHERE id = ? AND state = 'running'",
                (
                    state,
                    now,
                    json.dumps(error) if error else None,
                    result_file,
                    media_type,
                    json.dumps(headers) if headers else None,
                    state,
                    job_id,
                ),
            )
            return cursor.rowcount == 1

    def cancel(self, job_id: str, now: float) -> Job | None:
        """Mark a queued or running job cancelled; returns the job as it is afterwards (None: no such job)."""
        with self._transaction() as db:
            db.execute(
                "UPDATE jobs SET state = 'cancelled', finished_at = ? WHERE id = ? AND state IN ('queued', 'running')",
                (now, job_id),
            )
            row = db.execute(f"SELECT {_COLUMNS} FROM jobs WHERE id = ?", (job_id,)).fetchone()
        return Job.from_row(row) if row else None

    def requeue_interrupted(self, now: float) -> tuple[int, int]:
        """Put jobs left running by a stopped server back in the queue; fail those tried MAX_ATTEMPTS times."""
        _, problem = problem_for(
            JobStateError(
                f"the server stopped {MAX_ATTEMPTS} times while running this job; it was not tried again"
            )
        )
        with self._transaction() as db:
            failed = db.execute(
                "UPDATE jobs SET state = 'failed', finished_at = ?, error = ? WHERE state = 'running' "
                "AND attempts >= ?",
                (now, json.dumps(problem), MAX_ATTEMPTS),
            ).rowcount
            requeued = db.execute(
                "UPDATE jobs SET state = 'queued', started_at = NULL, features_done = 0 WHERE state = 'running'"
            ).rowcount
        return requeued, failed

    def requeue(self, job_id: str) -> bool:
        """Put a running job back in the queue (to be tried again); False when it is no longer running."""
        with self._transaction() as db:
            cursor = db.execute(
                "UPDATE jobs SET state = 'queued', started_at = NULL, features_done = 0 "
                "WHERE id = ? AND state = 'running'",
                (job_id,),
            )
            return cursor.rowcount == 1

    def expired(self, before: float) -> list[Job]:
        """Finished jobs that finished before ``before`` (seconds since the epoch)."""
        with self._lock:
            rows = self._connection.execute(
                f"SELECT {_COLUMNS} FROM jobs WHERE state IN ('succeeded', 'failed', 'cancelled') "
                "AND finished_at < ?",
                (before,),
            ).fetchall()
        return [Job.from_row(r) for r in rows]

    def delete(self, job_id: str) -> None:
        """Remove a job's record."""
        with self._transaction() as db:
            db.execute("DELETE FROM jobs WHERE id = ?", (job_id,))

    def count(self, state: str) -> int:
        """How many jobs are in ``state``."""
        with self._lock:
            return int(
                self._connection.execute("SELECT COUNT(*) FROM jobs WHERE state = ?", (state,)).fetchone()[0]
            )


RunJob = Callable[..., tuple[bytes, str, dict[str, str]]]


def run_with_pipeline(
    request: IndicatorRequest,
    registry: StoreRegistry,
    settings: Settings,
    fmt: str,
    *,
    progress: Callable[[int, int], None],
    cancelled: Callable[[], bool],
    prepared: Prepared | None = None,
) -> tuple[bytes, str, dict[str, str]]:
    """Compute a job's table with the pipeline (reusing the submission's weights) and encode it."""
    from service import encode, pipeline

    store = registry.get_dataset(request.dataset)
    result = pipeline.run(
        request,
        store,
        settings,
        progress=progress,
        cancelled=cancelled,
        invalid_features=JOB_INVALID_FEATURES,
        prepared=prepared,
        stores=registry,  # variants may name other datasets
    )
    return encode.encode(result, fmt)


def write_pieces(handle: BinaryIO, fmt: str, table: Any, staging: Path) -> None:
    """Write a table computed in pieces (pipeline.run_in_pieces) to ``handle`` in ``fmt``, piece by piece: the
    streamed formats through service.encode.stream, Stata through stata_pieces, the bundle entry by entry
    (each entry staged under ``staging``); the bytes of the whole-table encoders."""
    from service.encode import stable_frame
    from service.encode.bundle import write_bundle
    from service.encode.stata import stata_pieces
    from service.encode.stream import stream

    frames = table.frames

    def stable() -> Iterator[Any]:
        return (stable_frame(frame) for frame in frames)

    if fmt == "bundle":
        write_bundle(handle, stable, table.columns, table.provenance, table.warnings, staging)
        return
    parts = (
        stata_pieces(stable, table.columns, table.provenance)
        if fmt == "dta"
        else stream(frames, table.columns, table.provenance, table.warnings, fmt)
    )
    for data in parts:
        handle.write(data)


def run_to_file(
    request: IndicatorRequest,
    registry: StoreRegistry,
    settings: Settings,
    fmt: str,
    path: Path,
    *,
    progress: Callable[[int, int], None],
    cancelled: Callable[[], bool],
    prepared: Prepared | None = None,
) -> tuple[int, str, dict[str, str]] | None:
    """Compute a job's table batch by batch and write it to ``path`` as it comes: (bytes, media type,
    headers), or None where the table is made whole (events, variants: run_with_pipeline).

    Memory stays flat in the number of features: each batch's rows wait in a spill directory beside ``path``
    until they are encoded in request order (pipeline.run_in_pieces; service.encode.stream, the Stata writer
    and the bundle piece by piece). The bytes are those of run_with_pipeline in every format.
    :func:`plan_to_file` then :func:`write_planned`, for a caller that lets the request go in between.
    """
    planned = plan_to_file(
        request, registry, settings, fmt, progress=progress, cancelled=cancelled, prepared=prepared
    )
    return None if planned is None else write_planned(planned, fmt, path)


def plan_to_file(
    request: IndicatorRequest,
    registry: StoreRegistry,
    settings: Settings,
    fmt: str,
    *,
    progress: Callable[[int, int], None],
    cancelled: Callable[[], bool],
    prepared: Prepared | None = None,
) -> Any:
    """The first half of :func:`run_to_file`: the job's batches planned (pipeline.plan_in_pieces), holding
    nothing of the request's features but their ids and properties; None where the table is made whole."""
    from service import pipeline
    from service.encode.stream import STREAMED_FORMATS

    if fmt not in (*STREAMED_FORMATS, "dta", "bundle") or request.variants or request.events is not None:
        return None
    return pipeline.plan_in_pieces(
        request,
        registry.get_dataset(request.dataset),
        settings,
        progress=progress,
        cancelled=cancelled,
        invalid_features=JOB_INVALID_FEATURES,
        prepared=prepared,
        # one pass over many chunks: kept in the decoded-tile cache they would fill it (192 MB of a server's
        # memory) and push out the chunks on-demand requests reuse
        cached=False,
        **job_batches(settings),
    )


def write_planned(planned: Any, fmt: str, path: Path) -> tuple[int, str, dict[str, str]]:
    """The second half of :func:`run_to_file`: compute the planned batches and write the table to ``path``."""
    import shutil

    from service import pipeline
    from service.encode import FORMATS, provenance_headers

    spill = path.with_name(path.name + ".spill")
    partial = path.with_name(path.name + ".partial")
    try:
        table = pipeline.spill_pieces(planned, spill / "rows")
        with open(partial, "wb") as handle:
            write_pieces(handle, fmt, table, spill / "entries")
            handle.flush()
            os.fsync(handle.fileno())
        size = partial.stat().st_size
        os.replace(partial, path)
    except BaseException:
        partial.unlink(missing_ok=True)
        raise
    finally:
        shutil.rmtree(spill, ignore_errors=True)
    headers = provenance_headers(table.provenance)
    if fmt in ("dta", "bundle"):  # as service.encode.encode names a file a browser should save
        from service.encode import download_name

        headers["Content-Disposition"] = f'attachment; filename="{download_name(table.provenance, fmt)}"'
    return size, FORMATS[fmt], headers


def job_batches(settings: Settings) -> dict[str, int]:
    """How a job's feature batches are bounded on local threads: their daily means (bytes) and how many run at
    once; nothing on a cluster, where the batches' means stay on the workers and only tables come back.

    A 1,000-feature batch of 48 years holds 420 MB of means and about as much again in partial sums and the
    table's season cubes; two of them in flight held a server at 2.3 GB. One batch of 64 MB of means (159
    features of 48 years) at a time: 672 MB in process, for 19 % more CPU (bench/RESULTS.md, "A job's memory").
    """
    if (settings.scheduler or "").strip():
        return {}
    return {
        "series_bytes": settings.job_batch_series_mb << 20,
        "in_flight": settings.job_batches_in_flight,
    }


# What a job does with a feature that cannot be computed when the request does not say (CONTRACTS.md): a
# batch that loses 0.1 % of its features should not lose the other 99.9 %.
JOB_INVALID_FEATURES = "skip"


@dataclass(frozen=True)
class _Unrecorded:
    """A job's end that the database could not take (full disk): kept here and written when it can be."""

    state: str
    finished_at: float
    error: dict[str, Any] | None = None
    result_file: str | None = None
    media_type: str | None = None
    headers: dict[str, str] | None = None


class JobRunner:
    """Accepts jobs, runs them on worker threads (never on the event loop) and serves their state and results."""

    def __init__(
        self,
        settings: Settings,
        registry: StoreRegistry,
        *,
        run_job: RunJob = run_with_pipeline,
        poll_seconds: float = 0.5,
        retry_seconds: float = 5.0,
        clean_up_seconds: float = 600.0,
    ) -> None:
        self.settings = settings
        self.registry = registry
        self.directory = Path(settings.data_dir) / "jobs"
        self.results = self.directory / "results"
        self.prepared = self.directory / "prepared"
        self.results.mkdir(parents=True, exist_ok=True)
        self.prepared.mkdir(parents=True, exist_ok=True)
        self.db = JobDatabase(self.directory / "jobs.sqlite")
        self._run_job = run_job
        self._poll_seconds = poll_seconds
        self._retry_seconds = retry_seconds
        self._clean_up_seconds = clean_up_seconds
        self._wake = threading.Event()
        self._stop = threading.Event()
        self._threads: list[threading.Thread] = []
        self._cancelled: set[str] = set()
        self._unrecorded: dict[str, _Unrecorded] = {}
        self._unrecorded_lock = threading.Lock()
        self._last_clean_up = 0.0
        self._clean_up_lock = threading.Lock()

    # --- lifecycle ------------------------------------------------------------------------------------------

    def start(self) -> None:
        """Re-queue jobs interrupted by a stop, clear partial files, and start the worker threads."""
        requeued, failed = self.db.requeue_interrupted(time.time())
        if requeued or failed:
            log.warning("re-queued %d interrupted job(s); failed %d tried too often", requeued, failed)
        for directory in (self.results, self.prepared):
            for partial in directory.glob("*.partial"):
                partial.unlink(missing_ok=True)
        self.clean_up()
        for index in range(self.settings.job_workers):
            thread = threading.Thread(target=self._work, name=f"wxshock-job-worker-{index}", daemon=True)
            thread.start()
            self._threads.append(thread)

    def stop(self, timeout: float = 5.0) -> None:
        """Ask the workers to stop after their current job and wait a little for them."""
        self._stop.set()
        self._wake.set()
        for thread in self._threads:
            thread.join(timeout)
        self._threads = [t for t in self._threads if t.is_alive()]
        if not self._threads:
            self.db.close()

    @property
    def alive(self) -> bool:
        """True while every worker thread runs."""
        return bool(self._threads) and all(t.is_alive() for t in self._threads) and not self._stop.is_set()

    # --- the API's operations -------------------------------------------------------------------------------

    def check_space(self) -> None:
        """Refuse new work (507) while the data directory has less free space than min_free_bytes."""
        try:
            free = shutil.disk_usage(self.directory).free
        except OSError:
            return
        if free < self.settings.min_free_bytes:
            raise StorageFullError(
                f"the server's data directory has {free / 1e6:.1f} MB free, less than the "
                f"{self.settings.min_free_bytes / 1e6:.1f} MB it keeps for job records and results (setting "
                "min_free_bytes); no new job is accepted until its administrator frees space; try again later",
                limit="min_free_bytes",
            )

    def submit(
        self,
        request: IndicatorRequest,
        fmt: str,
        idempotency_key: str | None = None,
        *,
        owner: str = ANONYMOUS.owner,
        prepared: Prepared | None = None,
    ) -> tuple[Job, bool]:
        """Queue a job for ``owner``; returns (job, created). A repeated Idempotency-Key returns the first job.

        ``prepared`` (the checks' weights and skipped features, from check_job_request) is kept for the run.
        """
        from service import request_text

        self.check_space()
        # Only the fields the user gave: resolution tells "not given" from "given as the default" (the default
        # pair, for one), so the stored request must re-validate to exactly the request that was sent. Written
        # feature by feature (a single call over a large request holds every other thread up).
        request_json = request_text.canonical_text(request, exclude_unset=True)
        digest = request_digest(request_json, fmt)
        job = Job(
            id=uuid.uuid4().hex,
            state="queued",
            dataset=self.registry.get_dataset(request.dataset).name,
            format=fmt,
            request_hash=digest,
            idempotency_key=scoped_key(owner, idempotency_key),
            features_total=feature_count(request),
            features_done=0,
            created_at=time.time(),
            started_at=None,
            finished_at=None,
            attempts=0,
            error=None,
            result_file=None,
            media_type=None,
            owner=owner,
            skipped=list(prepared.skipped) if prepared is not None else [],
        )
        if prepared is not None:
            self._save_prepared(job.id, prepared)
        try:
            recorded = self.db.insert(job, request_json)
        except sqlite3.Error as exc:
            self._prepared_path(job.id).unlink(missing_ok=True)
            raise storage_full(exc) or exc from None
        if recorded.id != job.id:
            self._prepared_path(job.id).unlink(missing_ok=True)
            if recorded.request_hash != digest:
                # The key is the caller's own (keys are scoped per owner), so naming the job is safe.
                raise RequestError(
                    f"Idempotency-Key {idempotency_key!r} was already used for a different request (your job "
                    f"{recorded.id}); send a new key for a new request",
                    field="Idempotency-Key",
                )
        else:
            self._wake.set()
        return self._overlaid(recorded), recorded.id == job.id

    def status(self, job_id: str, caller: Principal = ANONYMOUS) -> Job:
        """The job's current record, or JobNotFoundError (also for a job the caller may not see, or expired)."""
        job = self.db.get(job_id)
        if job is not None and self._expired(job):
            self._remove(job)
            job = None
        if job is None or not caller.sees(job):
            # Another owner's job is answered exactly like a job that does not exist.
            raise JobNotFoundError(
                f"no job {job_id[:64]!r}{'' if caller.admin else ' of yours'}: it was never submitted, or it "
                f"finished more than {self.settings.job_retention_hours:g} hours ago and was removed",
                field="job_id",
            )
        return self._overlaid(job)

    def list_jobs(self, caller: Principal, *, state: str | None = None, limit: int = 100) -> list[Job]:
        """The caller's jobs (an admin's: everyone's), newest first, expired ones left out."""
        jobs = self.db.list_jobs(None if caller.admin else caller.owner, state, limit)
        return [self._overlaid(j) for j in jobs if not self._expired(j)]

    def cancel(self, job_id: str, caller: Principal = ANONYMOUS) -> Job:
        """Cancel a queued or running job (cancelling a cancelled job again is harmless)."""
        job = self.status(job_id, caller)
        if job.state in ("succeeded", "failed"):
            raise JobStateError(
                f"job {job_id!r} already {job.state}; only a queued or running job can be cancelled"
            )
        self._cancelled.add(job_id)
        cancelled = self.db.cancel(job_id, time.time())
        return self._overlaid(cancelled) if cancelled is not None else self.status(job_id, caller)

    def result_path(self, job_id: str, caller: Principal = ANONYMOUS) -> tuple[Job, Path]:
        """The finished job and its result file, or JobStateError naming the job's state."""
        job = self.status(job_id, caller)
        if job.state != "succeeded" or not job.result_file:
            reason = f": {job.error.get('detail')}" if job.state == "failed" and job.error else ""
            raise JobStateError(
                f"job {job_id!r} is {job.state}{reason}; its result is served once it has succeeded",
                state=job.state,
            )
        path = self.results / job.result_file
        if not path.is_file():
            raise JobNotFoundError(f"the result of job {job_id!r} was removed", field="job_id")
        return job, path

    def clean_up(self, now: float | None = None) -> int:
        """Remove finished jobs (records and files) older than the retention time; returns how many."""
        now = time.time() if now is None else now
        with self._clean_up_lock:
            self._last_clean_up = now
            removed = 0
            for job in self.db.expired(now - self.settings.job_retention_hours * 3600.0):
                self._remove(job)
                removed += 1
        if removed:
            log.info("removed %d expired job(s)", removed)
        return removed

    def _expired(self, job: Job, now: float | None = None) -> bool:
        """Whether a finished job is past its retention time (checked on every read, not only by clean-up)."""
        if job.finished_at is None or job.state not in FINISHED_STATES:
            return False
        now = time.time() if now is None else now
        return job.finished_at < now - self.settings.job_retention_hours * 3600.0

    def _remove(self, job: Job) -> None:
        """Delete a job's files and record (the record stays when the database cannot be written)."""
        if job.result_file:
            (self.results / job.result_file).unlink(missing_ok=True)
        self._prepared_path(job.id).unlink(missing_ok=True)
        try:
            self.db.delete(job.id)
        except sqlite3.Error:
            log.warning(
                "cannot remove the record of expired job %s now; it is hidden and removed later", job.id
            )

    # --- prepared weights -----------------------------------------------------------------------------------

    def _prepared_path(self, job_id: str) -> Path:
        """Where the weights computed at a job's submission are kept until it ends."""
        return self.prepared / f"{job_id}.pickle"

    def _save_prepared(self, job_id: str, prepared: Prepared) -> None:
        """Keep the submission's weights for the run (a full disk refuses the job with 507)."""
        try:
            write_atomically(self._prepared_path(job_id), pickle.dumps(prepared, protocol=5))
        except OSError as exc:
            raise storage_full(exc) or exc from None

    def _load_prepared(self, job_id: str) -> Prepared | None:
        """The weights kept at submission, or None (the run then computes them again)."""
        path = self._prepared_path(job_id)
        try:
            with open(path, "rb") as handle:
                return pickle.load(handle)  # written by this server into its own data directory
        except FileNotFoundError:
            return None
        except Exception:  # noqa: BLE001 - an unreadable file (another version) costs only the recomputation
            log.warning("job %s: the weights kept at submission cannot be read; computing them again", job_id)
            return None

    # --- recording ends through a full disk -----------------------------------------------------------------

    def _overlaid(self, job: Job) -> Job:
        """The job with an end that the database could not take yet."""
        with self._unrecorded_lock:
            end = self._unrecorded.get(job.id)
        if end is None or job.state != "running":
            return job
        return Job(
            **{
                **job.__dict__,
                "state": end.state,
                "finished_at": end.finished_at,
                "error": end.error,
                "result_file": end.result_file,
                "media_type": end.media_type,
                "headers": end.headers or {},
            }
        )

    def _finish(self, job_id: str, end: _Unrecorded) -> bool:
        """Record a job's end; when the database cannot take it, keep it to write later. False: cancelled."""
        try:
            recorded = self.db.finish(
                job_id,
                end.state,
                end.finished_at,
                error=end.error,
                result_file=end.result_file,
                media_type=end.media_type,
                headers=end.headers,
            )
        except sqlite3.Error as exc:
            log.warning("job %s: cannot record that it %s (%s); kept to record later", job_id, end.state, exc)
            with self._unrecorded_lock:
                self._unrecorded[job_id] = end
            return True
        with self._unrecorded_lock:
            self._unrecorded.pop(job_id, None)
        if recorded:
            self._prepared_path(job_id).unlink(missing_ok=True)
        return recorded

    def _record_pending(self) -> None:
        """Try again to record the ends the database could not take."""
        with self._unrecorded_lock:
            pending = list(self._unrecorded.items())
        for job_id, end in pending:
            self._finish(job_id, end)

    # --- the workers ----------------------------------------------------------------------------------------

    def _work(self) -> None:
        """A worker thread: claim the oldest queued job, run it, repeat; clean up now and then when idle.

        Nothing that goes wrong here ends the thread: a storage error (a full disk) is logged and the loop goes
        on, so the worker is alive again as soon as space is freed.
        """
        while not self._stop.is_set():
            try:
                self._record_pending()
                job = self.db.claim_next(time.time())
                if time.time() - self._last_clean_up > self._clean_up_seconds:
                    self.clean_up()  # also between jobs, so that a busy queue does not keep old results forever
            except Exception:  # noqa: BLE001 - the worker outlives any storage error
                log.exception("the job queue cannot be read or written; trying again shortly")
                job = None
            if job is None:
                self._wake.wait(self._poll_seconds)
                self._wake.clear()
                continue
            try:
                self._run(job)
            except Exception:  # noqa: BLE001 - _run records failures itself; this is the last guard
                log.exception("job %s: the worker failed while handling it", job.id)

    def _run(self, job: Job) -> None:
        """Run one claimed job to its end state; never raises."""
        from service.schemas import IndicatorRequest

        log.info("job %s: running (%d features, attempt %d)", job.id, job.features_total, job.attempts)
        last_write = [0.0]

        def progress(done: int, total: int) -> None:
            # Progress comes per feature batch; write it at most a few times a second. Progress is only
            # informative: a database that cannot take it (a full disk) does not stop the run.
            now = time.monotonic()
            if now - last_write[0] >= 0.2 or done >= total:
                last_write[0] = now
                try:
                    self.db.progress(job.id, int(done), int(total))
                except sqlite3.Error as exc:
                    log.warning("job %s: cannot record progress (%s)", job.id, exc)

        def cancelled_by_user() -> bool:
            if job.id in self._cancelled:
                return True
            try:
                current = self.db.get(job.id)
            except sqlite3.Error:
                return False
            return current is None or current.state != "running"

        def cancelled() -> bool:
            # A stopping server interrupts the run too; the job stays 'running' and is re-queued on start.
            return self._stop.is_set() or cancelled_by_user()

        result: Path | None = None
        try:
            request = parse_stored_request(self.db.request_of(job.id), IndicatorRequest)
            kwargs: dict[str, Any] = {"progress": progress, "cancelled": cancelled}
            prepared = self._load_prepared(job.id)
            if prepared is not None:
                kwargs["prepared"] = prepared
            name = f"{job.id}.{SUFFIXES[job.format]}"
            planned = None
            if self._run_job is run_with_pipeline:  # written batch by batch where the format allows
                planned = plan_to_file(request, self.registry, self.settings, job.format, **kwargs)
            if planned is not None:
                # The plan holds the features' ids and properties: the request's validated features (about
                # 2 kB each) and the features kept from the submission are let go before the batches run.
                del request, prepared, kwargs
                result = self.results / name
                written = write_planned(planned, job.format, result)
                del planned
            else:
                body, media_type, headers = self._run_job(
                    request, self.registry, self.settings, job.format, **kwargs
                )
                written = (len(body), media_type, headers)
            size, media_type, headers = written
            if cancelled_by_user():
                if result is not None:  # written batch by batch before the cancel was seen
                    result.unlink(missing_ok=True)
                raise RunCancelledError(f"job {job.id} was cancelled")
            if result is None:
                result = self.results / name
                write_atomically(result, body)
            end = _Unrecorded(
                "succeeded", time.time(), result_file=name, media_type=media_type, headers=headers
            )
            if not self._finish(job.id, end):
                result.unlink(missing_ok=True)
            else:
                log.info("job %s: succeeded (%d bytes)", job.id, size)
        except RunCancelledError:
            if self._stop.is_set():
                log.info("job %s: interrupted by the server stopping; it will run again on start", job.id)
            else:
                log.info("job %s: cancelled", job.id)
                self._prepared_path(job.id).unlink(missing_ok=True)
        except Exception as exc:  # noqa: BLE001 - a job's failure is recorded, never lost, never kills the worker
            if result is not None:
                result.unlink(missing_ok=True)
            status, problem = problem_for(exc, instance=f"/v1/jobs/{job.id}")
            if status == 503 and job.attempts < MAX_ATTEMPTS and not self._stop.is_set():
                # The cluster or a store was unavailable, not the request wrong: wait, then queue it again.
                delay = self._retry_seconds * job.attempts
                log.warning("job %s: %s; trying again in %.0f s", job.id, problem["detail"], delay)
                self._stop.wait(delay)
                try:
                    self.db.requeue(job.id)
                    return
                except sqlite3.Error:
                    log.warning("job %s: cannot queue it again; recording it as failed", job.id)
            if status >= 500 and status not in (503, 507):
                log.error("job %s failed", job.id, exc_info=exc)
            elif status == 507:
                log.error("job %s failed: the data directory is full (%s)", job.id, exc)
            self._finish(job.id, _Unrecorded("failed", time.time(), error=problem))
        finally:
            self._cancelled.discard(job.id)
            release_memory()  # the job's batches and encoded table are freed: give the pages back


def parse_stored_request(text: str, model: type[Any]) -> Any:
    """A stored request re-validated, parsed feature by feature (see service.request_text)."""
    from service import request_text

    return model.model_validate(request_text.loads(text))


def write_atomically(path: Path, data: bytes) -> None:
    """Write ``data`` to ``path`` through a .partial file renamed into place once on disk.

    On any error (a full disk among them) the partial file is removed before the error is raised.
    """
    partial = path.with_name(path.name + ".partial")
    try:
        with open(partial, "wb") as handle:
            handle.write(data)
            handle.flush()
            os.fsync(handle.fileno())
        os.replace(partial, path)
    except BaseException:
        partial.unlink(missing_ok=True)
        raise
    directory = os.open(path.parent, os.O_RDONLY)
    try:
        os.fsync(directory)
    finally:
        os.close(directory)


def check_job_request(request: IndicatorRequest, registry: StoreRegistry, settings: Settings) -> Prepared:
    """Refuse at submission what the run would refuse, with the on-demand route's own checks.

    Request-level faults always raise (422/404); features that cannot be computed are skipped unless the
    request says ``"invalid_features": "fail"``, and a job with no feature left is refused (422). Returns the
    weights and skipped features, which the run reuses.
    """
    from service import pipeline

    store = registry.get_dataset(request.dataset)
    return pipeline.prepare(request, store, settings, invalid_features=JOB_INVALID_FEATURES, stores=registry)

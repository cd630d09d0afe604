"""Durable batch jobs: their state in SQLite in the data directory, and the worker threads that run them.

A job moves queued -> running -> succeeded | failed, or to cancelled from queued or running. Its result is
written to ``<id>.<format>.partial`` and renamed when complete, so a partial result is never served as
finished. A server killed in the middle of a job puts that job back in the queue when it starts again; the
run is deterministic, so the re-run gives the same bytes as an uninterrupted one.
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import sqlite3
import threading
import time
import uuid
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

from service.errors import JobNotFoundError, JobStateError, RequestError, RunCancelledError, problem_for

if TYPE_CHECKING:
    from service.registry import StoreRegistry
    from service.schemas import IndicatorRequest
    from service.settings import Settings

log = logging.getLogger("wxshock.jobs")

STATES = ("queued", "running", "succeeded", "failed", "cancelled")
FINISHED_STATES = frozenset({"succeeded", "failed", "cancelled"})
# A job that was running when the server stopped this many times is failed instead of re-queued, so that a
# request that brings the server down cannot keep bringing it down.
MAX_ATTEMPTS = 3
SUFFIXES = {"json": "json", "csv": "csv", "parquet": "parquet"}

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
_COLUMNS = (
    "id, state, dataset, format, request_hash, idempotency_key, features_total, features_done, created_at, "
    "started_at, finished_at, attempts, error, result_file, media_type, headers"
)


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

    @classmethod
    def from_row(cls, row: tuple[Any, ...]) -> Job:
        """A Job from a row selected with _COLUMNS."""
        values = list(row)
        values[12] = json.loads(values[12]) if values[12] else None
        values[15] = json.loads(values[15]) if values[15] else {}
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
    """SHA-256 of a job's canonical request and output format: equal submissions have equal digests."""
    canonical = json.dumps(json.loads(request_json), sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(f"{fmt}\n{canonical}".encode()).hexdigest()


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

    @contextmanager
    def _transaction(self) -> Iterator[sqlite3.Connection]:
        """The connection inside BEGIN IMMEDIATE ... COMMIT (rolled back on error)."""
        with self._lock:
            self._connection.execute("BEGIN IMMEDIATE")
            try:
                yield self._connection
            except BaseException:
                self._connection.execute("ROLLBACK")
                raise
            self._connection.execute("COMMIT")

    def close(self) -> None:
        """Close the connection."""
        with self._lock:
            self._connection.close()

    def insert(self, job: Job, request_json: str) -> Job:
        """Record a new queued job, or return the job already recorded under its idempotency key."""
        with self._transaction() as db:
            if job.idempotency_key is not None:
                row = db.execute(
                    f"SELECT {_COLUMNS} FROM jobs WHERE idempotency_key = ?", (job.idempotency_key,)
                ).fetchone()
                if row is not None:
                    return Job.from_row(row)
            db.execute(
                "INSERT INTO jobs (id, state, dataset, format, request, request_hash, idempotency_key, "
                "features_total, created_at) VALUES (?, 'queued', ?, ?, ?, ?, ?, ?, ?)",
                (
                    job.id,
                    job.dataset,
                    job.format,
                    request_json,
                    job.request_hash,
                    job.idempotency_key,
                    job.features_total,
                    job.created_at,
                ),
            )
        return job

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
) -> tuple[bytes, str, dict[str, str]]:
    """Compute a job's table with the pipeline and encode it: (bytes, media type, headers)."""
    from service import encode, pipeline

    store = registry.get_dataset(request.dataset)
    result = pipeline.run(request, store, settings, progress=progress, cancelled=cancelled)
    return encode.encode(result, fmt)


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
        self.results.mkdir(parents=True, exist_ok=True)
        self.db = JobDatabase(self.directory / "jobs.sqlite")
        self._run_job = run_job
        self._poll_seconds = poll_seconds
        self._retry_seconds = retry_seconds
        self._clean_up_seconds = clean_up_seconds
        self._wake = threading.Event()
        self._stop = threading.Event()
        self._threads: list[threading.Thread] = []
        self._cancelled: set[str] = set()
        self._last_clean_up = 0.0
        self._clean_up_lock = threading.Lock()

    # --- lifecycle ------------------------------------------------------------------------------------------

    def start(self) -> None:
        """Re-queue jobs interrupted by a stop, clear partial files, and start the worker threads."""
        requeued, failed = self.db.requeue_interrupted(time.time())
        if requeued or failed:
            log.warning("re-queued %d interrupted job(s); failed %d tried too often", requeued, failed)
        for partial in self.results.glob("*.partial"):
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

    def submit(
        self, request: IndicatorRequest, fmt: str, idempotency_key: str | None = None
    ) -> tuple[Job, bool]:
        """Queue a job; returns (job, created). A repeated Idempotency-Key returns the first job."""
        # Only the fields the user gave: resolution tells "not given" from "given as the default" (the default
        # pair, for one), so the stored request must re-validate to exactly the request that was sent.
        request_json = request.model_dump_json(exclude_unset=True)
        digest = request_digest(request_json, fmt)
        job = Job(
            id=uuid.uuid4().hex,
            state="queued",
            dataset=self.registry.get_dataset(request.dataset).name,
            format=fmt,
            request_hash=digest,
            idempotency_key=idempotency_key,
            features_total=feature_count(request),
            features_done=0,
            created_at=time.time(),
            started_at=None,
            finished_at=None,
            attempts=0,
            error=None,
            result_file=None,
            media_type=None,
        )
        recorded = self.db.insert(job, request_json)
        if recorded.id != job.id and recorded.request_hash != digest:
            raise RequestError(
                f"Idempotency-Key {idempotency_key!r} was already used for a different request (job "
                f"{recorded.id}); send a new key for a new request",
                field="Idempotency-Key",
            )
        if recorded.id == job.id:
            self._wake.set()
        return recorded, recorded.id == job.id

    def status(self, job_id: str) -> Job:
        """The job's current record, or JobNotFoundError."""
        job = self.db.get(job_id)
        if job is None:
            raise JobNotFoundError(
                f"no job {job_id!r}: it was never submitted, or it finished more than "
                f"{self.settings.job_retention_hours:g} hours ago and was removed",
                field="job_id",
            )
        return job

    def cancel(self, job_id: str) -> Job:
        """Cancel a queued or running job (cancelling a cancelled job again is harmless)."""
        job = self.status(job_id)
        if job.state in ("succeeded", "failed"):
            raise JobStateError(
                f"job {job_id!r} already {job.state}; only a queued or running job can be cancelled"
            )
        self._cancelled.add(job_id)
        cancelled = self.db.cancel(job_id, time.time())
        return cancelled if cancelled is not None else self.status(job_id)

    def result_path(self, job_id: str) -> tuple[Job, Path]:
        """The finished job and its result file, or JobStateError naming the job's state."""
        job = self.status(job_id)
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
                if job.result_file:
                    (self.results / job.result_file).unlink(missing_ok=True)
                self.db.delete(job.id)
                removed += 1
        if removed:
            log.info("removed %d expired job(s)", removed)
        return removed

    # --- the workers ----------------------------------------------------------------------------------------

    def _work(self) -> None:
        """A worker thread: claim the oldest queued job, run it, repeat; clean up now and then when idle."""
        while not self._stop.is_set():
            try:
                job = self.db.claim_next(time.time())
            except sqlite3.Error:
                log.exception("cannot read the job queue")
                job = None
            if time.time() - self._last_clean_up > self._clean_up_seconds:
                self.clean_up()  # also between jobs, so that a busy queue does not keep old results forever
            if job is None:
                self._wake.wait(self._poll_seconds)
                self._wake.clear()
                continue
            self._run(job)

    def _run(self, job: Job) -> None:
        """Run one claimed job to its end state; never raises."""
        from service.schemas import IndicatorRequest

        log.info("job %s: running (%d features, attempt %d)", job.id, job.features_total, job.attempts)
        last_write = [0.0]

        def progress(done: int, total: int) -> None:
            # Progress comes per feature batch; write it at most a few times a second.
            now = time.monotonic()
            if now - last_write[0] >= 0.2 or done >= total:
                last_write[0] = now
                self.db.progress(job.id, int(done), int(total))

        def cancelled_by_user() -> bool:
            if job.id in self._cancelled:
                return True
            current = self.db.get(job.id)
            return current is None or current.state != "running"

        def cancelled() -> bool:
            # A stopping server interrupts the run too; the job stays 'running' and is re-queued on start.
            return self._stop.is_set() or cancelled_by_user()

        try:
            request = IndicatorRequest.model_validate_json(self.db.request_of(job.id))
            body, media_type, headers = self._run_job(
                request, self.registry, self.settings, job.format, progress=progress, cancelled=cancelled
            )
            if cancelled_by_user():
                raise RunCancelledError(f"job {job.id} was cancelled")
            name = f"{job.id}.{SUFFIXES[job.format]}"
            _write_atomically(self.results / name, body)
            if not self.db.finish(
                job.id, "succeeded", time.time(), result_file=name, media_type=media_type, headers=headers
            ):
                (self.results / name).unlink(missing_ok=True)
            else:
                log.info("job %s: succeeded (%d bytes)", job.id, len(body))
        except RunCancelledError:
            if self._stop.is_set():
                log.info("job %s: interrupted by the server stopping; it will run again on start", job.id)
            else:
                log.info("job %s: cancelled", job.id)
        except Exception as exc:  # noqa: BLE001 - a job's failure is recorded, never lost, never kills the worker
            status, problem = problem_for(exc, instance=f"/v1/jobs/{job.id}")
            if status == 503 and job.attempts < MAX_ATTEMPTS and not self._stop.is_set():
                # The cluster or a store was unavailable, not the request wrong: wait, then queue it again.
                delay = self._retry_seconds * job.attempts
                log.warning("job %s: %s; trying again in %.0f s", job.id, problem["detail"], delay)
                self._stop.wait(delay)
                self.db.requeue(job.id)
                return
            if not isinstance(exc, RequestError):
                log.exception("job %s failed", job.id)
            self.db.finish(job.id, "failed", time.time(), error=problem)
        finally:
            self._cancelled.discard(job.id)


def _write_atomically(path: Path, data: bytes) -> None:
    """Write ``data`` to ``path`` through a .partial file renamed into place once on disk."""
    partial = path.with_name(path.name + ".partial")
    with open(partial, "wb") as handle:
        handle.write(data)
        handle.flush()
        os.fsync(handle.fileno())
    os.replace(partial, path)
    directory = os.open(path.parent, os.O_RDONLY)
    try:
        os.fsync(directory)
    finally:
        os.close(directory)


def check_job_request(request: IndicatorRequest, registry: StoreRegistry, settings: Settings) -> None:
    """Refuse at submission what the run would refuse: unknown dataset, years, baseline, lags, geometries."""
    from service.errors import LimitExceededError
    from service.geometry import parse_features
    from service.indicators.table import resolve_request

    store = registry.get_dataset(request.dataset)
    span = resolve_request(request, store.dates).years
    years = span.end - span.start + 1 if span is not None else 0
    if span is not None and years > settings.max_years_per_request:
        raise LimitExceededError(
            f"the request spans {years} years ({span.start}-{span.end}); at most "
            f"{settings.max_years_per_request} are allowed (setting max_years_per_request); ask for fewer years",
            limit="max_years_per_request",
            allowed=settings.max_years_per_request,
            got=years,
            pointer="/years",
        )
    parse_features(
        request.features.model_dump(mode="json", exclude_none=False),
        id_property=request.id_property,
        crs=request.crs,
        repair=request.repair,
        max_vertices=settings.max_vertices_per_feature,
    )

"""The error tree of wxshock and the one map from error type to an RFC 9457 problem document.

Computation modules raise these (never HTTPException); the web layer turns them into
``application/problem+json`` through :func:`problem_for`, the CLI prints their ``detail``.
Each class also subclasses the builtin it refines, so ``except ValueError`` keeps working.
"""

from __future__ import annotations

import errno
import sqlite3
from typing import Any

PROBLEM_TYPE_PREFIX = "tag:wxshock,2026:problem/"
PROBLEM_MEDIA_TYPE = "application/problem+json"


class WxshockError(Exception):
    """Base of every error wxshock raises on purpose."""

    status: int = 500
    slug: str = "internal-error"
    title: str = "Internal error"

    def __init__(
        self,
        detail: str,
        *,
        pointer: str | None = None,
        feature_id: str | None = None,
        field: str | None = None,
        **extra: Any,
    ) -> None:
        super().__init__(detail)
        self.detail = detail
        self.pointer = pointer
        self.feature_id = feature_id
        self.field = field
        self.extra = extra

    def problem(self) -> dict[str, Any]:
        """The RFC 9457 members of this error (without ``instance``)."""
        doc: dict[str, Any] = {
            "type": PROBLEM_TYPE_PREFIX + self.slug,
            "title": self.title,
            "status": self.status,
            "detail": self.detail,
        }
        if self.pointer is not None:
            doc["pointer"] = self.pointer
        if self.feature_id is not None:
            doc["feature_id"] = self.feature_id
        if self.field is not None:
            doc["field"] = self.field
        doc.update({k: v for k, v in self.extra.items() if v is not None})
        return doc


# --- the user's request -------------------------------------------------------------------------------------


class RequestError(WxshockError, ValueError):
    """A request that cannot be served as written."""

    status = 422
    slug = "invalid-request"
    title = "Invalid request"


class RequestValidationFailed(RequestError):
    """Schema validation failed; ``errors`` lists every field that failed."""

    slug = "validation-failed"
    title = "Request failed validation"

    def __init__(self, detail: str, *, errors: list[dict[str, Any]], **kwargs: Any) -> None:
        super().__init__(detail, errors=errors, **kwargs)
        self.errors = errors


class FeatureError(RequestError):
    """One feature's geometry or properties are unusable; names the feature."""

    slug = "invalid-feature"
    title = "Invalid feature"


class FeatureWithoutDataError(FeatureError):
    """A feature covers no grid cell with data (outside the grid, or only water or missing cells)."""

    slug = "feature-without-data"
    title = "Feature has no data"


class UnknownIndicatorError(RequestError, LookupError):
    """An indicator or parameter that the catalog does not have."""

    slug = "unknown-indicator"
    title = "Unknown indicator"


class OutOfRangeError(RequestError):
    """Years, baseline or lags that fall outside the dataset's data."""

    slug = "out-of-range"
    title = "Outside the data"


class LimitExceededError(RequestError):
    """A configured limit (features, vertices, cells, years, body size) was exceeded; names the limit."""

    slug = "limit-exceeded"
    title = "Limit exceeded"

    def __init__(
        self,
        detail: str,
        *,
        limit: str,
        allowed: int | float,
        got: int | float,
        status: int = 422,
        **kwargs: Any,
    ) -> None:
        super().__init__(detail, limit=limit, allowed=allowed, got=got, **kwargs)
        self.status = status
        self.limit = limit


class NotAcceptableError(RequestError):
    """The client asked for an output format that this route cannot give."""

    status = 406
    slug = "not-acceptable"
    title = "Format not available"


# --- datasets and stores ------------------------------------------------------------------------------------


class UnknownDatasetError(WxshockError, LookupError):
    """No dataset of that name is served."""

    status = 404
    slug = "unknown-dataset"
    title = "Unknown dataset"


class StoreError(WxshockError, OSError):
    """A store cannot be opened or read (missing, corrupt, not a wxshock store)."""

    status = 503
    slug = "store-unavailable"
    title = "Store unavailable"


class StoreFormatError(StoreError, ValueError):
    """A store exists but does not follow the wxshock layout (variables, dims, attributes)."""

    slug = "store-format"
    title = "Not a wxshock store"


class FingerprintMismatchError(StoreError):
    """A store's contents no longer match the fingerprint recorded when it was written."""

    slug = "fingerprint-mismatch"
    title = "Store changed since it was written"


class IngestError(WxshockError, ValueError):
    """Input files that cannot be ingested (grids differ, gaps or overlaps in time, unknown units)."""

    status = 422
    slug = "ingest-failed"
    title = "Ingest failed"


# --- jobs and access ------------------------------------------------------------------------------------------


class JobNotFoundError(WxshockError, LookupError):
    """No job with that id (never submitted, or its result expired and was removed)."""

    status = 404
    slug = "unknown-job"
    title = "Unknown job"


class JobStateError(WxshockError, RuntimeError):
    """The job is not in a state that allows this (result of an unfinished job, cancel of a finished one)."""

    status = 409
    slug = "job-state"
    title = "Job not in that state"


class RunCancelledError(WxshockError):
    """A run was cancelled (a job's DELETE) between two feature batches."""

    status = 409
    slug = "cancelled"
    title = "Cancelled"


def pointer_from_loc(loc: tuple[int | str, ...] | list[int | str]) -> str:
    """An RFC 6901 JSON pointer from a pydantic error location, e.g. ('features', 0, 'id') -> /features/0/id."""
    parts = [str(p).replace("~", "~0").replace("/", "~1") for p in loc]
    return "/" + "/".join(parts) if parts else ""


# Names pydantic gives the members of a union such as `str | int` in an error's location; no field of a
# request has these names.
_UNION_MEMBERS = frozenset({"str", "int", "float", "bool", "none", "bytes"})


def validation_items(errors: list[dict[str, Any]], drop_prefix: tuple[str, ...] = ()) -> list[dict[str, Any]]:
    """Pydantic's error list as problem-document items: a pointer, the message and the offending value."""
    items = []
    for error in errors:
        loc = list(error.get("loc", ()))
        # pydantic adds the chosen union member's tag ('MonthsSeason', 'function-after[...]') to the
        # location; a user cannot act on those, so keep only the field names and list positions.
        loc = [
            p
            for p in loc
            if isinstance(p, int) or not (str(p)[:1].isupper() or "[" in str(p) or p in _UNION_MEMBERS)
        ]
        if drop_prefix and tuple(loc[: len(drop_prefix)]) == drop_prefix:
            loc = loc[len(drop_prefix) :]
        message = str(error.get("msg", "")).removeprefix("Value error, ")
        if error.get("type") == "extra_forbidden":
            from service.suggest import unknown_field_message

            message = unknown_field_message([p for p in loc if isinstance(p, str | int)]) or message
        item: dict[str, Any] = {"pointer": pointer_from_loc(loc), "message": message}
        if "input" in error and isinstance(error["input"], str | int | float | bool | type(None)):
            value = error["input"]
            # Never echo a long text whole (a 1 MB id would make the problem document 1 MB).
            item["value"] = (
                value[:40] + f"... ({len(value)} characters)"
                if isinstance(value, str) and len(value) > 200
                else value
            )
        if not items or items[-1] != item:  # a union's members repeat the same place and value
            items.append(item)
    return items


class AuthError(WxshockError, PermissionError):
    """Missing or wrong bearer token."""

    status = 401
    slug = "unauthorized"
    title = "Unauthorized"


# --- execution ------------------------------------------------------------------------------------------------


class StorageFullError(WxshockError, OSError):
    """The server's data directory is full: a job's record or result cannot be written."""

    status = 507
    slug = "storage-full"
    title = "Server storage full"


class ClusterUnavailableError(WxshockError, ConnectionError):
    """The configured dask scheduler cannot be reached, has no workers, or kept losing the workers of a task."""

    status = 503
    slug = "cluster-unavailable"
    title = "Compute cluster unavailable"


_FULL_ERRNOS = frozenset({errno.ENOSPC, errno.EDQUOT})


def storage_full(exc: BaseException) -> StorageFullError | None:
    """A StorageFullError standing for ``exc`` when it is a full disk or quota (file or SQLite); else None."""
    if isinstance(exc, StorageFullError):
        return exc
    full = (isinstance(exc, OSError) and exc.errno in _FULL_ERRNOS) or (
        isinstance(exc, sqlite3.OperationalError) and "full" in str(exc).lower()
    )
    if not full:
        return None
    return StorageFullError(
        "the server's data directory is full, so the job's record or result could not be written; nothing "
        "was lost, but no job can run until its administrator frees space; try again later"
    )


def problem_for(exc: BaseException, instance: str | None = None) -> tuple[int, dict[str, Any]]:
    """The HTTP status and problem document for any exception; unknown ones become a bare 500."""
    exc = storage_full(exc) or exc
    if isinstance(exc, WxshockError):
        doc = exc.problem()
        status = exc.status
    else:
        # Never leak internals (paths, credentials) of an unexpected failure into the document.
        status = 500
        doc = {
            "type": PROBLEM_TYPE_PREFIX + "internal-error",
            "title": "Internal error",
            "status": 500,
            "detail": "The server failed while handling this request; the failure was logged.",
        }
    if instance is not None:
        doc["instance"] = instance
    return status, doc

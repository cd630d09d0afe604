"""The Python client of a wxshock server: indicators as a pandas DataFrame, batch jobs with a progress bar.

    from service.client import Client
    client = Client("http://127.0.0.1:8000")
    table = client.indicators("communities.geojson", baseline=(1981, 1990), lags=[0, 1])
    table.attrs["provenance"]["fingerprint"]

Results travel as Parquet and keep the server's provenance and warnings in ``df.attrs``. Requests are checked
against the shared request schema before they are sent, so a misspelt option fails at once with the field
named. Connection failures are retried (with back-off); a server's answer to a user's mistake (4xx) never is.
"""

from __future__ import annotations

import io
import json
import os
import time
import uuid
from collections.abc import Callable, Mapping
from pathlib import Path
from typing import TYPE_CHECKING, Any

import httpx

from service import __version__
from service.errors import RequestError, WxshockError

if TYPE_CHECKING:  # pandas is imported where a table is made: `wxshock submit` only moves bytes (0.6 s saved)
    import pandas as pd

PARQUET = "application/vnd.apache.parquet"
# What a batch job can return, by format name, and the media type asked for; file suffixes map onto the names.
JOB_MEDIA_TYPES = {
    "parquet": PARQUET,
    "csv": "text/csv",
    "json": "application/json",
    "dta": "application/x-stata-dta",
    "bundle": "application/zip",
}
_SUFFIX_ALIASES = {"pq": "parquet", "zip": "bundle"}
# The server's default on-demand limit (setting max_features_on_demand); more features go as a batch job.
ON_DEMAND_FEATURES = 200
_RETRY_STATUSES = frozenset({502, 503, 504})
_FINISHED = frozenset({"succeeded", "failed", "cancelled"})


class ServerError(WxshockError):
    """The server answered with an error; carries its RFC 9457 problem document, detail and pointer."""

    slug = "server-error"
    title = "Server error"

    def __init__(self, status: int, problem: Mapping[str, Any], *, method: str = "", url: str = "") -> None:
        self.problem_document = dict(problem)
        detail = str(problem.get("detail") or problem.get("title") or f"HTTP {status}")
        where = f" (at {problem['pointer']})" if problem.get("pointer") else ""
        super().__init__(
            f"{method} {url} answered {status}: {detail}{where}".strip(),
            pointer=problem.get("pointer"),
            feature_id=problem.get("feature_id"),
            field=problem.get("field"),
        )
        self.status = status
        self.server_detail = detail
        self.type = str(problem.get("type", ""))
        self.errors = list(problem.get("errors") or [])

    def problem(self) -> dict[str, Any]:
        """The server's own problem document, unchanged."""
        return dict(self.problem_document)


class ServerUnreachableError(WxshockError, ConnectionError):
    """No answer from the server after every retry (wrong URL, server down, network cut)."""

    status = 503
    slug = "server-unreachable"
    title = "Server unreachable"


class JobFailedError(ServerError):
    """A batch job finished as failed or cancelled; carries the job's problem document."""


# --- features in, request out ---------------------------------------------------------------------------------


def _geodataframe_features(frame: Any, id_column: str | None) -> tuple[dict[str, Any], str | None]:
    """A GeoDataFrame as a GeoJSON FeatureCollection (ids from ``id_column``) and its CRS string."""
    column = id_column or next((c for c in ("feature_id", "id") if c in frame.columns), None)
    if column is None or column not in frame.columns:
        raise RequestError(
            f"the GeoDataFrame has no id column {id_column or 'feature_id or id'!r} (columns: "
            f"{[str(c) for c in frame.columns if c != frame.geometry.name]!r}); pass id_column=NAME",
            field="id_column",
        )
    ids = frame[column]
    if ids.isna().any() or ids.astype(str).duplicated().any():
        duplicated = sorted(set(ids[ids.astype(str).duplicated()].astype(str)))[:5]
        raise RequestError(
            f"id column {column!r} has missing or repeated ids (repeated: {duplicated!r}); each community "
            "needs its own id",
            field="id_column",
        )
    collection = json.loads(frame.drop(columns=[column]).to_json(na="null", drop_id=True, to_wgs84=False))
    for feature, value in zip(collection["features"], ids.astype(str), strict=True):
        feature["id"] = value
    collection.pop("bbox", None)
    crs = None
    # WGS84 (EPSG:4326 or OGC:CRS84) is what GeoJSON means already; any other CRS goes along by name or WKT.
    if frame.crs is not None and not frame.crs.equals("OGC:CRS84") and frame.crs.to_epsg() != 4326:
        authority = frame.crs.to_authority()
        crs = f"{authority[0]}:{authority[1]}" if authority else frame.crs.to_wkt()
    return collection, crs


def features_document(features: Any, id_column: str | None = None) -> tuple[dict[str, Any], str | None]:
    """Any accepted form of communities as (GeoJSON dict, CRS or None).

    ``features``: a GeoJSON FeatureCollection or Feature dict; a path to a GeoJSON, GeoPackage or Shapefile;
    or a GeoDataFrame with an id column (``id_column``, else 'feature_id' or 'id').
    """
    if isinstance(features, Mapping):
        if features.get("type") not in ("FeatureCollection", "Feature"):
            raise RequestError(
                f"features is a dict of type {features.get('type')!r}; give a GeoJSON FeatureCollection or "
                "Feature",
                field="features",
            )
        return dict(features), None
    if isinstance(features, str | os.PathLike):
        path = Path(features)
        if not path.exists():
            raise RequestError(f"features file {str(path)!r} does not exist", field="features")
        if path.suffix.lower() in (".geojson", ".json") and id_column is None:
            try:
                return json.loads(path.read_text(encoding="utf-8")), None
            except json.JSONDecodeError as exc:
                raise RequestError(
                    f"features file {str(path)!r} is not JSON: {exc}", field="features"
                ) from None
        import geopandas

        try:
            frame = geopandas.read_file(path)
        except Exception as exc:  # pyogrio raises its own DataSourceError and friends
            raise RequestError(f"cannot read features file {str(path)!r}: {exc}", field="features") from None
        return _geodataframe_features(frame, id_column)
    if hasattr(features, "geometry") and hasattr(features, "to_json"):
        return _geodataframe_features(features, id_column)
    raise RequestError(
        f"features of type {type(features).__name__!r} are not understood; give a GeoJSON dict, a file path or "
        "a GeoDataFrame",
        field="features",
    )


# The columns an events table must have: the event id (either name), the community, the date.
_EVENT_ID_COLUMNS = ("id", "event_id")


def events_list(events: Any) -> list[dict[str, str]]:
    """Events as a request's ``events``: from a list of dicts, a DataFrame, or a CSV or Parquet file path.

    A table needs an ``id`` (or ``event_id``) column, ``feature_id`` and ``date`` ('YYYY-MM-DD' text, or
    dates/timestamps, written as their day); other columns (a survey's own) are left out. Ids are sent as text.
    """
    if isinstance(events, list | tuple):
        return [dict(e) if isinstance(e, Mapping) else e for e in events]
    import pandas as pd  # here, not at import: `wxshock submit` without events never needs it

    if isinstance(events, str | os.PathLike):
        path = Path(events)
        if not path.exists():
            raise RequestError(f"events file {str(path)!r} does not exist", field="events")
        suffix = path.suffix.lower()
        try:
            if suffix == ".csv":
                frame = pd.read_csv(path, dtype=str, keep_default_na=False)
            elif suffix in (".parquet", ".pq"):
                frame = pd.read_parquet(path)
            else:
                raise RequestError(
                    f"events file {str(path)!r}: give a .csv or .parquet file (columns id, feature_id, date)",
                    field="events",
                )
        except (OSError, ValueError) as exc:
            if isinstance(exc, RequestError):
                raise
            raise RequestError(f"cannot read events file {str(path)!r}: {exc}", field="events") from None
        return _events_of_frame(frame, str(path))
    if isinstance(events, pd.DataFrame):
        return _events_of_frame(events, "the events table")
    raise RequestError(
        f"events of type {type(events).__name__!r} are not understood; give a list of dicts, a DataFrame or a "
        ".csv/.parquet path",
        field="events",
    )


def _events_of_frame(frame: pd.DataFrame, what: str) -> list[dict[str, str]]:
    """The events of a table with columns id (or event_id), feature_id and date."""
    import pandas as pd

    id_column = next((c for c in _EVENT_ID_COLUMNS if c in frame.columns), None)
    missing = [
        c
        for c, ok in (
            ("id or event_id", id_column),
            ("feature_id", "feature_id" in frame.columns),
            ("date", "date" in frame.columns),
        )
        if not ok
    ]
    if missing:
        raise RequestError(
            f"{what} has no column {' and '.join(repr(m) for m in missing)} (its columns: "
            f"{[str(c) for c in frame.columns]!r}); name the columns id, feature_id and date",
            field="events",
        )
    dates = frame["date"]
    if pd.api.types.is_datetime64_any_dtype(dates):
        dates = dates.dt.strftime("%Y-%m-%d")
    else:
        dates = dates.map(lambda d: d.isoformat() if hasattr(d, "isoformat") else d)
    for name, values in (("id", frame[id_column]), ("feature_id", frame["feature_id"]), ("date", dates)):
        empty = values.isna() | (values.astype(str) == "")
        if empty.any():
            row = int(empty.to_numpy().nonzero()[0][0])
            raise RequestError(f"{what}: row {row + 1} has no {name}; every event needs one", field="events")
    return [
        {"id": str(i), "feature_id": str(f), "date": str(d)}
        for i, f, d in zip(frame[id_column], frame["feature_id"], dates, strict=True)
    ]


def _friendly(request: dict[str, Any]) -> dict[str, Any]:
    """Accept Python shorthands: years/baseline as (start, end), baseline as an int (trailing), season months."""
    out = dict(request)
    for key in ("years", "baseline"):
        value = out.get(key)
        if isinstance(value, tuple | list) and len(value) == 2:
            out[key] = {"start": int(value[0]), "end": int(value[1])}
        elif key == "baseline" and isinstance(value, int) and not isinstance(value, bool):
            out[key] = {"trailing": value}
        elif key == "years" and isinstance(value, int) and not isinstance(value, bool):
            out[key] = {"start": value, "end": value}
    season = out.get("season")
    if isinstance(season, tuple | list):
        if len(season) == 2 and all(isinstance(s, str) for s in season):
            out["season"] = {"start": season[0], "end": season[1]}
        else:
            out["season"] = {"months": list(season)}
    for key in ("pairs", "sequences", "lags"):
        if isinstance(out.get(key), tuple):
            out[key] = list(out[key])
    if out.get("events") is not None:
        out["events"] = events_list(out["events"])
    return out


def build_request(features: Any, id_column: str | None = None, **request: Any) -> dict[str, Any]:
    """The JSON body of an indicator request, checked against the shared schema (raises on a bad field)."""
    from service.schemas import IndicatorRequest, validate_request

    document, crs = features_document(features, id_column)
    body = _friendly(request)
    body["features"] = document
    if crs is not None and "crs" not in body:
        body["crs"] = crs
    validate_request(IndicatorRequest, body)
    return body


def feature_count(body: Mapping[str, Any]) -> int:
    """How many features a request body sends."""
    features = body.get("features") or {}
    return len(features.get("features", [])) if features.get("type") == "FeatureCollection" else 1


def frame_from_parquet(data: bytes) -> pd.DataFrame:
    """A wxshock Parquet result as a DataFrame with attrs['provenance'] and attrs['warnings']."""
    import pandas as pd

    from service.encode import read_parquet_provenance

    frame = pd.read_parquet(io.BytesIO(data))
    try:
        document = read_parquet_provenance(data)
    except ValueError:
        document = {}
    frame.attrs["provenance"] = document.get("provenance", {})
    frame.attrs["warnings"] = document.get("warnings", [])
    return frame


# --- the client -----------------------------------------------------------------------------------------------


class Client:
    """A wxshock server at ``base_url``; ``token`` (else $WXSHOCK_TOKEN) is sent as a bearer token."""

    def __init__(
        self,
        base_url: str,
        token: str | None = None,
        *,
        timeout: float = 300.0,
        connect_timeout: float = 10.0,
        retries: int = 3,
        backoff: float = 0.5,
        on_demand_features: int = ON_DEMAND_FEATURES,
        transport: httpx.BaseTransport | None = None,
    ) -> None:
        if not str(base_url).startswith(("http://", "https://")):
            raise RequestError(f"server URL {base_url!r} must start with http:// or https://", field="server")
        token = token if token is not None else os.environ.get("WXSHOCK_TOKEN") or None
        headers = {"User-Agent": f"wxshock-client/{__version__}"}
        if token:
            headers["Authorization"] = f"Bearer {token}"
        self.base_url = str(base_url).rstrip("/")
        self.retries = retries
        self.backoff = backoff
        self.on_demand_features = on_demand_features
        self._http = httpx.Client(
            base_url=self.base_url,
            headers=headers,
            timeout=httpx.Timeout(timeout, connect=connect_timeout),
            transport=transport,
        )

    def __enter__(self) -> Client:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def close(self) -> None:
        """Close the connection pool."""
        self._http.close()

    def __repr__(self) -> str:
        return f"Client({self.base_url!r})"

    # --- plumbing ---

    def request(self, method: str, path: str, **kwargs: Any) -> httpx.Response:
        """One HTTP exchange, retried on connection errors and 502/503/504; any other error raises ServerError."""
        attempt = 0
        while True:
            try:
                response = self._http.request(method, path, **kwargs)
            except (
                httpx.ConnectError,
                httpx.ConnectTimeout,
                httpx.RemoteProtocolError,
                httpx.ReadError,
            ) as exc:
                if attempt >= self.retries:
                    raise ServerUnreachableError(
                        f"{method} {self.base_url}{path}: no answer after {attempt + 1} attempts ({exc}); is the "
                        "server running at that address?"
                    ) from None
                self._sleep(attempt, None)
                attempt += 1
                continue
            if response.status_code in _RETRY_STATUSES and attempt < self.retries:
                self._sleep(attempt, response.headers.get("Retry-After"))
                attempt += 1
                continue
            if response.status_code >= 400:
                raise ServerError(response.status_code, _problem(response), method=method, url=path)
            return response

    def _sleep(self, attempt: int, retry_after: str | None) -> None:
        """Wait before a retry: the server's Retry-After when it gives seconds, else exponential back-off."""
        delay = self.backoff * (2**attempt)
        if retry_after and retry_after.strip().isdigit():
            delay = min(float(retry_after), 30.0)
        time.sleep(delay)

    def get_json(self, path: str, **params: Any) -> Any:
        """GET a JSON document."""
        return self.request("GET", path, params=params or None).json()

    # --- what the server offers ---

    def health(self) -> dict[str, Any]:
        """GET /health."""
        return self.get_json("/health")

    def datasets(self) -> list[dict[str, Any]]:
        """Every dataset the server serves (the first is the default)."""
        return self.get_json("/v1/datasets")["datasets"]

    def dataset(self, name: str) -> dict[str, Any]:
        """What one dataset holds: variables, grid, years, calendar, layers, fingerprint."""
        return self.get_json(f"/v1/datasets/{name}")

    def catalog(self) -> pd.DataFrame:
        """The indicator catalog as a table: name, unit, family, definition, source, parameters."""
        import pandas as pd

        return pd.DataFrame(self.get_json("/v1/indicators")["indicators"])

    # --- indicators ---

    def indicators(
        self,
        features: Any,
        *,
        id_column: str | None = None,
        as_job: bool | None = None,
        progress: bool = True,
        **request: Any,
    ) -> pd.DataFrame:
        """Season indicators of the communities as a DataFrame, one row per (feature_id, year).

        ``features``: GeoJSON dict, file path (GeoJSON, GeoPackage, Shapefile) or GeoDataFrame; ``request``:
        the fields of the request (years, season, baseline, indicators, classes, lags, pairs, sequences,
        spells, weighting, layout, dataset, events, windows, variants, lag_values). ``events`` may be a list
        of dicts, a DataFrame or a .csv/.parquet path (columns id, feature_id, date: see
        :func:`events_list`); with events the table has one row per event. More than
        ``on_demand_features`` features (or ``as_job=True``) go as a batch job, followed with a progress bar.
        Provenance and warnings are in ``df.attrs``.
        """
        body = build_request(features, id_column, **request)
        if as_job or (as_job is None and feature_count(body) > self.on_demand_features):
            job = self._submit_body(body, "parquet", None).wait(progress=progress)
            frame = job.result()
            frame.attrs["job_id"] = job.id
            return frame
        response = self.request(
            "POST", "/v1/indicators", json=body, params={"format": "parquet"}, headers={"Accept": PARQUET}
        )
        return frame_from_parquet(response.content)

    def series(self, features: Any, *, id_column: str | None = None, **request: Any) -> pd.DataFrame:
        """The daily area-weighted series (one row per feature_id and date) as a DataFrame."""
        document, crs = features_document(features, id_column)
        body = _friendly(request) | {"features": document}
        if crs is not None:
            body.setdefault("crs", crs)
        response = self.request(
            "POST", "/v1/series", json=body, params={"format": "parquet"}, headers={"Accept": PARQUET}
        )
        return frame_from_parquet(response.content)

    def series_plot(self, features: Any, *, id_column: str | None = None, **request: Any) -> bytes:
        """PNG of one community's seasonal z-scores over the years (POST /v1/plots/series)."""
        body = build_request(features, id_column, **request)
        return self.request("POST", "/v1/plots/series", json=body, headers={"Accept": "image/png"}).content

    def map_plot(
        self,
        features: Any,
        *,
        year: int | None = None,
        indicator: str = "prcp_total",
        id_column: str | None = None,
        **request: Any,
    ) -> bytes:
        """PNG of one season-year's anomaly over the grid with the communities outlined (POST /v1/plots/map)."""
        body = build_request(features, id_column, **request)
        params: dict[str, Any] = {"indicator": indicator}
        if year is not None:
            params["year"] = year
        return self.request(
            "POST", "/v1/plots/map", json=body, params=params, headers={"Accept": "image/png"}
        ).content

    # --- batch jobs ---

    def submit(
        self,
        features: Any,
        *,
        id_column: str | None = None,
        format: str = "parquet",
        idempotency_key: str | None = None,
        **request: Any,
    ) -> Job:
        """Send a batch job (any number of features); returns its handle. See Job.wait and Job.result."""
        body = build_request(features, id_column, **request)
        return self._submit_body(body, format, idempotency_key)

    def _submit_body(self, body: dict[str, Any], fmt: str, idempotency_key: str | None) -> Job:
        """POST /v1/jobs with an Idempotency-Key, so that a retried submission never makes a second job."""
        key = idempotency_key or uuid.uuid4().hex
        media = JOB_MEDIA_TYPES.get(fmt)
        if media is None:
            raise RequestError(
                f"format {fmt!r} is not offered; choose {', '.join(JOB_MEDIA_TYPES)}", field="format"
            )
        response = self.request(
            "POST",
            "/v1/jobs",
            json=body,
            params={"format": fmt},
            headers={"Idempotency-Key": key, "Accept": media},
        )
        status = response.json()
        return Job(self, status["id"], status)

    def job(self, job_id: str) -> Job:
        """The handle of an existing job."""
        return Job(self, job_id, self.get_json(f"/v1/jobs/{job_id}"))


class Job:
    """A batch job on the server: its status, a progress-bar wait, its result and cancel."""

    def __init__(self, client: Client, job_id: str, status: dict[str, Any]) -> None:
        self.client = client
        self.id = job_id
        self.last_status = status

    def __repr__(self) -> str:
        s = self.last_status
        return (
            f"Job({self.id!r}, state={s.get('state')!r}, {s.get('features_done')}/{s.get('features_total')})"
        )

    @property
    def state(self) -> str:
        """The state at the last look: queued, running, succeeded, failed or cancelled."""
        return str(self.last_status.get("state"))

    def status(self) -> dict[str, Any]:
        """GET /v1/jobs/{id}: state, features done and total, seconds left."""
        self.last_status = self.client.get_json(f"/v1/jobs/{self.id}")
        return self.last_status

    def wait(
        self,
        *,
        progress: bool = True,
        poll: float = 0.5,
        timeout: float | None = None,
        on_status: Callable[[dict[str, Any]], None] | None = None,
    ) -> Job:
        """Follow the job until it finishes, with a bar of features done, total and time left.

        Polls every ``poll`` seconds, sooner at first (0.1 s, doubling), so a short job is not kept waiting.
        Raises JobFailedError (with the job's problem document) when it fails or is cancelled, and
        TimeoutError when ``timeout`` seconds pass first (the job keeps running on the server).
        """
        from tqdm import tqdm

        started = time.monotonic()
        polls = 0
        status = self.last_status
        bar = (
            tqdm(total=int(status.get("features_total") or 0), unit="feature", desc=f"job {self.id[:8]}")
            if progress
            else None
        )
        try:
            while True:
                status = self.status()
                if on_status is not None:
                    on_status(status)
                if bar is not None:
                    bar.total = int(status.get("features_total") or bar.total)
                    done = int(status.get("features_done") or 0)
                    if done > bar.n:
                        bar.update(done - bar.n)  # through update(), so tqdm's rate and time left follow
                    left = status.get("seconds_left")
                    bar.set_postfix_str(
                        f"{status['state']}"
                        + (f", server estimate {left:.0f} s left" if left is not None else ""),
                        refresh=False,
                    )
                    bar.refresh()
                if status.get("state") in _FINISHED:
                    break
                if timeout is not None and time.monotonic() - started > timeout:
                    raise TimeoutError(
                        f"job {self.id} still {status.get('state')} after {timeout} s "
                        f"({status.get('features_done')}/{status.get('features_total')} features); "
                        "it keeps running: call wait() again"
                    )
                time.sleep(min(poll, 0.1 * 2**polls))
                polls += 1
        finally:
            if bar is not None:
                bar.close()
        if status["state"] != "succeeded":
            problem = status.get("error") or {
                "title": f"Job {status['state']}",
                "detail": f"job {self.id} was {status['state']}",
            }
            raise JobFailedError(int(problem.get("status") or 409), problem, method="job", url=self.id)
        return self

    def result_bytes(self) -> httpx.Response:
        """The finished result as the server stored it (GET /v1/jobs/{id}/result)."""
        return self.client.request("GET", f"/v1/jobs/{self.id}/result")

    def result(self) -> pd.DataFrame:
        """The finished table as a DataFrame (a Parquet job keeps provenance and warnings in attrs)."""
        import pandas as pd

        response = self.result_bytes()
        kind = response.headers.get("content-type", "").split(";")[0].strip()
        if kind in (PARQUET, "application/x-parquet"):
            return frame_from_parquet(response.content)
        if kind == "application/zip":  # a replication bundle: its Parquet copy keeps provenance and warnings
            import zipfile

            with zipfile.ZipFile(io.BytesIO(response.content)) as bundle:
                return frame_from_parquet(bundle.read("table.parquet"))
        if kind == "application/x-stata-dta":
            frame = pd.read_stata(io.BytesIO(response.content), convert_categoricals=False)
            frame.attrs["provenance"] = _provenance_headers(response.headers)
            return frame
        if kind == "text/csv":
            frame = pd.read_csv(io.BytesIO(response.content))
            frame.attrs["provenance"] = _provenance_headers(response.headers)
            return frame
        document = response.json()
        frame = pd.DataFrame(document["rows"], columns=document["columns"])
        frame.attrs["provenance"] = document.get("provenance", {})
        frame.attrs["warnings"] = document.get("warnings", [])
        return frame

    def cancel(self) -> dict[str, Any]:
        """DELETE /v1/jobs/{id}: stop the job between feature batches."""
        response = self.client.request("DELETE", f"/v1/jobs/{self.id}")
        self.last_status = response.json() if response.content else self.status()
        return self.last_status


def _problem(response: httpx.Response) -> dict[str, Any]:
    """The problem document of an error response (a plain one when the body is not JSON)."""
    try:
        document = response.json()
    except ValueError:
        document = None
    if isinstance(document, dict):
        return document
    return {"status": response.status_code, "title": response.reason_phrase, "detail": response.text[:500]}


def _provenance_headers(headers: Mapping[str, str]) -> dict[str, str]:
    """The X-Wxshock-* provenance headers of a CSV answer, by their short names."""
    prefix = "x-wxshock-"
    return {
        key[len(prefix) :].replace("-", "_"): value
        for key, value in headers.items()
        if key.lower().startswith(prefix)
    }


# --- wxshock submit -------------------------------------------------------------------------------------------


def job_format_from_suffix(path_suffix: str) -> str:
    """The job result format of an output file's suffix (.parquet or .pq, .csv, .json, .dta, .zip)."""
    suffix = path_suffix.lower().lstrip(".")
    fmt = _SUFFIX_ALIASES.get(suffix, suffix)
    if fmt not in JOB_MEDIA_TYPES:
        raise RequestError(
            f"cannot tell the output format from the suffix {path_suffix!r}; use "
            f"{', '.join('.' + name for name in JOB_MEDIA_TYPES if name != 'bundle')}, .zip (a bundle)",
            field="out",
        )
    return fmt


def submit_files(
    *,
    server: str,
    request_path: Path,
    features_path: Path | None,
    out_path: Path,
    events_path: Path | None = None,
    token: str | None = None,
    progress: bool = True,
) -> Path:
    """`wxshock submit`: send REQUEST.json (features replaced by FILE's) as a job, follow it, save its result.

    The output format follows the suffix of ``out_path`` (.parquet, .csv, .json); the bytes written are the
    server's, so they equal `wxshock compute`'s for the same request and store. A CSV gets a
    ``.provenance.json`` beside it.
    """
    # Not service.pipeline (dask, zarr, xarray: 5 s of imports): the server's bytes are written as they come.
    from service.files import write_atomically

    fmt = job_format_from_suffix(out_path.suffix)
    try:
        body = json.loads(Path(request_path).read_text(encoding="utf-8"))
    except (OSError, json.JSONDecodeError) as exc:
        raise RequestError(f"cannot read the request {str(request_path)!r}: {exc}", field="request") from None
    if not isinstance(body, dict):
        raise RequestError(f"the request {str(request_path)!r} is not a JSON object", field="request")
    features = features_path if features_path is not None else body.pop("features", None)
    if features is None:
        raise RequestError(
            f"the request {str(request_path)!r} has no 'features'; add them or pass --features FILE",
            field="features",
        )
    body.pop("features", None)
    if events_path is not None:  # a CSV or Parquet file of events replaces the request's own
        body["events"] = events_list(events_path)
    with Client(server, token) as client:
        full = build_request(features, **body)
        job = client._submit_body(full, fmt, None)
        if progress:
            print(f"wxshock submit: job {job.id} accepted ({feature_count(full)} features)")
        job.wait(progress=progress)
        response = job.result_bytes()
    write_atomically(Path(out_path), response.content)
    if fmt == "csv":
        sidecar = Path(out_path).with_name(Path(out_path).name + ".provenance.json")
        # The job's skipped features (invalid_features 'skip') go beside the provenance: CSV has no metadata.
        skipped = (job.last_status or {}).get("skipped", [])
        document = {"provenance": _provenance_headers(response.headers), "skipped_features": skipped}
        write_atomically(sidecar, json.dumps(document, indent=2).encode())
    if progress:
        print(f"wxshock submit: wrote {out_path}")
    return Path(out_path)

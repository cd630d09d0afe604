"""What the route handlers share: the service state (settings, opened datasets, job runner), auth, limits."""

from __future__ import annotations

import hashlib
import hmac
from dataclasses import dataclass
from pathlib import Path
from typing import Annotated, Any

from fastapi import Depends, Request
from fastapi.security import HTTPAuthorizationCredentials, HTTPBearer
from pydantic import BaseModel
from pydantic_core import PydanticSerializationError

from service.errors import AuthError, LimitExceededError, RequestError, StoreError, WxshockError
from service.jobs import JobRunner
from service.registry import StoreRegistry
from service.settings import Settings


@dataclass
class ServiceState:
    """Everything a running app holds: set up once in the lifespan, read by every request."""

    settings: Settings
    token_digests: frozenset[str]
    registry: StoreRegistry | None = None
    jobs: JobRunner | None = None


def load_token_digests(settings: Settings) -> frozenset[str]:
    """SHA-256 hex digests of every configured bearer token (plain tokens and the token file)."""
    digests = {hashlib.sha256(t.get_secret_value().encode()).hexdigest() for t in settings.tokens}
    if settings.token_file is not None:
        digests |= read_token_file(Path(settings.token_file))
    return frozenset(digests)


def read_token_file(path: Path) -> set[str]:
    """The digests of a token file: one SHA-256 hex digest a line, '#' starts a comment."""
    try:
        lines = path.read_text(encoding="utf-8").splitlines()
    except OSError as exc:
        raise WxshockError(f"cannot read the token file (setting token_file): {exc.strerror}") from None
    digests = set()
    for number, line in enumerate(lines, start=1):
        text = line.split("#", 1)[0].strip().lower()
        if not text:
            continue
        if len(text) != 64 or any(c not in "0123456789abcdef" for c in text):
            raise WxshockError(
                f"token file line {number} is not a SHA-256 hex digest (64 hex digits); write "
                "`printf %s TOKEN | sha256sum` output, one digest a line"
            )
        digests.add(text)
    return digests


def service_state(request: Request) -> ServiceState:
    """The app's ServiceState."""
    return request.app.state.service


State = Annotated[ServiceState, Depends(service_state)]


def get_settings(state: State) -> Settings:
    """The settings the app was created with."""
    return state.settings


def get_registry(state: State) -> StoreRegistry:
    """The opened datasets (503 while they are not open)."""
    if state.registry is None:
        raise StoreError("the datasets are not open yet; try again in a moment")
    return state.registry


def get_jobs(state: State) -> JobRunner:
    """The job runner (503 while it is not running)."""
    if state.jobs is None:
        raise StoreError("the job worker is not running yet; try again in a moment")
    return state.jobs


_bearer = HTTPBearer(
    auto_error=False,
    description="Needed on every /v1 route when the server has tokens configured; /health stays open.",
)


def require_token(
    state: State, credentials: Annotated[HTTPAuthorizationCredentials | None, Depends(_bearer)]
) -> None:
    """Refuse the request unless auth is off or it carries a configured bearer token."""
    if not state.token_digests:
        return
    if credentials is None or credentials.scheme.lower() != "bearer" or not credentials.credentials:
        raise AuthError("this server needs a bearer token: send 'Authorization: Bearer TOKEN'")
    presented = hashlib.sha256(credentials.credentials.encode()).hexdigest()
    # Compare against every digest, in constant time each, so timing tells nothing about which nearly matched.
    matched = False
    for digest in state.token_digests:
        matched |= hmac.compare_digest(presented, digest)
    if not matched:
        raise AuthError("the bearer token is not valid on this server")


AppSettings = Annotated[Settings, Depends(get_settings)]
Registry = Annotated[StoreRegistry, Depends(get_registry)]
Jobs = Annotated[JobRunner, Depends(get_jobs)]


def check_feature_count(count: int, allowed: int, limit: str, *, on_demand: bool) -> None:
    """Refuse more features than a limit allows (413), suggesting a batch job for on-demand requests."""
    if count <= allowed:
        return
    hint = (
        " for more, submit a batch job to POST /v1/jobs"
        if on_demand
        else " split the features into several jobs"
    )
    raise LimitExceededError(
        f"the request sends {count} features; at most {allowed} are allowed (setting {limit});{hint}",
        limit=limit,
        allowed=allowed,
        got=count,
        status=413,
        pointer="/features/features",
    )


def feature_total(features: Any) -> int:
    """How many features a request's FeatureCollection or Feature holds."""
    return len(getattr(features, "features", None) or [features])


def check_on_demand(body: Any, settings: Settings) -> None:
    """Refuse an on-demand body that holds unencodable text (422) or more than max_features_on_demand (413)."""
    ensure_encodable(body)
    check_feature_count(
        feature_total(body.features),
        settings.max_features_on_demand,
        "max_features_on_demand",
        on_demand=True,
    )


def table_responses(json_description: str) -> dict[int | str, dict[str, Any]]:
    """The OpenAPI 200 entry of a route answering JSON, CSV or Parquet by Accept or ?format=."""
    return {
        200: {
            "description": json_description,
            "content": {
                "text/csv": {"schema": {"type": "string"}},
                "application/vnd.apache.parquet": {"schema": {"type": "string", "format": "binary"}},
            },
            "headers": {
                name: {"schema": {"type": "string"}, "description": description}
                for name, description in PROVENANCE_HEADERS.items()
            },
        }
    }


PROVENANCE_HEADERS = {
    "X-Wxshock-Dataset": "Dataset name.",
    "X-Wxshock-Fingerprint": "Fingerprint of the dataset's contents.",
    "X-Wxshock-Request-Hash": "Hash of the resolved request, dataset fingerprint and software version.",
    "X-Wxshock-Software": "Software name and version.",
}


def ensure_encodable(body: BaseModel) -> None:
    """Refuse text that cannot be written back as UTF-8 (a lone surrogate escape such as "\\udcff")."""
    try:
        body.model_dump_json()
    except PydanticSerializationError:
        pointer = _first_unencodable(body.model_dump(mode="python"), "")
        raise RequestError(
            f"the request holds text that is not valid Unicode at {pointer or 'the body'} (a lone surrogate "
            "such as \\udcff); send the text as UTF-8",
            pointer=pointer,
        ) from None


def _first_unencodable(value: Any, pointer: str) -> str | None:
    """The JSON pointer of the first string (key or value) that UTF-8 cannot encode."""
    if isinstance(value, str):
        try:
            value.encode("utf-8")
        except UnicodeEncodeError:
            return pointer
        return None
    items: Any = (
        value.items() if isinstance(value, dict) else enumerate(value) if isinstance(value, list) else ()
    )
    for key, item in items:
        where = f"{pointer}/{str(key).replace('~', '~0').replace('/', '~1')}"
        if isinstance(key, str) and _first_unencodable(key, where) is not None:
            return where
        found = _first_unencodable(item, where)
        if found is not None:
            return found
    return None

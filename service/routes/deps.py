"""What the route handlers share: the service state (settings, opened datasets, job runner), auth, limits."""

from __future__ import annotations

import hashlib
import hmac
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Annotated, Any

from fastapi import Depends, Request
from fastapi.security import HTTPAuthorizationCredentials, HTTPBearer

from service.errors import AuthError, LimitExceededError, StoreError, WxshockError
from service.jobs import ANONYMOUS, JobRunner, Principal
from service.registry import StoreRegistry
from service.settings import Settings

_OWNER_NAME = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._@-]{0,63}$")


@dataclass
class ServiceState:
    """Everything a running app holds: set up once in the lifespan, read by every request."""

    settings: Settings
    tokens: dict[str, Principal]  # SHA-256 hex digest of a token -> its owner
    registry: StoreRegistry | None = None
    jobs: JobRunner | None = None


def plain_owner(digest: str) -> str:
    """The owner name of a token given without a name: 'token-' and the first 8 hex digits of its digest."""
    return f"token-{digest[:8]}"


def load_tokens(settings: Settings) -> dict[str, Principal]:
    """Every configured bearer token by SHA-256 hex digest: plain tokens (settings.tokens) and the token file.

    A token given twice (in either place, or in both) stops the start: two holders would share one owner
    without knowing it.
    """
    tokens: dict[str, Principal] = {}
    for token in settings.tokens:
        digest = hashlib.sha256(token.get_secret_value().encode()).hexdigest()
        tokens[digest] = Principal(plain_owner(digest))  # repeats among these are refused by Settings
    if settings.token_file is not None:
        for number, digest, principal in read_token_file(Path(settings.token_file)):
            if digest in tokens:
                raise WxshockError(
                    f"token file line {number}: this token is configured twice (again in the token file, or also "
                    "in WXSHOCK_TOKENS); give each token once"
                )
            tokens[digest] = principal
    return tokens


def read_token_file(path: Path) -> list[tuple[int, str, Principal]]:
    """The entries of a token file: '<sha256-hex> [<owner> [admin]]' a line, '#' starts a comment.

    A bare digest is a token of its own owner, 'token-<first 8 hex>'. Returns (line number, digest, owner).
    """
    try:
        lines = path.read_text(encoding="utf-8").splitlines()
    except (OSError, UnicodeDecodeError) as exc:
        reason = exc.strerror if isinstance(exc, OSError) else "it is not UTF-8 text"
        raise WxshockError(f"cannot read the token file (setting token_file): {reason}") from None
    entries: list[tuple[int, str, Principal]] = []
    for number, line in enumerate(lines, start=1):
        words = line.split("#", 1)[0].split()
        if not words:
            continue
        digest = words[0].lower()
        if len(digest) != 64 or any(c not in "0123456789abcdef" for c in digest):
            raise WxshockError(
                f"token file line {number} is not a SHA-256 hex digest (64 hex digits); write "
                "`printf %s TOKEN | sha256sum` output, then the owner's name and 'admin' for an admin, e.g. "
                "'<digest> alice' or '<digest> lead admin'"
            )
        if len(words) > 3 or (len(words) == 3 and words[2] != "admin"):
            raise WxshockError(
                f"token file line {number}: after the digest and the owner only the word 'admin' may follow; "
                "write '<digest> <owner>' or '<digest> <owner> admin'"
            )
        owner = words[1] if len(words) > 1 else plain_owner(digest)
        if len(words) > 1 and (not _OWNER_NAME.match(owner) or owner.startswith("token-")):
            raise WxshockError(
                f"token file line {number}: owner name {owner[:80]!r} is not allowed; use 1 to 64 letters, "
                "digits and . _ @ -, starting with a letter or digit and not with 'token-'"
            )
        entries.append((number, digest, Principal(owner, admin=len(words) == 3)))
    return entries


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


def principal_of(state: ServiceState, authorization: str | None) -> Principal | None:
    """The owner of the bearer token in an Authorization header (ANONYMOUS when auth is off), or None."""
    if not state.tokens:
        return ANONYMOUS
    scheme, _, token = (authorization or "").strip().partition(" ")
    token = token.strip()
    if scheme.lower() != "bearer" or not token:
        return None
    presented = hashlib.sha256(token.encode()).hexdigest()
    # Compare against every digest, in constant time each and without stopping at a match, so that timing
    # tells nothing about which digest nearly matched or where the match was.
    matched: Principal | None = None
    for digest, principal in state.tokens.items():
        if hmac.compare_digest(presented, digest):
            matched = principal
    return matched


def require_token(
    state: State, credentials: Annotated[HTTPAuthorizationCredentials | None, Depends(_bearer)]
) -> Principal:
    """The caller: refused unless auth is off or the request carries a configured bearer token."""
    if not state.tokens:
        return ANONYMOUS
    if credentials is None or credentials.scheme.lower() != "bearer" or not credentials.credentials:
        raise AuthError("this server needs a bearer token: send 'Authorization: Bearer TOKEN'")
    matched = principal_of(state, f"Bearer {credentials.credentials}")
    if matched is None:
        raise AuthError("the bearer token is not valid on this server")
    return matched


Caller = Annotated[Principal, Depends(require_token)]
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
    """Refuse an on-demand body with more than max_features_on_demand features (413).

    Text that UTF-8 cannot encode was refused when the body was read (service.routes.body).
    """
    check_feature_count(
        feature_total(body.features),
        settings.max_features_on_demand,
        "max_features_on_demand",
        on_demand=True,
    )


def table_responses(json_description: str, *, bundle: bool = True) -> dict[int | str, dict[str, Any]]:
    """The OpenAPI 200 entry of a route answering JSON, CSV, Parquet, Stata (or a bundle) by Accept or ?format=."""
    return {
        200: {
            "description": json_description,
            "content": {
                "text/csv": {"schema": {"type": "string"}},
                "application/vnd.apache.parquet": {"schema": {"type": "string", "format": "binary"}},
                "application/x-stata-dta": {"schema": {"type": "string", "format": "binary"}},
                **({"application/zip": {"schema": {"type": "string", "format": "binary"}}} if bundle else {}),
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
    "X-Wxshock-Variants": "With variants: each one's name, dataset and fingerprint (name=dataset@fingerprint, ...).",
}

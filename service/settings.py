"""The service's one settings object; every field can be set by a WXSHOCK_* environment variable."""

from __future__ import annotations

import json
from functools import lru_cache
from pathlib import Path
from typing import Annotated

from pydantic import Field, SecretStr, field_validator
from pydantic_settings import BaseSettings, NoDecode, SettingsConfigDict

# Shorter bearer tokens are refused at start: 16 random characters are beyond guessing over a network.
MIN_TOKEN_LENGTH = 16


def _default_data_dir() -> Path:
    """Where built demo stores, job records and results live unless told otherwise."""
    return Path.home() / ".local" / "share" / "wxshock"


class Settings(BaseSettings):
    """Validated at start; passed in (create_app(settings), run(..., settings)) rather than read globally."""

    # hide_input_in_errors: a refused setting is never echoed (it may be a token or a key).
    model_config = SettingsConfigDict(env_prefix="WXSHOCK_", extra="ignore", hide_input_in_errors=True)

    # where data lives
    data_dir: Path = Field(
        default_factory=_default_data_dir, description="Demo store, job database and results."
    )
    stores: Annotated[list[str], NoDecode] = Field(
        default_factory=list,
        description="Store locations (directories or s3:// URLs), each served as a dataset named after its stem. "
        "Empty: serve the demo dataset, building it in data_dir on first start.",
    )
    demo_size: str = Field(
        default="small",
        description="Size of the demo store built on first start: tiny (tests), small or large.",
    )

    # serving
    host: str = "127.0.0.1"
    port: int = Field(default=8000, ge=1, le=65535)
    cors_origins: Annotated[list[str], NoDecode] = Field(
        default_factory=list, description="Allowed CORS origins; empty means CORS off."
    )
    tokens: Annotated[list[SecretStr], NoDecode] = Field(
        default_factory=list,
        description="Bearer tokens (plain), separated by commas (a comma always separates two tokens); each "
        f"at least {MIN_TOKEN_LENGTH} characters; when any token is configured every /v1 route needs one. "
        "A plain token's owner is 'token-' and the first 8 hex digits of its SHA-256.",
    )
    token_file: Path | None = Field(
        default=None,
        description="File of bearer tokens, one a line: '<sha256-hex> [<owner> [admin]]' ('#' starts a "
        "comment). Jobs belong to the owner of the token that submitted them; an admin sees every job.",
    )

    # limits
    max_body_bytes: int = Field(default=50_000_000, ge=1_000)
    max_features_on_demand: int = Field(default=200, ge=1)
    max_features_per_job: int = Field(default=100_000, ge=1)
    max_vertices_per_feature: int = Field(default=100_000, ge=4)
    max_cells_per_feature: int = Field(default=250_000, ge=1)
    max_years_per_request: int = Field(default=200, ge=1)
    max_missing_share: float = Field(
        default=0.10,
        ge=0.0,
        le=1.0,
        description="Default share of missing days above which a season is not reported.",
    )

    # execution
    scheduler: str | None = Field(
        default=None, description="dask.distributed scheduler address; None: local threads."
    )
    threads: int | None = Field(default=None, ge=1, description="Local dask threads; None: one per core.")
    weights_cache_size: int = Field(
        default=64, ge=0, description="Weight matrices kept in memory, by geometry hash."
    )
    tile_cache_mb: int = Field(
        default=192,
        ge=0,
        description="Decoded store chunks kept in memory by the server (MB; 0: none): repeated on-demand "
        "requests over the same cells skip decoding.",
    )
    job_workers: int = Field(default=1, ge=1, le=16)
    job_batch_series_mb: int = Field(
        default=64,
        ge=1,
        description="Daily means (MB, float64) one feature batch of a job may hold on local threads: jobs take "
        "smaller batches than on-demand requests, so that a server's memory stays flat in the number of "
        "features (bench/RESULTS.md, 'Scale').",
    )
    job_batches_in_flight: int = Field(
        default=1,
        ge=1,
        le=8,
        description="Feature batches of a job computed at once on local threads (on a cluster: one per worker "
        "thread, the server holding only their tables).",
    )
    job_retention_hours: float = Field(default=168.0, gt=0)
    min_free_bytes: int = Field(
        default=200_000_000,
        ge=0,
        description="New jobs are refused (507) while the data directory has less free space than this.",
    )

    # object storage (s3:// stores)
    s3_endpoint_url: str | None = None
    s3_access_key_id: SecretStr | None = None
    s3_secret_access_key: SecretStr | None = None
    s3_region: str | None = None

    @field_validator("stores", "cors_origins", mode="before")
    @classmethod
    def _split_commas(cls, value: object) -> object:
        """Accept a comma-separated string from the environment as well as a JSON list."""
        if isinstance(value, str):
            if value.lstrip().startswith("["):
                return json.loads(value)
            return [item.strip() for item in value.split(",") if item.strip()]
        return value

    @field_validator("tokens", mode="before")
    @classmethod
    def _split_tokens(cls, value: object) -> object:
        """Tokens from a string (or JSON list) or a list; a comma always separates two tokens, even in a list."""
        if isinstance(value, str) and value.lstrip().startswith("["):
            try:
                value = json.loads(value)
            except json.JSONDecodeError:
                raise ValueError("tokens start with '[' but are not a JSON list of strings") from None
        items = [value] if isinstance(value, str) else value
        if not isinstance(items, list | tuple):
            return value
        texts = [i.get_secret_value() if isinstance(i, SecretStr) else i for i in items]
        if not all(isinstance(t, str) for t in texts):
            return value
        return [part.strip() for text in texts for part in text.split(",") if part.strip()]

    @field_validator("tokens")
    @classmethod
    def _strong_and_distinct(cls, tokens: list[SecretStr]) -> list[SecretStr]:
        """Each token long enough to resist guessing, and none given twice (never echoing a token)."""
        seen: dict[str, int] = {}
        for number, token in enumerate(tokens, start=1):
            text = token.get_secret_value()
            if len(text) < MIN_TOKEN_LENGTH:
                raise ValueError(
                    f"token {number} of {len(tokens)} has {len(text)} characters; a token needs at least "
                    f"{MIN_TOKEN_LENGTH} (make one with: python -c 'import secrets; "
                    "print(secrets.token_urlsafe(24))'); commas separate tokens"
                )
            if text in seen:
                raise ValueError(
                    f"token {number} of {len(tokens)} repeats token {seen[text]}; give each token once"
                )
            seen[text] = number
        return tokens

    @field_validator("demo_size")
    @classmethod
    def _check_demo_size(cls, value: str) -> str:
        """Only the two generator sizes exist."""
        if value not in ("tiny", "small", "large"):
            raise ValueError(f"demo_size must be 'tiny', 'small' or 'large', got {value!r}")
        return value

    def storage_options(self) -> dict[str, object]:
        """fsspec options for s3:// stores (endpoint and credentials); empty when none are set."""
        options: dict[str, object] = {}
        if self.s3_access_key_id is not None:
            options["key"] = self.s3_access_key_id.get_secret_value()
        if self.s3_secret_access_key is not None:
            options["secret"] = self.s3_secret_access_key.get_secret_value()
        client_kwargs: dict[str, str] = {}
        if self.s3_endpoint_url:
            client_kwargs["endpoint_url"] = self.s3_endpoint_url
        if self.s3_region:
            client_kwargs["region_name"] = self.s3_region
        if client_kwargs:
            options["client_kwargs"] = client_kwargs
        return options


@lru_cache(maxsize=1)
def get_settings() -> Settings:
    """Settings from the environment, read once (the CLI's default; tests build their own Settings)."""
    return Settings()

"""Settings: environment variables with the WXSHOCK_ prefix, validated at start."""

from __future__ import annotations

import pytest
from pydantic import ValidationError

from service.settings import Settings


def test_environment_variables_are_read(monkeypatch: pytest.MonkeyPatch, tmp_path) -> None:
    monkeypatch.setenv("WXSHOCK_DATA_DIR", str(tmp_path))
    monkeypatch.setenv("WXSHOCK_STORES", "/a/one.zarr, s3://bucket/two.zarr")
    monkeypatch.setenv("WXSHOCK_MAX_FEATURES_ON_DEMAND", "50")
    monkeypatch.setenv("WXSHOCK_SCHEDULER", "tcp://127.0.0.1:8786")
    settings = Settings()
    assert settings.data_dir == tmp_path
    assert settings.stores == ["/a/one.zarr", "s3://bucket/two.zarr"]
    assert settings.max_features_on_demand == 50
    assert settings.scheduler == "tcp://127.0.0.1:8786"


def test_bad_values_are_refused_at_start(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("WXSHOCK_PORT", "70000")
    with pytest.raises(ValidationError, match="port"):
        Settings()


def test_demo_size_is_checked() -> None:
    with pytest.raises(ValidationError, match="demo_size must be"):
        Settings(demo_size="huge")


def test_storage_options_carry_endpoint_and_secrets_without_showing_them() -> None:
    settings = Settings(
        s3_endpoint_url="http://127.0.0.1:9", s3_access_key_id="AKID", s3_secret_access_key="SEKRIT"
    )
    options = settings.storage_options()
    assert options == {
        "key": "AKID",
        "secret": "SEKRIT",
        "client_kwargs": {"endpoint_url": "http://127.0.0.1:9"},
    }
    assert "SEKRIT" not in repr(settings) and "SEKRIT" not in str(settings.model_dump())


def test_lists_also_come_as_json(monkeypatch: pytest.MonkeyPatch) -> None:
    monkeypatch.setenv("WXSHOCK_CORS_ORIGINS", '["http://127.0.0.1:3000"]')
    monkeypatch.setenv("WXSHOCK_TOKENS", "alpha-0123456789ab, beta-0123456789abc")
    settings = Settings()
    assert settings.cors_origins == ["http://127.0.0.1:3000"]
    assert [t.get_secret_value() for t in settings.tokens] == ["alpha-0123456789ab", "beta-0123456789abc"]


@pytest.mark.parametrize(
    "value",
    [
        "alpha-0123456789ab,beta-0123456789abc",
        '["alpha-0123456789ab,beta-0123456789abc"]',  # a comma separates tokens even inside a JSON item
        '["alpha-0123456789ab", "beta-0123456789abc"]',
    ],
)
def test_a_comma_always_separates_two_tokens(monkeypatch: pytest.MonkeyPatch, value: str) -> None:
    # Before: a comma inside a JSON-listed token was kept, while a plain list split it silently into two.
    monkeypatch.setenv("WXSHOCK_TOKENS", value)
    assert [t.get_secret_value() for t in Settings().tokens] == ["alpha-0123456789ab", "beta-0123456789abc"]


@pytest.mark.parametrize(
    ("value", "message"),
    [
        ("alpha-0123456789ab,short", "token 2 of 2 has 5 characters; a token needs at least 16"),
        # A comma splitting one long token into two short ones is caught by the length rule.
        ("0123456789,abcdefghij", "token 1 of 2 has 10 characters"),
        ("alpha-0123456789ab,alpha-0123456789ab", "token 2 of 2 repeats token 1"),
        ("[oops", "not a JSON list"),
    ],
)
def test_short_and_repeated_tokens_stop_the_start_without_being_echoed(
    monkeypatch: pytest.MonkeyPatch, value: str, message: str
) -> None:
    monkeypatch.setenv("WXSHOCK_TOKENS", value)
    with pytest.raises(ValidationError, match=message) as caught:
        Settings()
    assert "0123456789ab" not in str(caught.value) and "short" not in str(caught.value).replace(message, "")

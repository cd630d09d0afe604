"""The whole chain on the tiny demo store: request -> weights -> aggregation -> indicators -> bytes."""

from __future__ import annotations

import io
import json
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest

from service.cli import main
from service.encode import encode, read_parquet_provenance
from service.errors import LimitExceededError, UnknownDatasetError
from service.pipeline import pick_store, run, run_series
from service.schemas import IndicatorRequest, SeriesRequest, validate_request
from service.settings import Settings
from service.store import open_store

EXAMPLE_REQUEST = Path(__file__).parents[1] / "examples" / "request.json"


def example_request(features: dict[str, Any]) -> dict[str, Any]:
    """The example request of the indicator issue (examples/request.json) on the given features."""
    return {**json.loads(EXAMPLE_REQUEST.read_text(encoding="utf-8")), "features": features}


@pytest.fixture(scope="module")
def settings(tmp_path_factory: pytest.TempPathFactory) -> Settings:
    return Settings(data_dir=tmp_path_factory.mktemp("data"), threads=2)


@pytest.fixture(scope="module")
def store(tiny_demo: Path):
    return open_store(tiny_demo)


@pytest.fixture(scope="module")
def example_result(store, settings, tiny_communities):
    request = validate_request(IndicatorRequest, example_request(tiny_communities))
    return run(request, store, settings)


def test_one_row_per_feature_and_year(example_result, tiny_communities) -> None:
    frame = example_result.frame
    ids = [str(f.get("id", f.get("properties", {}).get("id"))) for f in tiny_communities["features"]]
    assert len(frame) == len(ids) * (2018 - 1991 + 1)
    assert not frame.duplicated(["feature_id", "year"]).any()
    assert frame["feature_id"].drop_duplicates().tolist() == ids  # request order kept
    for column in [
        "prcp_total",
        "prcp_total_z",
        "prcp_total_class",
        "tmean_z_lag2",
        "coverage",
        "season_complete",
        "dry_hot_run",
        "dry_hot_count",
    ]:
        assert column in frame.columns, column
    assert frame["coverage"].between(0, 1).all()


def test_values_are_plausible_for_the_demo_climate(example_result) -> None:
    # The demo generator makes a clear rainy season and tmean of roughly 15-30 degC (its own design).
    frame = example_result.frame
    assert (frame["prcp_total"].dropna() > 0).all()
    assert frame["tmean"].dropna().between(0, 40).all()
    z = frame["prcp_total_z"].dropna()
    assert abs(z.mean()) < 1.5 and 0.3 < z.std() < 3.0


def test_provenance_names_the_data_and_the_request(example_result, store) -> None:
    prov = example_result.provenance
    assert prov["dataset"] == store.name and prov["fingerprint"] == store.fingerprint
    assert prov["request_hash"].startswith("sha256:")
    assert prov["request"]["baseline"] == {"start": 1980, "end": 1990}
    assert prov["request"]["features"]["count"] == example_result.frame["feature_id"].nunique()


def test_same_request_same_bytes_whatever_the_batching(
    store, settings, tiny_communities, example_result
) -> None:
    request = validate_request(IndicatorRequest, example_request(tiny_communities))
    batched = run(request, store, settings, batch_size=7)
    for fmt in ("json", "csv", "parquet"):
        assert encode(batched, fmt)[0] == encode(example_result, fmt)[0], fmt


def test_progress_reports_features(store, settings, tiny_communities) -> None:
    seen: list[tuple[int, int]] = []
    request = validate_request(IndicatorRequest, {**example_request(tiny_communities), "lags": [0]})
    run(request, store, settings, progress=lambda done, total: seen.append((done, total)), batch_size=10)
    total = len(tiny_communities["features"])
    assert seen[0] == (0, total) and seen[-1] == (total, total)
    assert [d for d, _ in seen] == sorted(d for d, _ in seen)


def test_parquet_merges_onto_a_person_year_panel(tmp_path: Path, tiny_demo: Path, tiny_communities) -> None:
    request_path = tmp_path / "request.json"
    features_path = tmp_path / "communities.geojson"
    body = example_request(tiny_communities)
    body.pop("features")
    request_path.write_text(json.dumps(body))
    features_path.write_text(json.dumps(tiny_communities))
    out = tmp_path / "shocks.parquet"
    code = main(
        [
            "compute",
            "--store",
            str(tiny_demo),
            "--request",
            str(request_path),
            "--features",
            str(features_path),
            "--out",
            str(out),
            "--quiet",
        ]
    )
    assert code == 0
    shocks = pq.read_table(out).to_pandas()
    # A toy person-year panel: three people per community, each observed in three survey years.
    ids = shocks["feature_id"].unique()
    rng = np.random.default_rng(7)
    panel = pd.DataFrame(
        [
            {"person": f"p{i}-{j}", "feature_id": fid, "year": int(year)}
            for i, fid in enumerate(ids)
            for j in range(3)
            for year in rng.choice(np.arange(1991, 2019), 3, replace=False)
        ]
    )
    merged = panel.merge(shocks, on=["feature_id", "year"], how="left", validate="many_to_one")
    assert len(merged) == len(panel)
    assert merged["prcp_total"].notna().mean() > 0.9
    assert (
        read_parquet_provenance(out.read_bytes())["provenance"]["fingerprint"]
        == open_store(tiny_demo).fingerprint
    )


def test_cli_reports_a_bad_request_without_a_traceback(tmp_path: Path, tiny_demo: Path, capsys) -> None:
    request_path = tmp_path / "bad.json"
    request_path.write_text(json.dumps({"features": {"type": "FeatureCollection", "features": []}}))
    code = main(
        [
            "compute",
            "--store",
            str(tiny_demo),
            "--request",
            str(request_path),
            "--out",
            str(tmp_path / "x.csv"),
            "--quiet",
        ]
    )
    assert code == 2
    assert "/features/features" in capsys.readouterr().err
    assert not (tmp_path / "x.csv").exists()


def test_csv_output_has_a_provenance_sidecar(tmp_path: Path, tiny_demo: Path, tiny_communities) -> None:
    request_path = tmp_path / "request.json"
    request_path.write_text(
        json.dumps({"features": {**tiny_communities, "features": tiny_communities["features"][:3]}})
    )
    out = tmp_path / "out.csv"
    assert (
        main(
            [
                "compute",
                "--store",
                str(tiny_demo),
                "--request",
                str(request_path),
                "--out",
                str(out),
                "--quiet",
            ]
        )
        == 0
    )
    frame = pd.read_csv(out)
    assert frame["feature_id"].nunique() == 3
    sidecar = json.loads((tmp_path / "out.csv.provenance.json").read_text())
    assert sidecar["provenance"]["dataset"] == "demo"


def test_series_are_daily_rows(store, settings, tiny_communities) -> None:
    request = validate_request(
        SeriesRequest,
        {
            "features": {**tiny_communities, "features": tiny_communities["features"][:2]},
            "years": {"start": 2000, "end": 2001},
            "variables": ["prcp", "tmean"],
        },
    )
    result = run_series(request, store, settings)
    assert list(result.frame.columns) == ["feature_id", "date", "prcp", "tmean"]
    days = int(np.sum(np.isin(store.dates.year, [2000, 2001])))
    assert len(result.frame) == 2 * days
    assert result.frame["date"].iloc[0] == "2000-01-01"
    parquet = pq.read_table(io.BytesIO(encode(result, "parquet")[0])).to_pandas()
    assert len(parquet) == len(result.frame)


def test_unknown_layer_and_year_limit(store, tiny_communities, tmp_path: Path) -> None:
    few = {**tiny_communities, "features": tiny_communities["features"][:1]}
    request = validate_request(IndicatorRequest, {"features": few, "weighting": {"layer": "goats"}})
    with pytest.raises(UnknownDatasetError, match="no weight layer 'goats'"):
        run(request, store, Settings(data_dir=tmp_path))
    request = validate_request(IndicatorRequest, {"features": few})
    with pytest.raises(LimitExceededError, match="max_years_per_request"):
        run(request, store, Settings(data_dir=tmp_path, max_years_per_request=5))


def test_population_weighting_runs(store, settings, tiny_communities) -> None:
    few = {**tiny_communities, "features": tiny_communities["features"][:4]}
    request = validate_request(
        IndicatorRequest,
        {"features": few, "weighting": {"layer": "population"}, "indicators": ["prcp_total"]},
    )
    assert run(request, store, settings).frame["prcp_total"].notna().any()


def test_pick_store() -> None:
    with pytest.raises(UnknownDatasetError, match="no dataset is served"):
        pick_store({}, None)
    with pytest.raises(UnknownDatasetError, match="served datasets: a, b"):
        pick_store({"a": 1, "b": 2}, "c")  # type: ignore[dict-item]
    assert pick_store({"a": 1, "b": 2}, None) == 1  # type: ignore[dict-item]


def test_provenance_gives_both_digests_of_the_resolved_request(
    example_result, store, tiny_communities
) -> None:
    from service import request_text
    from service.indicators.table import resolve_request
    from service.pipeline import request_hash

    request = validate_request(IndicatorRequest, example_request(tiny_communities))
    resolved = resolve_request(request, store.dates, store.calendar, store.variables)
    prov = example_result.provenance
    assert prov["request_hash"] == request_hash(resolved, store.fingerprint)
    assert prov["request"]["features"]["sha256"] == request_text.features_sha256(resolved)


@pytest.mark.parametrize("layout", ["wide", "long"])
def test_the_last_batchs_table_in_two_row_parts_is_the_whole_one(
    store, settings, tiny_communities, layout: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    """On local threads the last batch's table runs as two row parts (nothing is left to overlap it): the same
    frame and warnings, bit for bit, as one table; earlier batches keep one table task."""
    from service.pipeline import core

    request = validate_request(IndicatorRequest, {**example_request(tiny_communities), "layout": layout})
    monkeypatch.setattr(core, "TABLE_PART_FEATURES", 10_000)  # every part would be too small: one table
    whole = run(request, store, settings)
    cut_at, rows_table = [], core._rows_table

    def counted(last: Any, arrays: Any, rows: tuple[int, int], *args: Any) -> Any:
        cut_at.append(rows)
        return rows_table(last, arrays, rows, *args)

    monkeypatch.setattr(core, "_rows_table", counted)
    monkeypatch.setattr(core, "TABLE_PART_FEATURES", 5)
    cut = run(request, store, settings)
    assert sorted(cut_at) == [(0, 31), (31, 62)]  # the 62 communities' one batch, the last, in two parts
    pd.testing.assert_frame_equal(cut.frame, whole.frame, check_exact=True)
    assert cut.warnings == whole.warnings and whole.warnings
    cut_at.clear()
    batched = run(request, store, settings, batch_size=25)  # batches of 25, 25 and 12: only the last is cut
    assert sorted(cut_at) == [(0, 6), (6, 12)]
    pd.testing.assert_frame_equal(batched.frame, whole.frame, check_exact=True)


def test_rows_are_put_in_request_order_of_features_stably_whatever_the_batches() -> None:
    """Batch tables joined out of order are sorted by the features' request order, each feature's rows kept as
    its table gave them; joined in order they come back as they are; an id the request lacks sorts last."""
    from service.pipeline.core import _in_feature_order

    ids = ["c", "a", "b"]
    frame = pd.DataFrame(
        {
            "feature_id": pd.array(["a", "a", "b", "c", "c"], dtype="string"),
            "year": [2001, 2000, 2000, 2002, 2001],
        }
    )
    got = _in_feature_order(frame, ids)
    assert list(zip(got["feature_id"], got["year"], strict=True)) == [
        ("c", 2002), ("c", 2001), ("a", 2001), ("a", 2000), ("b", 2000)
    ]  # fmt: skip
    assert list(got.index) == list(range(5))
    in_order = _in_feature_order(got.iloc[::-1].iloc[::-1], ids)
    pd.testing.assert_frame_equal(in_order, got)
    unknown = frame.assign(feature_id=pd.array(["z", "a", "b", "c", "c"], dtype="string"))
    assert list(_in_feature_order(unknown, ids)["feature_id"]) == ["c", "c", "a", "b", "z"]
    repeated = _in_feature_order(frame, ["c", "a", "b", "a"])  # not one position per id: the last one counts
    assert list(repeated["feature_id"]) == ["c", "c", "b", "a", "a"]

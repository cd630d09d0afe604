"""A request on a dataset with several grids: each grid aggregated with its own exact weights, the series merged,
coverage and cells per grid (issue 11, CONTRACTS.md "Datasets with several grids")."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
import pytest

from service.errors import UnknownDatasetError
from service.pipeline import run, run_series
from service.schemas import IndicatorRequest, SeriesRequest, validate_request
from service.settings import Settings
from service.store import open_store, write_layer, write_store
from tests._support_store import make_dataset

YEARS = (2000, 2004)


def _community(fid: str, west: float, south: float, size: float) -> dict[str, Any]:
    ring = [
        [west, south],
        [west + size, south],
        [west + size, south + size],
        [west, south + size],
        [west, south],
    ]
    return {
        "type": "Feature",
        "id": fid,
        "properties": {},
        "geometry": {"type": "Polygon", "coordinates": [ring]},
    }


# Two communities over the invented corner of make_dataset's grids (-150..-147 E, -40..-37 N, open sea).
FEATURES = [_community("a", -149.8, -39.3, 0.9), _community("b", -148.4, -38.6, 1.2)]


@pytest.fixture(scope="module")
def stores(tmp_path_factory: pytest.TempPathFactory) -> dict[str, Any]:
    """Precipitation on a 0.5-degree grid, temperatures on a 1.5-degree grid: each alone, and both in one."""
    root = tmp_path_factory.mktemp("grids")
    fine = make_dataset(ny=6, nx=6, years=YEARS, variables=("prcp",), layers=("population",), seed=1)
    coarse = make_dataset(ny=2, nx=2, years=YEARS, variables=("tmax", "tmin"), layers=("population",),
                          cell_size=1.5, seed=2)  # fmt: skip
    write_store(fine, root / "fine.zarr", grid="fine")
    write_store(coarse, root / "coarse.zarr", grid="coarse")
    write_store({"fine": fine, "coarse": coarse}, root / "both.zarr")
    return {name: open_store(root / f"{name}.zarr") for name in ("fine", "coarse", "both")}


@pytest.fixture(scope="module")
def settings(tmp_path_factory: pytest.TempPathFactory) -> Settings:
    return Settings(data_dir=tmp_path_factory.mktemp("data"), threads=2)


def _request(indicators: list[str], **fields: Any) -> IndicatorRequest:
    body = {
        "features": {"type": "FeatureCollection", "features": FEATURES},
        "indicators": indicators,
        "season": {"start": "01-01", "end": "12-31"},
        "baseline": {"start": 2000, "end": 2004},
        **fields,
    }
    return validate_request(IndicatorRequest, body)


def test_each_grid_gets_its_own_weights_and_the_values_of_its_single_grid_store(stores, settings) -> None:
    both = run(_request(["prcp_total", "wet_days", "tmean", "gdd"]), stores["both"], settings).frame
    fine = run(_request(["prcp_total", "wet_days"]), stores["fine"], settings).frame
    coarse = run(_request(["tmean", "gdd"]), stores["coarse"], settings).frame
    for column in ("prcp_total", "prcp_total_z", "wet_days"):
        pd.testing.assert_series_equal(both[column], fine[column])
    for column in ("tmean", "tmean_z", "gdd"):
        pd.testing.assert_series_equal(both[column], coarse[column])
    # one grid keeps today's names; several grids give coverage_<grid> and cells_<grid> for each grid read
    assert {"coverage", "cells"} <= set(fine.columns) and "coverage_fine" not in fine.columns
    assert {"coverage_fine", "cells_fine", "coverage_coarse", "cells_coarse"} <= set(both.columns)
    assert "coverage" not in both.columns and "cells" not in both.columns
    pd.testing.assert_series_equal(both["cells_fine"], fine["cells"], check_names=False)
    pd.testing.assert_series_equal(both["cells_coarse"], coarse["cells"], check_names=False)
    # a spans 3 x 3 of the 0.5-degree cells and 1 x 2 of the 1.5-degree ones; b 3 x 4 and 1 x 2 (by hand)
    assert both.groupby("feature_id")["cells_fine"].first().tolist() == [9, 12]
    assert both.groupby("feature_id")["cells_coarse"].first().tolist() == [2, 2]
    assert both["coverage_fine"].eq(1.0).all() and both["coverage_coarse"].eq(1.0).all()
    np.testing.assert_allclose(both["area_km2"], fine["area_km2"])


def test_a_request_reading_one_grid_of_a_two_grid_dataset_names_its_columns_by_that_grid(
    stores, settings
) -> None:
    frame = run(_request(["prcp_total"]), stores["both"], settings).frame
    assert {"coverage_fine", "cells_fine"} <= set(frame.columns) and "cells_coarse" not in frame.columns


def test_the_daily_series_of_two_grids_equal_those_of_each_grid_alone(stores, settings) -> None:
    def series(store_name: str, variables: list[str]) -> pd.DataFrame:
        body = {"features": {"type": "FeatureCollection", "features": FEATURES}, "variables": variables,
                "years": {"start": 2001, "end": 2002}}  # fmt: skip
        return run_series(validate_request(SeriesRequest, body), stores[store_name], settings).frame

    both = series("both", ["prcp", "tmean", "tmax"])
    pd.testing.assert_series_equal(both["prcp"], series("fine", ["prcp"])["prcp"])
    alone = series("coarse", ["tmean", "tmax"])
    pd.testing.assert_series_equal(both["tmean"], alone["tmean"])
    pd.testing.assert_series_equal(both["tmax"], alone["tmax"])


def test_layer_weighting_uses_each_grids_copy_of_the_layer(stores, settings, tmp_path: Path) -> None:
    frame = run(
        _request(["prcp_total", "tmean"], weighting={"layer": "population"}), stores["both"], settings
    )
    alone = run(_request(["prcp_total"], weighting={"layer": "population"}), stores["fine"], settings)
    pd.testing.assert_series_equal(frame.frame["prcp_total"], alone.frame["prcp_total"])
    # a layer on one grid only: the request that reads the other grid is refused, naming that grid
    fine = make_dataset(ny=6, nx=6, years=YEARS, variables=("prcp",), layers=(), seed=1)
    coarse = make_dataset(
        ny=2, nx=2, years=YEARS, variables=("tmax", "tmin"), layers=(), cell_size=1.5, seed=2
    )
    write_store({"fine": fine, "coarse": coarse}, tmp_path / "s.zarr")
    write_layer(tmp_path / "s.zarr", "cropland", {"fine": np.full((6, 6), 0.5)})
    store = open_store(tmp_path / "s.zarr")
    run(_request(["prcp_total"], weighting={"layer": "cropland"}), store, settings)  # fine grid only: fine
    with pytest.raises(
        UnknownDatasetError, match=r"grid 'coarse' of dataset 's' has no weight layer 'cropland'"
    ):
        run(_request(["prcp_total", "tmean"], weighting={"layer": "cropland"}), store, settings)


def test_under_cells_an_indicator_whose_variables_lie_on_two_grids_is_refused_naming_them(stores) -> None:
    from service.errors import RequestError
    from service.pipeline import check_cells_grids

    check_cells_grids(_request(["prcp_total", "tmean"]), stores["both"])  # each on one grid: allowed
    check_cells_grids(_request(["hotdry_days"]), stores["fine"])  # a single-grid dataset: nothing to check
    with pytest.raises(RequestError, match=r"indicator 'hotdry_days' reads variables on different grids of "
                                           r"dataset 'both' \(tmax on 'coarse', prcp on 'fine'\)"):  # fmt: skip
        check_cells_grids(_request(["prcp_total", "hotdry_days"]), stores["both"])


def test_a_cells_variant_across_grids_is_refused_at_submission_naming_the_variant(stores, settings) -> None:
    from service.errors import RequestError
    from service.pipeline import prepare_variants

    request = _request(["prcp_total"], variants=[{"name": "cellwise", "aggregation": "cells",
                                                  "indicators": ["hotdry_days"]}])  # fmt: skip
    with pytest.raises(RequestError, match=r"cellwise.*'hotdry_days' reads variables on different grids"):
        prepare_variants(request, stores["both"], settings)


def test_a_feature_skipped_on_one_grid_has_no_values_from_any(settings, tmp_path: Path) -> None:
    """The coarse grid has no data in its north-west cell; a community inside it can be computed on the fine
    grid only: skipped, it gets null values and no cells on every grid, the other keeps its values."""
    fine = make_dataset(ny=6, nx=6, years=YEARS, variables=("prcp",), layers=(), seed=1)
    coarse = make_dataset(ny=2, nx=2, years=YEARS, variables=("tmax", "tmin"), layers=(), cell_size=1.5,
                          missing_cells=[(0, 0)], seed=2)  # fmt: skip
    write_store({"fine": fine, "coarse": coarse}, tmp_path / "s.zarr")
    store = open_store(tmp_path / "s.zarr")
    water = _community(
        "w", -149.8, -38.2, 0.6
    )  # inside the coarse north-west cell (-150..-148.5, -38.5..-37)
    body = {
        "features": {"type": "FeatureCollection", "features": [water, FEATURES[1]]},
        "indicators": ["prcp_total", "tmean"],
        "season": {"start": "01-01", "end": "12-31"},
        "baseline": {"start": 2000, "end": 2004},
        "invalid_features": "skip",
    }
    result = run(validate_request(IndicatorRequest, body), store, settings)
    frame = result.frame.set_index("feature_id")
    assert frame.loc["w", "prcp_total"].isna().all() and frame.loc["w", "tmean"].isna().all()
    assert (frame.loc["w", "cells_fine"] == 0).all() and (frame.loc["w", "cells_coarse"] == 0).all()
    assert frame.loc["b", "prcp_total"].notna().all() and frame.loc["b", "tmean"].notna().all()
    assert [w["code"] for w in result.warnings if w["feature_id"] == "w"] == ["feature_skipped"]


def test_under_cells_each_indicator_is_computed_on_the_cells_of_its_own_grid(stores, settings) -> None:
    """Aggregation 'cells' on a two-grid dataset: the precipitation indicators from the fine grid's cells, the
    temperature ones from the coarse grid's, each equal to the same request on that grid's store alone."""
    cells = {"aggregation": "cells"}
    both = run(_request(["prcp_total", "wet_days", "tmean", "gdd"], **cells), stores["both"], settings)
    fine = run(_request(["prcp_total", "wet_days"], **cells), stores["fine"], settings).frame
    coarse = run(_request(["tmean", "gdd"], **cells), stores["coarse"], settings).frame
    for column in ("prcp_total", "prcp_total_z", "wet_days"):
        pd.testing.assert_series_equal(both.frame[column], fine[column])
    for column in ("tmean", "tmean_z", "gdd"):
        pd.testing.assert_series_equal(both.frame[column], coarse[column])
    # wet_days of the cells' means differs from the mean series' (a check that 'cells' was really used)
    series = run(_request(["wet_days"]), stores["fine"], settings).frame
    assert not series["wet_days"].equals(fine["wet_days"])
    # the share of days with every variable is the smaller of the grids' (both full here)
    np.testing.assert_allclose(both.frame["season_complete"], np.fmin(fine["season_complete"],
                               coarse["season_complete"]))  # fmt: skip


def test_under_cells_a_request_with_an_indicator_across_grids_is_refused_before_any_work(stores, settings):
    from service.errors import RequestError
    from service.pipeline import prepare

    request = _request(["prcp_total", "hotdry_days"], aggregation="cells")
    for call in (prepare, run):
        with pytest.raises(RequestError, match=r"indicator 'hotdry_days' reads variables on different grids"):
            call(request, stores["both"], settings)
    run(_request(["prcp_total", "hotdry_days"]), stores["both"], settings)  # under 'series' it is computed


def test_variants_and_events_on_a_dataset_with_several_grids(stores, settings) -> None:
    """Variants reading other grids of one dataset each get the weights of their own grids (issue 13 with
    issue 11's layout): each equals its request alone; events read both grids too."""
    variants = [{"name": "rain", "indicators": ["prcp_total"]}, {"name": "heat", "indicators": ["tmean"]}]
    combined = run(_request(["prcp_total"], variants=variants), stores["both"], settings).frame
    rain = run(_request(["prcp_total"]), stores["both"], settings).frame
    heat = run(_request(["tmean"]), stores["both"], settings).frame
    assert combined["rain__prcp_total"].tolist() == rain["prcp_total"].tolist()
    assert combined["heat__tmean"].tolist() == heat["tmean"].tolist()
    events = [
        {"id": "e1", "feature_id": "a", "date": "2004-03-01"},
        {"id": "e2", "feature_id": "b", "date": "2003-07-15"},
    ]
    body = {
        "features": {"type": "FeatureCollection", "features": FEATURES},
        "indicators": ["prcp_total", "tmean"],
        "events": events,
        "windows": [{"name": "prior_year", "start": {"months": -12}, "end": {"days": -1}}],
        "baseline": {"start": 2001, "end": 2003},
    }
    both = run(validate_request(IndicatorRequest, body), stores["both"], settings).frame
    fine = run(
        validate_request(IndicatorRequest, {**body, "indicators": ["prcp_total"]}), stores["fine"], settings
    )
    coarse = run(
        validate_request(IndicatorRequest, {**body, "indicators": ["tmean"]}), stores["coarse"], settings
    )
    assert both["prior_year__prcp_total"].tolist() == fine.frame["prior_year__prcp_total"].tolist()
    assert both["prior_year__tmean"].tolist() == coarse.frame["prior_year__tmean"].tolist()

"""Several grids in one store: variables from products on different grids, added run by run or at once."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from service.cli import main as wxshock
from service.errors import IngestError
from service.ingest import ingest_files
from service.store import open_store, verify_store
from tests._support_products import precipitation_only_product, temperature_product

HALF_STEP = 0.05 + 1e-6  # storage precision 0.1 (plus the float error of the unit conversions)


def stored(path: Path, variable: str) -> np.ndarray:
    """A store's values of one variable over the days it was given, as (time, y, x)."""
    store = open_store(path)
    values = store.read(variable, slice(None), slice(None), store.coverage(variable))
    return np.moveaxis(values, 2, 0)


def assert_close(got: np.ndarray, want: np.ndarray) -> None:
    np.testing.assert_array_equal(np.isnan(got), np.isnan(want))
    assert np.nanmax(np.abs(got - want)) <= HALF_STEP


def test_precipitation_then_temperature_on_a_coarser_grid(tmp_path: Path) -> None:
    # The example: `wxshock ingest precip_*.nc --out S.zarr` then `wxshock ingest tmax_*.nc tmin_*.nc
    # --out S.zarr` on a coarser grid gives one dataset with two grids.
    rain = precipitation_only_product(tmp_path / "rain", (2001, 2002))  # 0.05 degree, 6 x 8
    heat = temperature_product(tmp_path / "heat", (2001, 2002))  # 0.2 degree, 2 x 2, over the same region
    store_path = tmp_path / "S.zarr"
    ingest_files(rain.files, store_path, progress=False)
    assert open_store(store_path).variables == ("prcp",)
    ingest_files(heat.files, store_path, progress=False)
    store = open_store(store_path)
    assert set(store.variables) == {"tmax", "tmin", "prcp"}
    assert store.variable_grids == {"prcp": "grid", "tmax": "grid2", "tmin": "grid2"}
    assert store.grids["grid"].shape == (6, 8) and store.grids["grid2"].shape == (2, 2)
    assert verify_store(store_path).ok
    assert_close(stored(store_path, "prcp"), rain.values["prcp"])
    assert_close(stored(store_path, "tmax"), heat.values["tmax"])
    assert_close(stored(store_path, "tmin"), heat.values["tmin"])


def test_two_grids_in_one_run_named(tmp_path: Path) -> None:
    rain = precipitation_only_product(tmp_path / "rain", (2001,))
    heat = temperature_product(tmp_path / "heat", (2001,))
    store_path = tmp_path / "S.zarr"
    with pytest.raises(
        IngestError, match=r"--grid fine: the files lie on 2 grids .* name each by a variable on it"
    ):
        ingest_files(rain.files + heat.files, store_path, grids=["fine"], progress=False)
    ingest_files(rain.files + heat.files, store_path, grids=["prcp=fine", "tmax=coarse"], progress=False)
    store = open_store(store_path)
    assert store.variable_grids == {"prcp": "fine", "tmax": "coarse", "tmin": "coarse"}
    # the next year appends to each variable on its own grid
    ingest_files(precipitation_only_product(tmp_path / "rain2", (2002,)).files + temperature_product(
        tmp_path / "heat2", (2002,)).files, store_path, progress=False)  # fmt: skip
    store = open_store(store_path)
    assert store.describe()["time"]["end"] == "2002-12-31" and store.variable_grids["prcp"] == "fine"


def test_a_variable_can_cover_part_of_the_time_axis(tmp_path: Path) -> None:
    rain = precipitation_only_product(tmp_path / "rain", (2001, 2002))
    heat = temperature_product(tmp_path / "heat", (2002,))
    store_path = tmp_path / "S.zarr"
    ingest_files(rain.files, store_path, progress=False)
    ingest_files(heat.files, store_path, progress=False)
    store = open_store(store_path)
    assert store.n_times == 730 and store.coverage("tmax") == slice(365, 730)
    assert_close(stored(store_path, "tmax"), heat.values["tmax"])


def test_grid_names_on_the_command_line(tmp_path: Path, capsys: pytest.CaptureFixture[str]) -> None:
    rain = precipitation_only_product(tmp_path / "rain", (2001,))
    heat = temperature_product(tmp_path / "heat", (2001,))
    out = tmp_path / "cli.zarr"
    assert (
        wxshock(["ingest", *map(str, rain.files), "--out", str(out), "--grid", "satellite", "--quiet"]) == 0
    )
    assert wxshock(["ingest", *map(str, heat.files), "--out", str(out), "--grid", "Bad Name", "--quiet"]) == 2
    assert "--grid 'Bad Name': grid name 'Bad Name' is not allowed" in capsys.readouterr().err
    assert (
        wxshock(["ingest", *map(str, heat.files), "--out", str(out), "--grid", "satellite", "--quiet"]) == 2
    )
    err = capsys.readouterr().err
    assert "satellite" in err
    assert wxshock(["ingest", *map(str, heat.files), "--out", str(out), "--grid", "station", "--quiet"]) == 0
    assert open_store(out).variable_grids == {"prcp": "satellite", "tmax": "station", "tmin": "station"}

"""The whole chain (request -> pipeline.run -> table) on small stores written here: the cases of issue 10.

Each test builds a store whose daily values make the case exact, runs a request through the request model
and pipeline.run, and reads the table. Hand-worked values are explained beside each check.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np
import pytest

from service.errors import RequestError
from service.warning_codes import WARNING_CODES

sys.path.insert(0, str(Path(__file__).parent))  # the folder's own helper module (importlib import mode)
from _support_chain import cell_box, days, feature, run_chain, write_grid  # noqa: E402


def _check_warnings(warnings: list[dict]) -> None:
    """Every warning has the five keys and a registered code."""
    for w in warnings:
        assert set(w) == {"code", "feature_id", "year", "indicator", "reason"}, w
        assert w["code"] in WARNING_CODES, w


# --- datasets without every variable -------------------------------------------------------------------------


def test_a_precipitation_only_dataset_serves_its_indicators_and_refuses_the_others(tmp_path: Path) -> None:
    time = days(2000, 2009)
    rng = np.random.default_rng(1)
    prcp = np.round(rng.gamma(0.6, 6.0, (time.size, 2, 2)) * (rng.random((time.size, 2, 2)) < 0.4), 1)
    store = write_grid(tmp_path / "rain.zarr", time, {"prcp": prcp})
    village = [feature("v", cell_box(0, 0, 2))]
    result = run_chain(store, village, tmp_path)
    # the defaults are those the data can compute, and the resolved request records them
    assert result.provenance["request"]["indicators"] == ["prcp_total", "wet_days", "cdd", "spi"]
    assert result.frame["prcp_total"].notna().all() and "tmean" not in result.frame.columns
    _check_warnings(result.warnings)
    with pytest.raises(RequestError, match=r"'tmean' needs daily tmax and tmin") as caught:
        run_chain(store, village, tmp_path, indicators=["prcp_total", "tmean"])
    problem = caught.value.problem()
    assert problem["status"] == 422 and problem["indicator"] == "tmean" and problem["variable"] == "tmax"
    assert problem["pointer"] == "/indicators/1"

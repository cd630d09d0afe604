"""examples/r/wxshock.R run with real R (Debian's r-base-core, r-cran-httr2, r-cran-jsonlite) against a live
server: its table must equal the Python client's for the same request, and its panel merge must keep every row."""

from __future__ import annotations

import subprocess
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from service.client import Client
from tests._support_server import live_server  # noqa: F401 - fixture
from tests._support_tools import rscript  # noqa: F401 - fixture

RECIPE = Path(__file__).resolve().parent.parent / "examples" / "r" / "wxshock.R"

# The request the recipe sends, in the Python client's words.
SAME_REQUEST = {
    "dataset": "demo",
    "baseline": (1981, 1990),
    "years": (1991, 2020),
    "season": [5, 6, 7, 8, 9, 10],
    "indicators": ["prcp_total", "tmean", "spi"],
    "lags": [0, 1],
    "pairs": [["prcp_total", "tmean"]],
}


@pytest.mark.r
def test_r_recipe_matches_the_python_client(
    rscript: str,  # noqa: F811
    live_server,  # noqa: F811
    tiny_demo: Path,
    tmp_path: Path,
) -> None:
    shocks_csv = tmp_path / "shocks_from_r.csv"
    communities = tiny_demo.parent / "communities.geojson"
    run = subprocess.run(
        [rscript, str(RECIPE), live_server.base_url, str(communities), str(shocks_csv)],
        capture_output=True,
        text=True,
        timeout=180,
        cwd=tmp_path,
    )
    assert run.returncode == 0, run.stderr
    lines = run.stdout.splitlines()
    assert lines[0].startswith("1860 rows (communities x season-years)")  # 62 communities x 30 years
    assert "dataset demo, fingerprint sha256:" in lines[0]
    assert "panel 8400 person-years, merged 8400, all with shocks" in run.stdout

    from_r = pd.read_csv(shocks_csv, dtype={"feature_id": str})
    with Client(live_server.base_url) as client:
        from_python = client.indicators(communities, **SAME_REQUEST)
    assert list(from_r.columns) == list(from_python.columns)
    assert len(from_r) == len(from_python) == 1860
    for column in from_python.columns:
        left, right = from_r[column], from_python[column]
        if pd.api.types.is_numeric_dtype(right):
            np.testing.assert_allclose(
                left.to_numpy(dtype=float),
                right.to_numpy(dtype=float),
                rtol=1e-12,
                atol=1e-12,
                equal_nan=True,
                err_msg=column,
            )
        else:
            assert left.fillna("").astype(str).tolist() == right.fillna("").astype(str).tolist(), column


@pytest.mark.r
def test_r_recipe_reports_the_servers_problem(rscript: str, live_server, tmp_path: Path) -> None:  # noqa: F811
    # Communities outside the demo region: the server's detail, not a bare status, reaches the R user.
    outside = tmp_path / "outside.geojson"
    outside.write_text(
        '{"type": "FeatureCollection", "features": [{"type": "Feature", "id": "far-away", "properties": {},'
        ' "geometry": {"type": "Polygon", "coordinates": [[[10, 10], [10.1, 10], [10.1, 10.1], [10, 10]]]}}]}',
        encoding="utf-8",
    )
    run = subprocess.run(
        [rscript, str(RECIPE), live_server.base_url, str(outside)],
        capture_output=True,
        text=True,
        timeout=180,
    )
    assert run.returncode != 0
    assert "HTTP 422" in run.stderr and "far-away" in run.stderr

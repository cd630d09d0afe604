"""The R package (clients/r) checked with real R against a live server, and the R recipe that uses it.

`R CMD build` and `R CMD check` run the package's testthat suite against the live tiny-demo server; its tests
write their tables to a directory that these tests compare with the Python client's, value for value. R and
its packages come from Debian (r-base-core, r-cran-httr2, r-cran-jsonlite, r-cran-sf, r-cran-tibble,
r-cran-haven, r-cran-testthat), installed by the fixture in tests/_support_tools.py when missing.
"""

from __future__ import annotations

import os
import subprocess
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

from service.client import Client, build_request
from service.encode.stata import read_stata
from tests._support_server import live_server  # noqa: F401 - fixture
from tests._support_tools import rscript  # noqa: F401 - fixture

ROOT = Path(__file__).resolve().parent.parent
PACKAGE = ROOT / "clients" / "r"
RECIPE = ROOT / "examples" / "r" / "wxshock.R"

# The request of the package's tests and of the recipe, in the Python client's words.
SAME_REQUEST = {
    "dataset": "demo",
    "baseline": (1981, 1990),
    "years": (1991, 2020),
    "season": [5, 6, 7, 8, 9, 10],
    "indicators": ["prcp_total", "tmean", "spi"],
    "lags": [0, 1],
    "pairs": [["prcp_total", "tmean"]],
}


@dataclass(frozen=True)
class RCheck:
    """What `R CMD check` left: its output, the tables its tests wrote, and the library it installed into."""

    output: str
    returncode: int
    tables: Path
    library: Path


@pytest.fixture(scope="module")
def r_check(rscript: str, live_server, tiny_demo: Path, tmp_path_factory: pytest.TempPathFactory) -> RCheck:  # noqa: F811
    work = tmp_path_factory.mktemp("r-check")
    tables = work / "tables"
    tables.mkdir()
    r_bin = str(Path(rscript).with_name("R"))
    env = {key: value for key, value in os.environ.items() if not key.startswith("WXSHOCK_")}
    env |= {
        "WXSHOCK_TEST_SERVER": live_server.base_url,
        "WXSHOCK_TEST_COMMUNITIES": str(tiny_demo.parent / "communities.geojson"),
        "WXSHOCK_TEST_OUT": str(tables),
        "_R_CHECK_FORCE_SUGGESTS_": "true",
    }
    build = subprocess.run(
        [r_bin, "CMD", "build", "--no-build-vignettes", str(PACKAGE)],
        cwd=work,
        env=env,
        capture_output=True,
        text=True,
        timeout=300,
    )
    assert build.returncode == 0, build.stdout + build.stderr
    (tarball,) = work.glob("wxshock_*.tar.gz")
    check = subprocess.run(
        [r_bin, "CMD", "check", "--no-manual", "--no-build-vignettes", tarball.name],
        cwd=work,
        env=env,
        capture_output=True,
        text=True,
        timeout=900,
    )
    return RCheck(check.stdout + check.stderr, check.returncode, tables, work / "wxshock.Rcheck")


@pytest.mark.r
def test_r_cmd_check_passes_with_its_tests_against_the_live_server(r_check: RCheck) -> None:
    testthat = r_check.library / "tests" / "testthat.Rout"
    detail = testthat.read_text(errors="replace")[-3000:] if testthat.exists() else r_check.output[-3000:]
    assert r_check.returncode == 0, detail
    assert "Status: OK" in r_check.output, r_check.output[-3000:]
    assert "checking tests ..." in r_check.output
    # The live tests ran (they skip without a server): their tables are there.
    assert (r_check.tables / "from_geojson.csv").exists(), detail


@pytest.mark.r
def test_the_r_table_equals_the_python_clients(r_check: RCheck, live_server, tiny_demo: Path) -> None:  # noqa: F811
    from_r = pd.read_csv(r_check.tables / "from_geojson.csv", dtype={"feature_id": str})
    with Client(live_server.base_url) as client:
        from_python = client.indicators(tiny_demo.parent / "communities.geojson", **SAME_REQUEST)
    # The same file sent as it is: the same resolved request, so the same request hash.
    assert (r_check.tables / "request_hash.txt").read_text().strip() == from_python.attrs["provenance"][
        "request_hash"
    ]
    assert list(from_r.columns) == list(from_python.columns)
    assert len(from_r) == len(from_python) == 62 * 30
    for column in from_python.columns:
        left, right = from_r[column], from_python[column]
        if pd.api.types.is_numeric_dtype(right):
            # Written by R with 17 significant digits: the very same doubles.
            np.testing.assert_array_equal(
                left.to_numpy(dtype=float), right.to_numpy(dtype=float), err_msg=column
            )
        else:
            assert left.fillna("").astype(str).tolist() == right.fillna("").astype(str).tolist(), column


@pytest.mark.r
def test_haven_reads_the_labels_pandas_reads(r_check: RCheck, live_server, tiny_demo: Path) -> None:  # noqa: F811
    # Two engines, one file: R's haven (in the package's tests) and pandas read the same variable labels.
    from_haven = dict(
        line.split("\t", 1) for line in (r_check.tables / "haven_labels.tsv").read_text().splitlines()
    )
    with Client(live_server.base_url) as client:
        body = client.request(
            "POST",
            "/v1/indicators",
            params={"format": "dta"},
            json=build_request(tiny_demo.parent / "communities.geojson", **SAME_REQUEST),
        ).content
    _, from_pandas, _ = read_stata(body)
    assert from_haven == from_pandas
    assert from_haven["tmean_z_lag1"].startswith("Mean over the season of the daily mean temperature")


def _recipe(r_program: str, library: Path, *args: str, cwd: Path) -> subprocess.CompletedProcess[str]:
    """Run examples/r/wxshock.R with the package checked by R CMD check on the library path."""
    env = {key: value for key, value in os.environ.items() if not key.startswith("WXSHOCK_")}
    env["R_LIBS"] = str(library)
    return subprocess.run(
        [r_program, str(RECIPE), *args], capture_output=True, text=True, timeout=180, cwd=cwd, env=env
    )


@pytest.mark.r
def test_the_r_recipe_uses_the_package_and_merges_onto_a_panel(
    rscript: str,  # noqa: F811
    r_check: RCheck,
    live_server,  # noqa: F811
    tiny_demo: Path,
    tmp_path: Path,
) -> None:
    shocks_csv = tmp_path / "shocks_from_r.csv"
    run = _recipe(
        rscript,
        r_check.library,
        live_server.base_url,
        str(tiny_demo.parent / "communities.geojson"),
        str(shocks_csv),
        cwd=tmp_path,
    )
    assert run.returncode == 0, run.stderr
    lines = run.stdout.splitlines()
    assert lines[0].startswith("1860 rows (communities x season-years)")  # 62 communities x 30 years
    assert "dataset demo, fingerprint sha256:" in lines[0]
    assert "panel 8400 person-years, merged 8400, all with shocks" in run.stdout
    assert len(pd.read_csv(shocks_csv)) == 1860


@pytest.mark.r
def test_the_r_recipe_reports_the_servers_problem(
    rscript: str,  # noqa: F811
    r_check: RCheck,
    live_server,  # noqa: F811
    tmp_path: Path,
) -> None:
    # Communities outside the demo region: the server's detail, not a bare status, reaches the R user.
    outside = tmp_path / "outside.geojson"
    outside.write_text(
        '{"type": "FeatureCollection", "features": [{"type": "Feature", "id": "far-away", "properties": {},'
        ' "geometry": {"type": "Polygon", "coordinates": [[[10, 10], [10.1, 10], [10.1, 10.1], [10, 10]]]}}]}',
        encoding="utf-8",
    )
    run = _recipe(rscript, r_check.library, live_server.base_url, str(outside), cwd=tmp_path)
    assert run.returncode != 0
    assert "HTTP 422" in run.stderr and "far-away" in run.stderr

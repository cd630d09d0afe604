"""Latency of the pictures and of the Python client on a warm server over the tiny demo (issue 7).

    python bench/bench_pictures.py             # 20 rounds, replaces its section in bench/RESULTS.md
    python bench/bench_pictures.py --rounds 5  # a quicker look, nothing written
    python bench/bench_pictures.py --map-store bench/out/large/synthetic.zarr   # the map's field on a big grid

Measures, after two warm-up rounds, on a uvicorn server in this process (127.0.0.1):
  client   Client.indicators for one community, default request but prcp_total and tmean, Parquet on the wire
  series   POST /v1/plots/series for one community (the table computed, then drawn)
  map      POST /v1/plots/map for all 62 communities (the grid's anomaly field computed, then drawn)
  draw     series_plot and map_plot alone, on in-memory inputs (matplotlib Agg), to separate drawing time
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import socket
import sys
import tempfile
import threading
import time
from pathlib import Path

import httpx
import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))
RESULTS = ROOT / "bench" / "RESULTS.md"
START, END = "<!-- bench_pictures: start -->", "<!-- bench_pictures: end -->"
BODY = {"baseline": {"start": 1981, "end": 1990}, "lags": [0, 1], "indicators": ["prcp_total", "tmean"]}


def _free_port() -> int:
    """A free TCP port on 127.0.0.1."""
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


def _timed(call, rounds: int) -> dict[str, float]:
    """p50 and p95 wall time (ms) of ``rounds`` calls after two warm-up calls, and CPU ms per call.

    The server runs in this process, so the CPU time counts its threads too: the fairer figure on a
    loaded machine.
    """
    for _ in range(2):
        call()
    seconds = []
    cpu_start = time.process_time()
    for _ in range(rounds):
        start = time.perf_counter()
        call()
        seconds.append(time.perf_counter() - start)
    cpu = (time.process_time() - cpu_start) / rounds * 1000
    values = np.asarray(seconds) * 1000
    return {"p50": float(np.percentile(values, 50)), "p95": float(np.percentile(values, 95)), "cpu": cpu}


def _write_section(start: str, end: str, section: str) -> None:
    """Replace (or append) one marked section of bench/RESULTS.md."""
    text = RESULTS.read_text(encoding="utf-8") if RESULTS.exists() else "# Benchmark results\n"
    if start in text and end in text:
        text = text[: text.index(start)] + section + text[text.index(end) + len(end) :]
    elif start != START and END in text:  # a map figure goes right after the pictures section
        where = text.index(END) + len(END)
        text = text[:where] + "\n" + section + text[where:]
    else:
        text = text.rstrip("\n") + "\n\n" + section + "\n"
    RESULTS.write_text(text, encoding="utf-8")


def map_field(location: str) -> None:
    """Time the map's per-cell anomaly field (tmean, May-October 2010 against 1981-1990) on one store."""
    import resource

    from service.maps import anomaly_field
    from service.schemas import FixedBaseline, MonthsSeason
    from service.store import open_store

    store = open_store(location)
    wall, cpu = time.perf_counter(), time.process_time()
    anomaly_field(
        store,
        "tmean",
        2010,
        season=MonthsSeason(months=[5, 6, 7, 8, 9, 10]),
        baseline=FixedBaseline(start=1981, end=1990),
    )
    wall, cpu = time.perf_counter() - wall, time.process_time() - cpu
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
    ny, nx = store.grid.shape
    map_start, map_end = (
        f"<!-- bench_pictures_map {location}: start -->",
        f"<!-- bench_pictures_map {location}: end -->",
    )
    section = "\n".join(
        [
            map_start,
            f"- Map field (`--map-store {location}`): {ny} x {nx} cells, tmean May-October 2010 against "
            f"1981-1990 (11 season-years read, one at a time): {wall:.1f} s wall, {cpu:.1f} s CPU, peak RSS "
            f"{peak:.0f} MB (load average {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores; "
            f"{time.strftime('%Y-%m-%d')}).",
            map_end,
        ]
    )
    print(section)
    _write_section(map_start, map_end, section)


def main() -> None:
    """Build the tiny demo, serve it, time each route, and write the figures."""
    parser = argparse.ArgumentParser()
    parser.add_argument("--rounds", type=int, default=20)
    parser.add_argument("--map-store", help="only time the map's anomaly field on this store")
    args = parser.parse_args()
    if args.map_store:
        map_field(args.map_store)
        return

    import shapely
    import uvicorn

    from service.app import create_app
    from service.client import Client
    from service.demo import build_demo
    from service.plots import map_plot, series_plot
    from service.settings import Settings

    work = Path(tempfile.mkdtemp(prefix="wxshock-bench-pictures-"))
    store = work / "demo.zarr"
    build_demo(store, size="tiny", progress=False)
    communities = json.loads((work / "communities.geojson").read_text())
    one = {"type": "FeatureCollection", "features": communities["features"][:1]}
    port = _free_port()
    settings = Settings(stores=[str(store)], data_dir=work / "data", host="127.0.0.1", port=port)
    server = uvicorn.Server(
        uvicorn.Config(create_app(settings), host="127.0.0.1", port=port, log_level="warning")
    )
    thread = threading.Thread(target=server.run, daemon=True)
    thread.start()
    url = f"http://127.0.0.1:{port}"
    for _ in range(600):
        try:
            if httpx.get(url + "/ready", timeout=1).status_code == 200:
                break
        except httpx.HTTPError:
            pass
        time.sleep(0.1)

    cpu_start = time.process_time()
    figures: dict[str, dict[str, float]] = {}
    with Client(url) as client, httpx.Client(base_url=url, timeout=120) as http:
        figures["client"] = _timed(lambda: client.indicators(one, **BODY), args.rounds)
        figures["series"] = _timed(
            lambda: http.post("/v1/plots/series", json=BODY | {"features": one}).raise_for_status(),
            args.rounds,
        )
        figures["map"] = _timed(
            lambda: http.post("/v1/plots/map", json=BODY | {"features": communities}).raise_for_status(),
            args.rounds,
        )
        table = client.indicators(one, **BODY)
    fid = str(table["feature_id"].iloc[0])
    figures["draw series"] = _timed(lambda: series_plot(table, fid), args.rounds)
    field = np.random.default_rng(0).normal(size=(40, 40))
    edges = np.linspace(0, 1, 41)
    outlines = [shapely.box(0.1 * i, 0.1 * i, 0.1 * i + 0.05, 0.1 * i + 0.05) for i in range(9)]
    figures["draw map"] = _timed(lambda: map_plot(field, edges, edges, outlines), args.rounds)
    cpu = time.process_time() - cpu_start
    server.should_exit = True
    thread.join(30)

    load = os.getloadavg()[0]
    lines = [
        "## Pictures and the Python client (issue 7)",
        "",
        f"`python bench/bench_pictures.py` ({args.rounds} rounds after 2 warm-up rounds; tiny demo: 40 x 40 cells, "
        f"1975-2022, 62 communities; server in the same process on 127.0.0.1; load average {load:.1f} on "
        f"{os.cpu_count()} cores, shared with other test runs; {cpu:.1f} s CPU in all; {platform.machine()}, "
        f"{time.strftime('%Y-%m-%d')}).",
        "",
        "| what | p50 ms | p95 ms | CPU ms per call |",
        "|---|---|---|---|",
    ]
    names = {
        "client": "Client.indicators, 1 community, prcp_total + tmean, lags 0-1 (Parquet)",
        "series": "POST /v1/plots/series, 1 community (table + drawing)",
        "map": "POST /v1/plots/map, 62 communities outlined (anomaly field + drawing)",
        "draw series": "series_plot alone (48 years, 2 panels)",
        "draw map": "map_plot alone (40 x 40 field, 9 outlines)",
    }
    for key, label in names.items():
        figure = figures[key]
        lines.append(f"| {label} | {figure['p50']:.0f} | {figure['p95']:.0f} | {figure['cpu']:.0f} |")
    section = "\n".join([START, *lines, END])
    print(section)
    if args.rounds >= 20:
        _write_section(START, END, section)


if __name__ == "__main__":
    main()

"""Attack figures of issue 12: the largest /v1/series, /health during the largest request, and a load test.

    python bench/bench_hardening.py series [--code DIR]     # POST /v1/series at its maximum (JSON, CSV, Parquet)
    python bench/bench_hardening.py health [--code DIR]     # /health latency during the largest allowed body
    python bench/bench_hardening.py load                    # largest on-demand + 8 concurrent + a 50,000-feature job
    python bench/bench_hardening.py submit                  # POST /v1/jobs with 100,000 points

Each part starts `wxshock serve` over the small demo (bench/out/small.zarr, built once) as a subprocess under
its own memory cap (tests/_support_memory.py: a cgroup made for it, or RLIMIT_DATA), on 127.0.0.1, and stops
it afterwards. ``--code DIR`` runs another checkout's code (e.g. the commit before the hardening) with the
same requests, for before/after figures. Every loop is bounded in count and in time. ``--write`` puts the
figures in their section of bench/RESULTS.md.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import statistics
import sys
import threading
import time
from concurrent.futures import ThreadPoolExecutor
from pathlib import Path
from typing import Any

import httpx
import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from tests import _support_memory as memory  # noqa: E402

RESULTS = ROOT / "bench" / "RESULTS.md"
HEADING = "## Hardening: attacks under a memory cap (issue 12, `bench/bench_hardening.py`)"
OUT = ROOT / "bench" / "out"
GB = 1 << 30


def small_demo() -> Path:
    """The small demo store in bench/out (built on first use)."""
    path = OUT / "small.zarr"
    if not path.exists():
        from service.demo import build_demo

        build_demo(path, size="small", progress=True)
    return path


def data_cells(store_path: Path) -> tuple[np.ndarray, np.ndarray, float]:
    """x and y of the store's cells with data, and the cell size (degrees)."""
    from service.store import open_store

    store = open_store(store_path)
    rows, cols = np.nonzero(store.data_mask())
    x, y = np.asarray(store.grid.x), np.asarray(store.grid.y)
    return x[cols], y[rows], abs(float(x[1] - x[0]))


def points(store_path: Path, count: int, seed: int = 12) -> dict[str, Any]:
    """``count`` buffered points (2 km) at random cells with data, ids of 12 characters."""
    x, y, size = data_cells(store_path)
    rng = np.random.default_rng(seed)
    pick = rng.integers(0, len(x), count)
    jitter = rng.uniform(-size / 3, size / 3, (count, 2))
    features = [
        {"type": "Feature", "id": f"pt-{i:09d}", "properties": {"buffer_m": 2000},
         "geometry": {"type": "Point", "coordinates": [round(float(x[k] + jitter[i, 0]), 6),
                                                        round(float(y[k] + jitter[i, 1]), 6)]}}
        for i, k in enumerate(pick)
    ]  # fmt: skip
    return {"type": "FeatureCollection", "features": features}


def circles(store_path: Path, count: int, vertices: int, id_length: int = 12) -> dict[str, Any]:
    """``count`` polygons of ``vertices`` vertices (about 1 km across) at cells with data."""
    x, y, size = data_cells(store_path)
    features = []
    for i in range(count):
        k = (i * 7919) % len(x)
        ring = [
            [round(float(x[k]) + 0.006 * math.cos(2 * math.pi * j / vertices), 7),
             round(float(y[k]) + 0.006 * math.sin(2 * math.pi * j / vertices), 7)]
            for j in range(vertices)
        ]  # fmt: skip
        ring.append(ring[0])
        fid = f"{i:06d}-" + "v" * max(0, id_length - 7)
        features.append({"type": "Feature", "id": fid, "properties": {},
                         "geometry": {"type": "Polygon", "coordinates": [ring]}})  # fmt: skip
    return {"type": "FeatureCollection", "features": features}


class HealthProbe:
    """GET /health every 0.1 s on its own connection until stopped; keeps every latency (s)."""

    def __init__(self, base_url: str, timeout: float = 30.0) -> None:
        self.base_url, self.timeout = base_url, timeout
        self.latencies: list[float] = []
        self.failures = 0
        self._stop = threading.Event()
        self._thread = threading.Thread(target=self._run, daemon=True)

    def _run(self) -> None:
        with httpx.Client(base_url=self.base_url, timeout=self.timeout) as client:
            while not self._stop.is_set():
                start = time.perf_counter()
                try:
                    ok = client.get("/health").status_code == 200
                except httpx.HTTPError:
                    ok = False
                self.latencies.append(time.perf_counter() - start)
                self.failures += 0 if ok else 1
                self._stop.wait(0.1)

    def __enter__(self) -> HealthProbe:
        self._thread.start()
        return self

    def __exit__(self, *exc: object) -> None:
        self._stop.set()
        self._thread.join(60)

    def summary(self, until: int | None = None) -> str:
        """max, p99 and median latency in ms, with the count (of the first ``until`` probes if given)."""
        if not self.latencies:
            return "no probe"
        values = sorted(self.latencies[:until])
        over = sum(v >= 1.0 for v in values)
        p99 = values[min(len(values) - 1, int(0.99 * len(values)))]
        return (
            f"max {max(values) * 1000:.0f} ms, p99 {p99 * 1000:.0f} ms, median "
            f"{statistics.median(values) * 1000:.0f} ms over {len(values)} probes, {over} of 1 s or more, "
            f"{self.failures} failed"
        )


def start(
    code: Path, data_dir: Path, cap_bytes: int, env: dict[str, str] | None = None
) -> memory.CappedServer:
    """The server of checkout ``code`` over the small demo under a memory cap."""
    environment = {"PYTHONPATH": str(code), **(env or {})}
    return memory.start_capped(
        stores=[small_demo()], data_dir=data_dir, cap_bytes=cap_bytes, env=environment, cwd=code
    )


def sampled(server: memory.CappedServer, stop: threading.Event) -> threading.Thread:
    """A thread sampling the server's RSS every 0.2 s until ``stop``."""

    def run() -> None:
        while not stop.is_set():
            server.sample()
            stop.wait(0.2)

    thread = threading.Thread(target=run, daemon=True)
    thread.start()
    return thread


def mb(value: int | None) -> str:
    """Bytes as MB text."""
    return "n/a" if value is None else f"{value / 1e6:,.0f} MB"


# --- the parts --------------------------------------------------------------------------------------------------


def part_series(code: Path, work: Path, features: int = 200, id_length: int = 200) -> list[str]:
    """POST /v1/series at its maximum: 200 features with 200-character ids, every year, each format."""
    lines = []
    body = {"features": circles(small_demo(), features, 40, id_length)}
    for fmt in ("json", "csv", "parquet"):
        server = start(code, work / f"series-{fmt}", 8 * GB)
        stop = threading.Event()
        sampler = sampled(server, stop)
        try:
            with httpx.Client(base_url=server.server.base_url, timeout=900) as client:
                warm = {"features": circles(small_demo(), 1, 40), "years": {"start": 2000, "end": 2000}}
                client.post("/v1/series", json=warm, params={"format": fmt}).raise_for_status()
                baseline = memory.rss_bytes(server.pid)
                start_time = time.perf_counter()
                size = 0
                with client.stream("POST", "/v1/series", json=body, params={"format": fmt}) as response:
                    status = response.status_code
                    first_byte = time.perf_counter() - start_time
                    for chunk in response.iter_bytes():
                        size += len(chunk)
                elapsed = time.perf_counter() - start_time
        finally:
            stop.set()
            sampler.join()
            server.stop()
        report = server.report()
        lines.append(
            f"| {fmt} | {status} | {elapsed:.1f} s | {first_byte:.1f} s | {mb(size)} | {mb(baseline)} | "
            f"{mb(report['peak_rss_bytes'])} | {report['cap']} |"
        )
        print(lines[-1], flush=True)
    return lines


def part_health(code: Path, work: Path, features: int = 200, vertices: int = 8900) -> str:
    """/health latency while the largest allowed body (200 features of 8,900 vertices, about 48 MB) is served.

    An idle server of the same code is probed at the same time: its latencies are what the machine's own
    load costs (this machine is shared), so the difference is what the request costs the served one.
    """
    server = start(code, work / "health", 8 * GB)
    control = start(code, work / "health-control", 2 * GB)
    stop = threading.Event()
    sampler = sampled(server, stop)
    body = json.dumps({"features": circles(small_demo(), features, vertices), "indicators": ["prcp_total"],
                       "years": {"start": 2000, "end": 2001}}).encode()  # fmt: skip
    try:
        with (
            HealthProbe(server.server.base_url) as probe,
            HealthProbe(control.server.base_url) as idle,
            httpx.Client(timeout=900) as client,
        ):
            time.sleep(1.0)
            start_time = time.perf_counter()
            response = client.post(
                server.server.base_url + "/v1/indicators",
                content=body,
                headers={"Content-Type": "application/json"},
            )
            elapsed = time.perf_counter() - start_time
            time.sleep(0.5)
    finally:
        stop.set()
        sampler.join()
        server.stop()
        control.stop()
    return (
        f"{len(body) / 1e6:.1f} MB body ({features} features x {vertices} vertices): {response.status_code} in "
        f"{elapsed:.1f} s; /health {probe.summary()}; an idle server meanwhile: {idle.summary()}; peak RSS "
        f"{mb(server.report()['peak_rss_bytes'])}; load average {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores"
    )


def part_submit(code: Path, work: Path, count: int = 100_000) -> str:
    """POST /v1/jobs with ``count`` buffered points: time until the 202 (the checks and weights run then)."""
    server = start(code, work / "submit", 8 * GB)
    control = start(code, work / "submit-control", 2 * GB)
    body = json.dumps({"features": points(small_demo(), count)}).encode()
    try:
        with (
            HealthProbe(server.server.base_url) as probe,
            HealthProbe(control.server.base_url) as idle,
            httpx.Client(timeout=900) as client,
        ):
            start_time = time.perf_counter()
            response = client.post(
                server.server.base_url + "/v1/jobs",
                content=body,
                headers={"Content-Type": "application/json"},
            )
            elapsed = time.perf_counter() - start_time
            location = response.headers.get("Location")
            status = client.get(server.server.base_url + location).json() if location else {}
            if location:
                client.delete(server.server.base_url + location)
    finally:
        server.stop()
        control.stop()
    return (
        f"{count:,} points ({len(body) / 1e6:.1f} MB): {response.status_code} in {elapsed:.1f} s "
        f"({status.get('features_skipped', 0)} skipped); /health {probe.summary()}; an idle server meanwhile: "
        f"{idle.summary()}; peak RSS {mb(server.report()['peak_rss_bytes'])}; load average "
        f"{os.getloadavg()[0]:.1f} on {os.cpu_count()} cores"
    )


def job_state(client: httpx.Client, location: str, last: dict[str, Any] | None = None) -> dict[str, Any]:
    """The job's status; when the server no longer answers, the last status seen, marked 'server gone'."""
    if not location:
        return {}
    try:
        return client.get(location).json()
    except httpx.HTTPError:
        return {**(last or {}), "state": f"server gone (last seen {(last or {}).get('state')})"}


def part_load(code: Path, work: Path, job_features: int, cap_bytes: int, limit_s: float) -> list[str]:
    """The largest on-demand request, 8 concurrent on-demand requests and a large job, all at once."""
    server = start(code, work / "load", cap_bytes)
    control = start(code, work / "load-control", 2 * GB)
    base = server.server.base_url
    small = json.dumps({"features": circles(small_demo(), 20, 200), "years": {"start": 1990, "end": 2022}})
    largest = json.dumps({"features": circles(small_demo(), 200, 8900), "indicators": ["prcp_total", "tmean"],
                          "years": {"start": 2000, "end": 2001}})  # fmt: skip
    job = json.dumps({"features": points(small_demo(), job_features)})
    headers = {"Content-Type": "application/json"}
    stop = threading.Event()
    sampler = sampled(server, stop)
    lines: list[str] = []
    deadline = time.monotonic() + limit_s
    load_at_start = os.getloadavg()[0]
    try:
        with (
            HealthProbe(base) as probe,
            HealthProbe(control.server.base_url) as idle,
            httpx.Client(base_url=base, timeout=limit_s) as client,
        ):
            start_time = time.perf_counter()
            submitted = client.post("/v1/jobs", content=job, headers=headers)
            submit_s = time.perf_counter() - start_time
            location = submitted.headers.get("Location", "")

            def on_demand(i: int) -> tuple[int, float]:
                with httpx.Client(base_url=base, timeout=limit_s) as own:
                    t0 = time.perf_counter()
                    content = largest if i == 0 else small
                    status = own.post("/v1/indicators", content=content, headers=headers).status_code
                    return status, time.perf_counter() - t0

            with ThreadPoolExecutor(max_workers=9) as pool:  # the largest request and 8 others, 3 rounds
                results = list(pool.map(on_demand, [0, *range(1, 9), *range(1, 9), *range(1, 9)]))
            on_demand_s, on_demand_count = time.perf_counter() - start_time, len(probe.latencies)
            state = job_state(client, location)
            while location and state.get("state") in ("queued", "running") and time.monotonic() < deadline:
                time.sleep(2.0)
                state = job_state(client, location, state)
            job_s = time.perf_counter() - start_time
            if state.get("state") in ("queued", "running"):
                client.delete(location)
    finally:
        stop.set()
        sampler.join()
        server.stop()
        control.stop()
    report = server.report()
    statuses = sorted({s for s, _ in results})
    lines.append(f"- job of {job_features:,} points: submitted ({submitted.status_code}) in {submit_s:.1f} s; "
                 f"{state.get('state')} after {job_s:.0f} s ({state.get('features_done')} of "
                 f"{state.get('features_total')} features, {state.get('features_skipped', 0)} skipped)")  # fmt: skip
    lines.append(f"- on-demand: {len(results)} requests, statuses {statuses}; the largest took {results[0][1]:.1f} s, "
                 f"the others median {statistics.median(t for _, t in results[1:]):.1f} s")  # fmt: skip
    lines.append(f"- /health: {probe.summary()}; an idle server meanwhile: {idle.summary()}; load average "
                 f"{load_at_start:.1f} at the start, {os.getloadavg()[0]:.1f} at the end, on {os.cpu_count()} "
                 "cores")  # fmt: skip
    lines.append(f"- /health during the on-demand requests alone (first {on_demand_s:.0f} s): "
                 f"{probe.summary(until=on_demand_count)}")  # fmt: skip
    lines.append(f"- memory: peak RSS {mb(report['peak_rss_bytes'])} under a {mb(cap_bytes)} cap ({report['cap']}); "
                 f"group peak with page cache {mb(report['group_peak_bytes'])}; kills for memory: "
                 f"{report['oom_kills']}")  # fmt: skip
    return lines


def write_section(text: str) -> None:
    """Replace this benchmark's section of bench/RESULTS.md (or append it)."""
    old = RESULTS.read_text(encoding="utf-8")
    if HEADING in old:
        before, rest = old.split(HEADING, 1)
        after = rest.split("\n## ", 1)
        new = before + text + ("\n## " + after[1] if len(after) == 2 else "")
    else:
        new = old.rstrip("\n") + "\n\n" + text
    RESULTS.write_text(new, encoding="utf-8")


def main() -> None:
    """Run one part and print its figures."""
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("part", choices=["series", "health", "submit", "load"])
    parser.add_argument("--code", type=Path, default=ROOT, help="checkout whose code the server runs")
    parser.add_argument("--work", type=Path, default=OUT / "hardening")
    parser.add_argument("--job-features", type=int, default=50_000)
    parser.add_argument("--cap-gb", type=float, default=3.0)
    parser.add_argument("--limit-s", type=float, default=1800.0, help="the load test's time bound")
    args = parser.parse_args()
    os.environ.pop("PYTHONPATH", None)
    work = args.work / time.strftime("%Y%m%d-%H%M%S")
    if args.part == "series":
        print("| format | status | time | first byte | size | RSS before | peak RSS | cap |")
        part_series(args.code, work)
    elif args.part == "health":
        print(part_health(args.code, work))
    elif args.part == "submit":
        print(part_submit(args.code, work))
    else:
        for line in part_load(args.code, work, args.job_features, int(args.cap_gb * GB), args.limit_s):
            print(line, flush=True)


if __name__ == "__main__":
    main()

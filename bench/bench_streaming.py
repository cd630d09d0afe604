"""Measure the large demo build and an 8 GB ingest under a 2 GB memory cap (issue 15, item 4: bounded memory).

Run: python bench/bench_streaming.py [--workdir DIR] [--years 30] [--cap-gb 2] [--skip-demo] [--keep] [--no-write]

1. ``wxshock demo --size large`` (256 x 256 cells x 48 years x 3 variables, 6.7 GB as int16, about 10 GB when
   the whole store was generated in memory) in a subprocess under the cap.
2. Writes CF NetCDF input of invented values: 256 x 256 cells, one file per variable and year, tasmax and tasmin
   in K and pr in kg m-2 s-1 as float32 (30 years: 8.6 GB), so that ingest converts units on every block.
3. ``wxshock ingest`` of those files into a new store, in a subprocess under the cap; a few cells are then checked
   against the input.

The cap is made by tests/_support_memory.py: a cgroup v2 group with ``memory.max`` where the machine delegates
one, else a cgroup v1 memory group (``memory.limit_in_bytes``), else RLIMIT_DATA. Reported per run: wall time,
the process's peak RSS (ru_maxrss from wait4: anonymous memory and mapped file pages), the group's peak
(``memory.peak`` on v2, ``memory.max_usage_in_bytes`` on v1: RSS plus the page cache of the files the process
read and wrote, which the kernel reclaims at the cap, so it sits near the cap by design) and the kills for
memory. Free disk is checked first; inputs and stores are deleted at the end unless --keep. Prints a Markdown
section and puts it in bench/RESULTS.md between its markers.
"""

from __future__ import annotations

import argparse
import os
import platform
import shutil
import subprocess
import sys
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from _results import write_section  # noqa: E402

from tests._support_memory import MemoryCap  # noqa: E402

START = "<!-- bench_streaming: start -->"
END = "<!-- bench_streaming: end -->"
CELLS = 256
CAP_WORDS = {
    "cgroup v2": " (`memory.max`; the group's peak is `memory.peak`, which counts the page cache of the files read "
    "and written as well as RSS, so it nears the cap whenever the files outgrow it: the kernel then reclaims clean "
    "cache)",
    "cgroup v1": " (this machine offers no writable cgroup v2 `memory.max`; v1's "
    "`memory.limit_in_bytes` caps RSS and page cache together, as `memory.max` does; the group's peak is "
    "`memory.max_usage_in_bytes`, which counts the page cache of the files read and written as well as RSS, so it "
    "nears the cap whenever the files outgrow it: the kernel then reclaims clean cache)",
    "RLIMIT_DATA": " (no cgroup could be made: RLIMIT_DATA caps the heap and private mappings, and a run that "
    "passes it fails with MemoryError; there is no group peak)",
}
FIRST_YEAR = 1991
GB = 1e9


def disk_free(path: Path) -> int:
    """Free bytes on the file system of ``path``."""
    return shutil.disk_usage(path).free


def du(path: Path) -> int:
    """Bytes of the files under ``path``."""
    return sum(f.stat().st_size for f in path.rglob("*") if f.is_file()) if path.exists() else 0


def staging_bytes(directory: Path) -> int:
    """Bytes of the staging directories (``.*.staging-*``) under ``directory`` now."""
    total = 0
    for staging in directory.glob(".*.staging-*"):
        for f in staging.rglob("*.tiles"):
            try:
                total += f.stat().st_size
            except OSError:
                pass  # removed meanwhile
    return total


def run_capped(args: list[str], cap_bytes: int, timeout: float, staging_in: Path) -> dict:
    """Run ``python -m service.cli ARGS`` under a fresh memory cap; wall time, peak RSS, group peak, kills, and
    the largest staging on disk seen under ``staging_in`` (sampled every 0.5 s)."""
    cap = MemoryCap.make(cap_bytes)
    env = {k: v for k, v in os.environ.items() if not k.startswith("WXSHOCK_")}
    env["PYTHONPATH"] = str(ROOT)
    load_before = os.getloadavg()[0]
    started = time.perf_counter()
    process = subprocess.Popen([sys.executable, "-m", "service.cli", *args], env=env, preexec_fn=cap.enter,
                               stdout=subprocess.PIPE, stderr=subprocess.STDOUT)  # fmt: skip
    deadline = started + timeout
    staged = 0
    try:
        while True:
            pid, status, usage = os.wait4(process.pid, os.WNOHANG)
            if pid:
                break
            if time.perf_counter() > deadline:
                process.kill()
                raise TimeoutError(f"{args[0]} did not finish within {timeout:.0f} s")
            staged = max(staged, staging_bytes(staging_in))
            time.sleep(0.5)
        wall = time.perf_counter() - started
        process.returncode = os.waitstatus_to_exitcode(status)
        output = process.stdout.read().decode(errors="replace") if process.stdout else ""
        result = {
            "command": "wxshock " + " ".join(a if len(a) < 60 else "..." for a in args[:2]),
            "exit": process.returncode,
            "wall_s": wall,
            "peak_rss": usage.ru_maxrss * 1024,
            "group_peak": cap.peak_bytes(),
            "oom_kills": cap.oom_kills(),
            "cap": cap.kind,
            "cap_bytes": cap_bytes,
            "load_before": load_before,
            "load_after": os.getloadavg()[0],
            "output": output[-2000:],
            "staging_peak": staged,
        }
    finally:
        cap.remove()
    return result


def write_inputs(directory: Path, years: int) -> tuple[list[Path], int]:
    """Invented daily CF NetCDF files (one per variable and year, float32): tasmax, tasmin (K), pr (kg m-2 s-1)."""
    import pandas as pd
    import xarray as xr

    directory.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(2026)
    # an invented region over open ocean (0-2.56 N, 30-27.44 W): 0.01 degree cells
    lat = 2.56 - 0.01 * (np.arange(CELLS) + 0.5)
    lon = -30.0 + 0.01 * (np.arange(CELLS) + 0.5)
    gradient = (np.linspace(0.0, 3.0, CELLS)[:, None] + np.linspace(0.0, 1.0, CELLS)[None, :]).astype(
        np.float32
    )
    files, nbytes = [], 0
    for year in range(FIRST_YEAR, FIRST_YEAR + years):
        time_index = pd.date_range(f"{year}-01-01", f"{year}-12-31", freq="D")
        season = np.sin(2 * np.pi * (time_index.day_of_year.values - 100) / 365.25).astype(np.float32)
        shape = (time_index.size, CELLS, CELLS)
        noise = rng.standard_normal(shape, dtype=np.float32)
        tasmax = 302.0 + 4.0 * season[:, None, None] - gradient[None] + 1.5 * noise
        tasmin = tasmax - 9.0 - np.abs(rng.standard_normal(shape, dtype=np.float32)) * 2.0
        wet = rng.random(shape, dtype=np.float32) < 0.3
        pr = np.where(wet, rng.standard_gamma(0.8, shape).astype(np.float32) * 8.0 / 86400.0, np.float32(0.0))
        del noise, wet
        spelled = {
            "tasmax": (tasmax, "air_temperature", "time: maximum", "K"),
            "tasmin": (tasmin, "air_temperature", "time: minimum", "K"),
            "pr": (pr, "precipitation_flux", "time: mean", "kg m-2 s-1"),
        }
        for name, (values, standard, methods, units) in spelled.items():
            ds = xr.Dataset(
                {name: (("time", "lat", "lon"), values.astype(np.float32),
                        {"standard_name": standard, "cell_methods": methods, "units": units})},
                coords={"time": ("time", time_index.values, {"standard_name": "time"}),
                        "lat": ("lat", lat, {"standard_name": "latitude", "units": "degrees_north"}),
                        "lon": ("lon", lon, {"standard_name": "longitude", "units": "degrees_east"})},
            )  # fmt: skip
            ds.attrs["Conventions"] = "CF-1.8"
            path = directory / f"bench_{name}_{year}.nc"
            ds.to_netcdf(
                path, encoding={name: {"dtype": "float32"}, "time": {"units": "days since 1991-01-01"}}
            )
            files.append(path)
            nbytes += values.size * 4
        del tasmax, tasmin, pr
    return files, nbytes


def check_ingested(files: list[Path], store_path: Path) -> str:
    """Compare a few cells of the first and last years with the input (K -> degC, kg m-2 s-1 -> mm/day)."""
    import xarray as xr

    from service.store import open_store

    store = open_store(store_path)
    cells = [(0, 0), (17, 200), (255, 255)]
    worst = 0.0
    checked = 0
    for path in (files[0], files[1], files[2], files[-3], files[-2], files[-1]):
        with xr.open_dataset(path) as ds:
            name = next(iter(ds.data_vars))
            first_day = int(
                (ds.time.values[0] - np.datetime64(f"{FIRST_YEAR}-01-01")) // np.timedelta64(1, "D")
            )
            n = ds.sizes["time"]
            variable = {"tasmax": "tmax", "tasmin": "tmin", "pr": "prcp"}[name]
            factor, offset = (86400.0, 0.0) if name == "pr" else (1.0, -273.15)
            for y, x in cells:
                want = ds[name].values[:, y, x].astype(np.float64) * factor + offset
                got = store.read(variable, slice(y, y + 1), slice(x, x + 1), slice(first_day, first_day + n))
                worst = max(worst, float(np.max(np.abs(got.reshape(-1) - want))))
                checked += n
    if worst > 0.05 + 1e-6:
        raise AssertionError(f"ingested values differ from the input by up to {worst}")
    return (
        f"{checked} cell-days of 3 cells in the first and last year agree with the input within {worst:.3f}"
    )


def section(results: dict, facts: dict) -> str:
    """The RESULTS.md section."""
    when = time.strftime("%Y-%m-%d %H:%M UTC", time.gmtime())
    lines = [
        START,
        "## Streaming demo and ingest in bounded memory (issue 15, `bench/bench_streaming.py`)",
        "",
        f"Measured {when} on {platform.machine()}, {os.cpu_count()} cores, Python {platform.python_version()}; "
        "each command a subprocess under a memory cap made by tests/_support_memory.py. On this machine the cap "
        f"is **{facts['cap']}**, {facts['cap_gb']:.1f} GB{CAP_WORDS.get(facts['cap'], '')}. Peak RSS is the "
        "process's ru_maxrss (from wait4). The machine is shared: the 1-minute load average is given beside each "
        "run, and wall times are inflated by it.",
        "",
        "| run | input | wall | peak RSS | group peak (RSS + page cache) | killed for memory | load before / after |",
        "|---|---|---|---|---|---|---|",
    ]
    for key, label in (
        ("demo", "`wxshock demo --size large`"),
        ("ingest", f"`wxshock ingest` ({facts.get('files')} files)"),
    ):
        r = results.get(key)
        if r is None:
            continue
        group = f"{r['group_peak'] / GB:.2f} GB" if r["group_peak"] is not None else "n/a"
        lines.append(
            f"| {label} | {facts[key + '_input']} | {r['wall_s'] / 60:.1f} min | **{r['peak_rss'] / GB:.2f} GB** | "
            f"{group} | {r['oom_kills']} | {r['load_before']:.1f} / {r['load_after']:.1f} |"
        )
    for note in facts["notes"]:
        lines.extend(["", note])
    lines.append("")
    lines.append(END)
    return "\n".join(lines) + "\n"


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--workdir", default=str(ROOT / "bench" / "out" / "streaming"))
    parser.add_argument("--years", type=int, default=30, help="years of ingest input (30: 8.6 GB)")
    parser.add_argument("--cap-gb", type=float, default=2.0, help="memory cap of each run, GB (default 2)")
    parser.add_argument("--skip-demo", action="store_true", help="only the ingest")
    parser.add_argument("--keep", action="store_true", help="keep the inputs and stores")
    parser.add_argument("--no-write", action="store_true", help="print the section, do not touch RESULTS.md")
    args = parser.parse_args()
    workdir = Path(args.workdir)
    workdir.mkdir(parents=True, exist_ok=True)
    input_bytes = args.years * 365.25 * CELLS * CELLS * 4 * 3
    # demo: store about 3 GB + staging about 2 GB; ingest: input + staging (int16, compressed) + store
    needed = 6e9 + input_bytes * 1.9
    free = disk_free(workdir)
    print(f"free disk {free / GB:.1f} GB, this run needs about {needed / GB:.1f} GB at its peak", flush=True)
    if free < needed + 10e9:
        print("not enough free disk (keeping 10 GB for others); use fewer --years", file=sys.stderr)
        return 2
    cap = int(args.cap_gb * GB)
    results: dict = {}
    facts: dict = {"cap_gb": args.cap_gb, "notes": []}
    try:
        if not args.skip_demo:
            demo = workdir / "demo" / "demo.zarr"
            print("building the large demo under the cap ...", flush=True)
            results["demo"] = run_capped(
                ["demo", str(demo), "--size", "large", "--quiet"], cap, 3 * 3600, demo.parent
            )
            print(results["demo"], flush=True)
            if results["demo"]["exit"] != 0:
                raise RuntimeError(f"demo failed: {results['demo']['output']}")
            from service.store import open_store

            store = open_store(demo)
            facts["demo_input"] = "generated: 256 x 256 x 17,532 days x 3 (6.7 GB as int16)"
            facts["notes"].append(
                f"Demo: store {du(demo.parent) / GB:.2f} GB on disk, fingerprint `{store.fingerprint}`, "
                f"{store.n_times} days; built a year at a time, staged as compressed int16 tiles beside the "
                "store, then written tile by tile (service/demo.py `stage_demo`, service/ingest/blocks.py). The "
                "tiny demo built this way keeps its pinned fingerprint, and a short demo built both ways gives "
                "one fingerprint (tests/test_ingest_blocks.py). The staging held "
                f"{results['demo']['staging_peak'] / GB:.2f} GB on disk at its largest, removed after the write. The "
                "in-memory build this replaces held the whole store, about 10 GB (issue 15), and was not run here."
            )
            if not args.keep:
                shutil.rmtree(demo.parent)
        inputs = workdir / "input"
        print("writing the ingest input ...", flush=True)
        started = time.perf_counter()
        files, nbytes = write_inputs(inputs, args.years)
        written = time.perf_counter() - started
        on_disk = du(inputs)
        facts["files"] = len(files)
        facts["ingest_input"] = (
            f"{on_disk / GB:.2f} GB of NetCDF ({nbytes / GB:.2f} GB of float32 values): 256 x 256 x "
            f"{args.years} years x 3"
        )
        out = workdir / "ingested.zarr"
        print("ingesting under the cap ...", flush=True)
        results["ingest"] = run_capped(
            ["ingest", *map(str, files), "--out", str(out), "--quiet"], cap, 3 * 3600, workdir
        )
        print({k: v for k, v in results["ingest"].items() if k != "output"}, flush=True)
        if results["ingest"]["exit"] != 0:
            raise RuntimeError(f"ingest failed: {results['ingest']['output']}")
        checked = check_ingested(files, out)
        facts["notes"].append(
            f"Ingest: input written by the bench in {written / 60:.1f} min (invented values, K and kg m-2 s-1, "
            f"so units are converted on every block); store {du(out) / GB:.2f} GB; {checked}. Input larger than "
            "1 GiB of float64 daily values streams by default: whole days in time blocks of about 128 MB of one "
            "variable's float64 values (cut where the input's dask chunks of 32 MiB are cut), encoded to int16 and "
            "staged beside the store, then written tile by tile through the store's write API. The staging took "
            f"{results['ingest']['staging_peak'] / GB:.2f} GB of disk at its largest. The in-memory path was not run "
            "on this input."
        )
    finally:
        if not args.keep:
            for name in ("input", "ingested.zarr", "demo"):
                path = workdir / name
                if path.exists():
                    shutil.rmtree(path)
    facts["cap"] = next(iter(results.values()))["cap"] if results else "none"
    text = section(results, facts)
    print(text)
    if not args.no_write:
        write_section(START, END, text)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

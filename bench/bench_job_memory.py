"""A job's memory step by step, in one process: RSS after each step of a job and its peak within the step.

    python bench/bench_job_memory.py FEATURES SERIES_MB IN_FLIGHT [STORE [FORMATS]]
    python bench/bench_job_memory.py 5000 64 1 bench/out/large/synthetic.zarr csv
    python bench/bench_job_memory.py 5000 0 0 bench/out/large/synthetic.zarr csv   # on-demand batches, two at once

FEATURES buffered points (bench_hardening's) over STORE (default: the small demo), default request; the job's
steps as service/jobs.py runs them: checks and weights (``pipeline.prepare``), the batches computed and spilled
(``pipeline.run_in_pieces`` with SERIES_MB of daily means per batch and IN_FLIGHT batches at once; 0: the
defaults of an on-demand request), then each format of FORMATS (default csv; json, parquet, dta, bundle) encoded
piece by piece from the spilled rows, and malloc_trim. RSS is sampled every 20 ms by a thread. bench/RESULTS.md,
"A job's memory", has the figures.
"""

from __future__ import annotations

import gc
import json
import os
import shutil
import sys
import tempfile
import threading
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "bench"))

from service.memory import release_memory, rss_bytes  # noqa: E402

MB = 2**20


class Sampler:
    """The process's peak RSS since the last reset, sampled by a thread."""

    def __init__(self) -> None:
        self.peak = rss_bytes()
        threading.Thread(target=self._run, daemon=True).start()

    def _run(self) -> None:
        while True:
            self.peak = max(self.peak, rss_bytes())
            time.sleep(0.02)

    def step(self, name: str, started: float) -> float:
        """Print the step's RSS now, its peak, its wall time and the load; start the next step."""
        print(f"{name:48s} rss {rss_bytes() / MB:6.0f} MB  peak {self.peak / MB:6.0f} MB  "
              f"{time.perf_counter() - started:6.1f} s  load {os.getloadavg()[0]:.1f}", flush=True)  # fmt: skip
        self.peak = rss_bytes()
        return time.perf_counter()


def main() -> None:
    """Run the steps of one job (see the module docstring)."""
    n, series_mb, in_flight = (int(a) for a in sys.argv[1:4])
    store_path = sys.argv[4] if len(sys.argv) > 4 else str(ROOT / "bench/out/latency-small/demo.zarr")
    formats = sys.argv[5].split(",") if len(sys.argv) > 5 else ["csv"]
    sampler, t0 = Sampler(), time.perf_counter()
    from bench_hardening import points

    from service import pipeline, request_text
    from service.jobs import write_pieces
    from service.schemas import IndicatorRequest
    from service.settings import Settings
    from service.store import open_store

    store = open_store(store_path)
    root = Path(tempfile.mkdtemp())
    settings = Settings(data_dir=root / "data")
    t0 = sampler.step("imports, store", t0)
    request = IndicatorRequest.model_validate(
        request_text.loads(json.dumps({"features": points(Path(store_path), n)}))
    )
    gc.collect()
    t0 = sampler.step(f"request of {n:,} features validated", t0)
    prepared = pipeline.prepare(request, store, settings, invalid_features="skip")
    t0 = sampler.step("checks and weights (prepare)", t0)
    spill = root / "spill"
    table = pipeline.run_in_pieces(
        request, store, settings, spill / "rows", invalid_features="skip", prepared=prepared,
        series_bytes=series_mb << 20 if series_mb else None, in_flight=in_flight or None,
    )  # fmt: skip
    assert table is not None
    spilled = sum(f.stat().st_size for f in (spill / "rows").iterdir()) / MB
    t0 = sampler.step(f"batches computed and spilled ({spilled:.0f} MB)", t0)
    for fmt in formats:
        out = root / f"out.{fmt}"
        with open(out, "wb") as handle:
            write_pieces(handle, fmt, table, spill / "entries")
        t0 = sampler.step(f"{fmt} written ({out.stat().st_size / MB:.0f} MB)", t0)
        out.unlink()
    table = frames = None  # noqa: F841 - dropped before the trim
    gc.collect()
    shutil.rmtree(root, ignore_errors=True)
    t0 = sampler.step("table dropped", t0)
    release_memory()
    sampler.step("malloc_trim(0)", t0)
    print(f"process CPU {time.process_time():.1f} s")


if __name__ == "__main__":
    main()

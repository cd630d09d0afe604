"""A job's memory step by step, in one process: RSS after each step of a job and its peak within the step.

    python bench/bench_job_memory.py FEATURES SERIES_MB IN_FLIGHT [STORE [FORMATS [TILE_MB]]]
    python bench/bench_job_memory.py 5000 64 1 bench/out/large/synthetic.zarr csv
    python bench/bench_job_memory.py 5000 0 0 bench/out/large/synthetic.zarr csv   # on-demand batches, two at once
    python bench/bench_job_memory.py 50000 64 1 bench/out/latency-small/demo.zarr csv 192   # a server's tile cache

FEATURES buffered points (bench_hardening's) over STORE (default: the small demo), default request; the job's
steps as service/jobs.py takes them. The submission: the request validated, its checks and weights
(``jobs.check_job_request``), the request's stored text and the pickled weights kept, the rest dropped (a trim,
as a server makes after each response). The run: the stored text re-validated and the weights unpickled
(the worker's ``parse_stored_request`` and ``_load_prepared``), the batches planned and the request let go
(``jobs.plan_to_file``), the batches computed and spilled (SERIES_MB of daily means per batch and IN_FLIGHT
batches at once; 0: the defaults of an on-demand request), then each format of FORMATS (default csv; json,
parquet, dta, bundle) encoded piece by piece from the spilled rows, and malloc_trim. TILE_MB is the decoded-tile
cache's budget (default 0, off; a server's default is 192). RSS is sampled every 20 ms by a thread.
bench/RESULTS.md, "A job's memory", has the figures.
"""

from __future__ import annotations

import gc
import json
import os
import pickle
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
    tile_mb = int(sys.argv[6]) if len(sys.argv) > 6 else 0
    sampler, t0 = Sampler(), time.perf_counter()
    from bench_hardening import points

    from service import jobs, pipeline, request_text
    from service.registry import StoreRegistry
    from service.schemas import IndicatorRequest
    from service.settings import Settings
    from service.store import open_store
    from service.store.chunks import configure_tile_cache

    store = open_store(store_path)
    registry = StoreRegistry({store.name: store})
    root = Path(tempfile.mkdtemp())
    settings = Settings(
        data_dir=root / "data",
        tile_cache_mb=tile_mb,
        job_batch_series_mb=series_mb or 1,
        job_batches_in_flight=in_flight or 1,
    )
    configure_tile_cache(settings.tile_cache_mb << 20)
    t0 = sampler.step("imports, store", t0)
    request = IndicatorRequest.model_validate(
        request_text.loads(json.dumps({"features": points(Path(store_path), n)}))
    )
    gc.collect()
    t0 = sampler.step(f"request of {n:,} features validated", t0)
    prepared = jobs.check_job_request(request, registry, settings)
    t0 = sampler.step("checks and weights (check_job_request)", t0)
    stored = request_text.canonical_text(request, exclude_unset=True)
    kept = pickle.dumps(prepared, protocol=5)
    request = prepared = None
    gc.collect()
    release_memory()
    t0 = sampler.step(f"kept: request text {len(stored) / MB:.0f} MB, weights {len(kept) / MB:.0f} MB", t0)
    request = jobs.parse_stored_request(stored, IndicatorRequest)
    prepared = pickle.loads(kept)
    t0 = sampler.step("run: stored request re-validated, weights loaded", t0)
    batches = {} if not series_mb else jobs.job_batches(settings)

    def ignore(done: int, total: int) -> None:
        return None

    # around the tile cache, as jobs.plan_to_file reads
    planned = pipeline.plan_in_pieces(
        request, store, settings, progress=ignore, cancelled=lambda: False,
        invalid_features=jobs.JOB_INVALID_FEATURES, prepared=prepared, cached=False, **batches,
    )  # fmt: skip
    assert planned is not None
    request = prepared = None  # as the job worker lets them go (service/jobs.py, JobRunner._run)
    gc.collect()
    t0 = sampler.step("batches planned, request let go", t0)
    spill = root / "spill"
    table = pipeline.spill_pieces(planned, spill / "rows")
    planned = None
    spilled = sum(f.stat().st_size for f in (spill / "rows").iterdir()) / MB
    t0 = sampler.step(f"batches computed and spilled ({spilled:.0f} MB)", t0)
    for fmt in formats:
        out = root / f"out.{fmt}"
        with open(out, "wb") as handle:
            jobs.write_pieces(handle, fmt, table, spill / "entries")
        t0 = sampler.step(f"{fmt} written ({out.stat().st_size / MB:.0f} MB)", t0)
        out.unlink()
    table = None
    gc.collect()
    shutil.rmtree(root, ignore_errors=True)
    t0 = sampler.step("table dropped", t0)
    release_memory()
    sampler.step("malloc_trim(0)", t0)
    print(f"process CPU {time.process_time():.1f} s")


if __name__ == "__main__":
    main()

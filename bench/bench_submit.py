"""Start-up of `wxshock submit`: how long the client takes before the server has the job, and in all (issue 14).

    python bench/bench_submit.py                                  # this tree, 7 runs, writes bench/RESULTS.md
    python bench/bench_submit.py --tree before=/tmp/old-tree --runs 7 --no-write

Builds (once) the tiny demo store in bench/out/, starts `wxshock serve` on 127.0.0.1 from this tree, and runs
`python -m service.cli submit` (a fresh process each time, as a user would) with each source tree first on
PYTHONPATH, the trees taking turns. The request is examples/request.json over the demo's 62 communities, CSV
out. Two times per run: until the client prints that the job was accepted (its start-up: imports, reading
and checking the request, the POST), and until the process exits with the file written.
"""

from __future__ import annotations

import argparse
import os
import platform
import statistics
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from tests import _support_server as server_support  # noqa: E402

RESULTS = ROOT / "bench" / "RESULTS.md"
HEADING = "## `wxshock submit` start-up (issue 14, `bench/bench_submit.py`)"
# `wxshock` itself, after saying which tree's service package it runs (imports nothing else first).
_WRAPPER = (
    "import sys, importlib.util; print(importlib.util.find_spec('service').origin, flush=True); "
    "from service.cli import main; sys.argv[0] = 'wxshock'; raise SystemExit(main(sys.argv[1:]))"
)


def one_submit(tree: Path, server: str, store_dir: Path, out: Path) -> tuple[float, float, float]:
    """Seconds until the job was accepted, until the command finished, and of CPU, for one `wxshock submit`."""
    env = {k: v for k, v in os.environ.items() if not k.startswith("WXSHOCK_")}
    env["PYTHONPATH"] = str(tree)
    args = [
        sys.executable, "-c", _WRAPPER, "submit", "--server", server,
        "--request", str(ROOT / "examples" / "request.json"),
        "--features", str(store_dir / "communities.geojson"), "--out", str(out),
    ]  # fmt: skip
    start = time.perf_counter()
    # Run from outside every tree: `python -m` puts the working directory before PYTHONPATH.
    process = subprocess.Popen(
        args, env=env, cwd=out.parent, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL, text=True
    )
    accepted = float("nan")
    assert process.stdout is not None
    first = process.stdout.readline()  # the tree the code came from (printed by the wrapper below)
    if not first.startswith(str(tree)):
        raise RuntimeError(f"the submit ran {first.strip()!r}, not the code of {tree}")
    for line in process.stdout:
        if "accepted" in line and accepted != accepted:
            accepted = time.perf_counter() - start
    _, status, usage = os.wait4(process.pid, 0)  # the child's own CPU time, less sensitive to a busy machine
    total = time.perf_counter() - start
    process.returncode = os.waitstatus_to_exitcode(status)
    if process.returncode != 0:
        raise RuntimeError(f"wxshock submit from {tree} exited {process.returncode}")
    return accepted, total, usage.ru_utime + usage.ru_stime


def run(trees: dict[str, Path], runs: int, notes: list[str]) -> str:
    """Measure every tree, taking turns, and return the RESULTS.md section."""
    from service.demo import ensure_demo

    out = ROOT / "bench" / "out" / "submit"
    store = ensure_demo(out, "tiny")
    server = server_support.start_process(stores=[store], data_dir=out / "server", timeout=300)
    times: dict[str, list[tuple[float, float, float]]] = {label: [] for label in trees}
    try:
        for label, tree in trees.items():  # warm-up: the OS file cache, the server's first job
            one_submit(tree, server.base_url, store.parent, out / f"warm-{label}.csv")
        for i in range(runs):
            for label, tree in trees.items():
                times[label].append(one_submit(tree, server.base_url, store.parent, out / f"{label}-{i}.csv"))
    finally:
        server.stop()
    load = os.getloadavg()[0]
    lines = [
        HEADING,
        "",
        f"`python bench/bench_submit.py {' '.join(f'--tree {k}={v}' for k, v in trees.items() if k != 'this')}"
        f" --runs {runs}`: `wxshock serve` on 127.0.0.1 over the tiny demo, `wxshock submit` of "
        "examples/request.json over its 62 communities (CSV), a new process per run, the trees taking turns. "
        "Medians (min-max) of seconds until the client printed that the job was accepted (its start-up and the "
        "POST), until it exited with the file written, and of the client process's CPU time.",
        "",
        "| tree | until accepted (s) | in all (s) | client CPU (s) |",
        "|---|---|---|---|",
    ]
    for label, runs_of_tree in times.items():
        cells = []
        for values in zip(*runs_of_tree, strict=True):
            cells.append(f"{statistics.median(values):.2f} ({min(values):.2f}-{max(values):.2f})")
        lines.append(f"| {label} | " + " | ".join(cells) + " |")
    lines += (
        [""]
        + [f"- {note}" for note in notes]
        + [
            f"- machine: {platform.machine()}, {os.cpu_count()} cores, load average {load:.1f} when done; "
            f"{time.strftime('%Y-%m-%d', time.gmtime())}"
            + (
                "; other work shared the machine, so these are upper bounds"
                if load > (os.cpu_count() or 1)
                else ""
            ),
            "",
        ]
    )
    return "\n".join(lines)


def write_section(text: str) -> None:
    """Replace this benchmark's section of bench/RESULTS.md (or append it)."""
    old = RESULTS.read_text(encoding="utf-8") if RESULTS.is_file() else "# Benchmark results\n\n"
    if HEADING in old:
        before, rest = old.split(HEADING, 1)
        after = rest.split("\n## ", 1)
        tail = "\n## " + after[1] if len(after) == 2 else ""
        new = before + text + tail
    else:
        new = old.rstrip("\n") + "\n\n" + text
    RESULTS.write_text(new, encoding="utf-8")


def main() -> None:
    """Parse options, measure, print and record."""
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--tree", action="append", default=[], help="LABEL=PATH of another source tree")
    parser.add_argument("--runs", type=int, default=7)
    parser.add_argument("--note", action="append", default=[], help="a line of explanation for RESULTS.md")
    parser.add_argument("--no-write", action="store_true", help="print the section, do not touch RESULTS.md")
    args = parser.parse_args()
    trees = {label: Path(path).resolve() for label, _, path in (t.partition("=") for t in args.tree)}
    trees["this"] = ROOT
    section = run(trees, args.runs, args.note)
    print(section)
    if not args.no_write:
        write_section(section)


if __name__ == "__main__":
    main()

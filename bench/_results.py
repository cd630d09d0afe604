"""bench/RESULTS.md: each benchmark owns one section between its own HTML comment markers."""

from __future__ import annotations

from pathlib import Path

RESULTS = Path(__file__).with_name("RESULTS.md")


def write_section(start: str, end: str, text: str, results: Path = RESULTS) -> None:
    """Replace the section between ``start`` and ``end`` (``text`` carries both markers), or append it."""
    old = results.read_text(encoding="utf-8") if results.is_file() else "# Benchmark results\n\n"
    if start in old and end in old:
        head, rest = old.split(start, 1)
        _, tail = rest.split(end, 1)
        new = head + text.rstrip("\n") + tail
    else:
        new = old.rstrip("\n") + "\n\n" + text.rstrip("\n") + "\n"
    results.write_text(new, encoding="utf-8")

"""An invented birth and interview file for the demo world (every id, date and person made up by this code).

    python examples/make_events.py DEMO_DIR/communities.geojson events.csv

Writes one row per event with the columns the request's events take (``id``, ``feature_id``, ``date``) and
one more a survey file would have (``kind``): for every community, the interviews of one survey round (a
fieldwork week in 2008 or 2014, one to three households a day) and the births of the five years before it,
spread over the calendar (29 February included where it falls). Seeded, so the file is the same every time.
"""

from __future__ import annotations

import csv
import datetime as dt
import json
import sys
from pathlib import Path

import numpy as np


def events_of(communities: dict, seed: int = 2004) -> list[dict[str, str]]:
    """Invented interviews and births of each community of a GeoJSON FeatureCollection."""
    rng = np.random.default_rng(seed)
    rows: list[dict[str, str]] = []
    for feature in communities["features"]:
        community = str(feature.get("id") or feature["properties"]["id"])
        year = 2008 if rng.random() < 0.5 else 2014
        start = dt.date(year, 3, 1) + dt.timedelta(days=int(rng.integers(0, 200)))
        households = int(rng.integers(4, 9))
        for k in range(households):
            day = start + dt.timedelta(days=int(k // 2))
            rows.append(
                {
                    "id": f"hh-{community}-{k + 1:02d}",
                    "feature_id": community,
                    "date": day.isoformat(),
                    "kind": "interview",
                }
            )
        for k in range(int(rng.integers(2, 6))):
            born = start - dt.timedelta(days=int(rng.integers(1, 5 * 365)))
            rows.append(
                {
                    "id": f"ch-{community}-{k + 1:02d}",
                    "feature_id": community,
                    "date": born.isoformat(),
                    "kind": "birth",
                }
            )
    if rows:  # one invented child born on a 29 February, for the leap-day rule
        rows.append(
            {"id": "ch-leap-01", "feature_id": rows[0]["feature_id"], "date": "2004-02-29", "kind": "birth"}
        )
    return rows


def main(argv: list[str]) -> int:
    """Read the communities, write the events CSV."""
    if len(argv) != 2:
        print(__doc__, file=sys.stderr)
        return 2
    communities = json.loads(Path(argv[0]).read_text(encoding="utf-8"))
    rows = events_of(communities)
    with Path(argv[1]).open("w", newline="", encoding="utf-8") as out:
        writer = csv.DictWriter(out, fieldnames=["id", "feature_id", "date", "kind"], lineterminator="\n")
        writer.writeheader()
        writer.writerows(rows)
    print(f"wrote {len(rows)} invented events of {len(communities['features'])} communities to {argv[1]}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main(sys.argv[1:]))

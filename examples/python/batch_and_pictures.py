"""A batch job with a progress bar, saved as Parquet, and the two pictures saved as PNG.

python batch_and_pictures.py [SERVER] [COMMUNITIES.geojson] [OUT_DIR]
"""

import json
import sys
from pathlib import Path

from service.client import Client

server = sys.argv[1] if len(sys.argv) > 1 else "http://127.0.0.1:8000"
communities = Path(sys.argv[2] if len(sys.argv) > 2 else "communities.geojson")
out = Path(sys.argv[3] if len(sys.argv) > 3 else ".")

request = {
    "baseline": (1981, 1990),
    "lags": [0, 1, 2],
    "indicators": ["prcp_total", "tmean", "cdd", "gdd"],
    "spells": [
        {
            "name": "dry_hot",
            "window": 5,
            "when": [{"indicator": "prcp_total", "class_max": -1}, {"indicator": "tmean", "class_min": 1}],
        }
    ],
}
with Client(server) as client:
    job = client.submit(communities, **request)  # any number of communities
    table = job.wait().result()  # progress bar: features done, total, time left
    table.to_parquet(out / "shocks.parquet")  # provenance stays in table.attrs
    print(f"job {job.id}: {len(table)} rows, {table['feature_id'].nunique()} communities")

    first = json.loads(communities.read_text())["features"][0]
    (out / "series.png").write_bytes(client.series_plot(first, **request))
    (out / "map.png").write_bytes(client.map_plot(communities, year=2010, indicator="prcp_total", **request))
    print("wrote", out / "series.png", "and", out / "map.png")

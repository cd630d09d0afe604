"""Season shocks of the demo communities as a DataFrame, merged onto a toy person-year panel.

python quickstart.py [SERVER] [COMMUNITIES.geojson]     (defaults: http://127.0.0.1:8000, communities.geojson)
"""

import sys

import pandas as pd

from service.client import Client

server = sys.argv[1] if len(sys.argv) > 1 else "http://127.0.0.1:8000"
communities = sys.argv[2] if len(sys.argv) > 2 else "communities.geojson"

client = Client(server)
shocks = client.indicators(
    communities,
    baseline=(1981, 1990),
    years=(1991, 2020),
    season=[5, 6, 7, 8, 9, 10],
    indicators=["prcp_total", "tmean", "spi"],
    lags=[0, 1],
)
print(shocks.shape, shocks.attrs["provenance"]["fingerprint"][:23])
panel = pd.DataFrame(
    {
        "person": [1, 1, 2, 2],
        "feature_id": ["qu-001", "qu-001", "qu-007", "qu-007"],
        "year": [2004, 2005, 2004, 2005],
    }
)
merged = panel.merge(shocks, on=["feature_id", "year"], how="left", validate="many_to_one")
print(merged[["person", "feature_id", "year", "prcp_total_z", "tmean_z", "tmean_z_lag1", "spi"]].round(2))

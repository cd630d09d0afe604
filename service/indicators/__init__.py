"""Season indicators: the catalog, the season cutter, baselines, classes, lags and spells, the table.

Importing the package imports every value module so that :func:`service.indicators.base.catalog` lists
every indicator.
"""

from __future__ import annotations

# the value modules register their indicators when imported
from service.indicators import base, basic, degree_days, drought, extremes  # noqa: F401

__all__ = ["base"]

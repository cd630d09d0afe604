"""Season indicators: the catalog, the season cutter, baselines, classes, lags and spells, the table.

Importing the package imports every value module so that :func:`service.indicators.base.catalog` lists
every indicator.
"""

from __future__ import annotations

from service.indicators import base, basic, degree_days  # noqa: F401  (value modules register at import)

__all__ = ["base"]

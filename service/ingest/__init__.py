"""Ingest: CF NetCDF daily or sub-daily files into a wxshock store, and rasters into its weight layers.

Modules: ``readers`` (files and rasters, grids), ``variables`` (which variable is which), ``units`` (a kept units
library), ``timeaxis`` (calendars, product conventions, sub-daily to daily), ``daily`` (files to lazy daily
variables), ``to_store`` (the ``wxshock ingest`` command's work), ``layers`` (weight layers remapped onto grids).
"""

from __future__ import annotations

from service.ingest.to_store import ingest_files
from service.ingest.variables import Choice, parse_choice

__all__ = ["Choice", "ingest_files", "parse_choice"]

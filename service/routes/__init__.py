"""The HTTP routes, one module per resource; each module exposes ``router``."""

from __future__ import annotations

# Included in this order; a module that is not present (plots, viewer) is left out.
ROUTER_MODULES = (
    "service.routes.health",
    "service.routes.datasets",
    "service.routes.indicators",
    "service.routes.series",
    "service.routes.jobs",
    "service.routes.plots",
    "service.routes.viewer",
    "service.routes.docs",
)

"""Exposure windows anchored on events (interviews, births): instances, kernels, values and the event table.

``resolve_events`` fills a request with events against a dataset; ``compute_event_table`` gives the rows of
a batch of events from their features' daily series. See instances.py for what "the same window in another
year" means.
"""

from service.indicators.windows.instances import BaselineGroup, CalendarDays, EventPlan, plan_events
from service.indicators.windows.table import (
    EventTable,
    ResolvedEvents,
    compute_event_table,
    resolve_events,
    wide_window_columns,
)

__all__ = [
    "BaselineGroup",
    "CalendarDays",
    "EventPlan",
    "EventTable",
    "ResolvedEvents",
    "compute_event_table",
    "plan_events",
    "resolve_events",
    "wide_window_columns",
]

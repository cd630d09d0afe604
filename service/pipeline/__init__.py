"""The one place where a request's work is scheduled and computed.

request -> features -> weights -> chunked aggregation (dask, computed once per feature batch)
-> daily series -> indicator table -> provenance. Routes, the CLI and the job worker all call ``run``.

A package, one module a concern: core (stores, provenance, weights, batches), checks, seasons (run, prepare), events,
variants, cells, series, files. Every name stays importable from ``service.pipeline``.
"""

from __future__ import annotations

from service.encode.files import write_atomically  # noqa: F401 - re-exported: pipeline.write_atomically stays
from service.pipeline.cells import (  # noqa: F401
    _aggregated_daily,
    _cells_requests,
    cell_centres_lonlat,
    cell_chunk_values,
    cell_daily_series,
    cells_table,
)
from service.pipeline.checks import (  # noqa: F401
    _dry_run,
    _prepare_resolved,
    _without_skipped,
)
from service.pipeline.core import (  # noqa: F401
    BATCH_SERIES_BYTES,
    DEFAULT_BATCH_FEATURES,
    FEATURE_COLUMNS,
    BatchJob,
    Cancelled,
    Progress,
    _check_years,
    _daily_series,
    _feature_columns,
    _feature_frame,
    _first_feature,
    _in_feature_order,
    _is_feature_column,
    _skip_option,
    _Skipped,
    _warnings_in_order,
    _without_features,
    _without_rows,
    batch_daily,
    batch_size_for,
    batch_table,
    batch_tables,
    check_cells_grids,
    daily_values,
    feature_batches,
    features_and_weights,
    grids_for,
    lazy_batch_table,
    lazy_batch_tables,
    needed_variables,
    parse_request_features,
    pick_store,
    provenance,
    request_hash,
    request_variables,
    series_variables,
    snap_places,
    store_daily_series,
    take_weights,
    time_span,
    weights_for,
)
from service.pipeline.events import (  # noqa: F401
    _batch_events,
    _dry_run_events,
    _event_batches,
    _event_summary,
    _events_job,
    _light_events_request,
    _row_order,
    prepare_events,
    resolve_events_for,
    run_events,
)
from service.pipeline.files import (  # noqa: F401
    _Bar,
    _progress_bar,
    compute_to_file,
    load_request,
)
from service.pipeline.seasons import (  # noqa: F401
    PIECE_FEATURES,
    PiecesRun,
    _batch_run,
    _BatchRun,
    _cells_batches,
    _counted,
    _pieces_in_order,
    plan_in_pieces,
    prepare,
    run,
    run_in_pieces,
    spill_pieces,
)
from service.pipeline.series import (  # noqa: F401
    SERIES_PIECE_ROWS,
    SeriesTable,
    run_series,
    series_result,
    series_table,
)
from service.pipeline.variants import (  # noqa: F401
    _cells_variants,
    _combine_variants,
    _group_span,
    _named,
    _resolve_variants,
    _shared_variants,
    _variant_batches,
    _variant_frame,
    _variant_runs,
    _VariantRun,
    _variants_provenance,
    _wide_variants,
    prepare_variants,
    run_variants,
    variant_requests,
)

"""The wxshock command: serve, demo, ingest, layer, describe, verify, compute, submit, openapi."""

from __future__ import annotations

import argparse
import json
import sys
from collections.abc import Sequence
from pathlib import Path

from service import __version__
from service.errors import WxshockError

# Top-level modules of the "service" extra (pyproject.toml); the light client install has none of them.
SERVICE_STACK = frozenset(
    {"numpy", "scipy", "xarray", "zarr", "numcodecs", "cftime", "dask", "distributed", "shapely", "pyproj",
     "fastapi", "uvicorn", "pydantic_settings", "netCDF4", "matplotlib", "fsspec", "s3fs", "antimeridian", "pint",
     "cf_xarray", "rasterio", "rioxarray"}
)  # fmt: skip


def _settings(args: argparse.Namespace):  # noqa: ANN202 - Settings, imported lazily to keep start-up quick
    """Settings from the environment, overridden by the command's own options."""
    from service.settings import Settings

    overrides = {
        key: value
        for key, value in {
            "data_dir": getattr(args, "data_dir", None),
            "stores": getattr(args, "store", None) or None,
            "host": getattr(args, "host", None),
            "port": getattr(args, "port", None),
            "scheduler": getattr(args, "scheduler", None),
        }.items()
        if value is not None
    }
    return Settings(**overrides)


def cmd_serve(args: argparse.Namespace) -> int:
    """Run the HTTP service with uvicorn."""
    from service.app import serve

    serve(_settings(args))
    return 0


def cmd_demo(args: argparse.Namespace) -> int:
    """Build the invented demo store and its communities.geojson."""
    from service.demo import build_demo

    build_demo(Path(args.path), size=args.size, progress=not args.quiet)
    return 0


def cmd_ingest(args: argparse.Namespace) -> int:
    """Ingest CF NetCDF files into a store (new, or appended to)."""
    from service.ingest import ingest_files

    settings = _settings(args)
    notes: list[str] = []
    fingerprint = ingest_files(
        [Path(f) for f in args.files],
        args.out,
        variables=list(args.var),
        grids=list(args.grid),
        utc_offset=args.utc_offset,
        period_stamp=args.period_stamp,
        storage_options=settings.storage_options() if str(args.out).startswith("s3://") else None,
        progress=not args.quiet,
        notes=notes,
    )
    for note in notes:
        print(f"note: {note}", file=sys.stderr)
    print(f"{args.out}: fingerprint {fingerprint}")
    return 0


def cmd_layer(args: argparse.Namespace) -> int:
    """Remap a raster onto every grid of a store as a named weight layer."""
    from service.ingest.layers import add_layer

    settings = _settings(args)
    report = add_layer(
        args.store,
        args.name,
        Path(args.file),
        args.kind,
        variable=args.variable,
        storage_options=settings.storage_options() if str(args.store).startswith("s3://") else None,
        progress=not args.quiet,
    )
    for line in report.lines(args.name):
        print(line, file=sys.stderr)
    print(f"{args.store}: fingerprint {report.fingerprint}")
    return 0


def cmd_describe(args: argparse.Namespace) -> int:
    """Print what a store holds."""
    from service.store import open_store

    settings = _settings(args)
    store = open_store(args.store, storage_options=settings.storage_options())
    info = store.describe()
    if args.json:
        print(json.dumps(info, indent=2, sort_keys=True, default=str))
    else:
        from service.describe_text import describe_text

        sys.stdout.write(describe_text(info))
    return 0


def cmd_verify(args: argparse.Namespace) -> int:
    """Recompute a store's fingerprint and compare it with the recorded one."""
    from service.store import verify_store

    settings = _settings(args)
    result = verify_store(args.store, storage_options=settings.storage_options())
    print(f"recorded {result.recorded}\ncomputed {result.computed}")
    print("ok" if result.ok else "MISMATCH: the store changed since it was written")
    return 0 if result.ok else 1


def cmd_migrate(args: argparse.Namespace) -> int:
    """Migrate a layout-1 store to layout 2 in place (recoverably), keeping its old fingerprint beside the new."""
    from service.store import migrate_store, open_store

    settings = _settings(args)
    options = settings.storage_options() if str(args.store).startswith("s3://") else None
    fingerprint = migrate_store(args.store, storage_options=options, progress=not args.quiet)
    store = open_store(args.store, storage_options=options)
    if fingerprint is None:
        print(f"{args.store}: already layout {store.layout_version}; fingerprint {store.fingerprint}")
    else:
        old = (store.migrated_from or {}).get("fingerprint")
        print(
            f"{args.store}: migrated to layout {store.layout_version}; fingerprint {fingerprint} (was {old})"
        )
    return 0


def cmd_relayout(args: argparse.Namespace) -> int:
    """Rewrite a store's daily variables in another chunking in place (recoverably); the fingerprint stays."""
    from service.store import DEFAULT_LAYOUT, Layout, relayout_store, store_layout

    settings = _settings(args)
    options = settings.storage_options() if str(args.store).startswith("s3://") else None
    shard = DEFAULT_LAYOUT.shard_tile if args.shard is None else (args.shard or None)
    layout = Layout(
        tile=args.tile or DEFAULT_LAYOUT.tile,
        time_chunk=args.days or DEFAULT_LAYOUT.time_chunk,
        shard_tile=shard,
        compressor=DEFAULT_LAYOUT.compressor,
        level=DEFAULT_LAYOUT.level,
    )
    before = store_layout(args.store, storage_options=options)
    fingerprint, rewritten = relayout_store(
        args.store, layout, storage_options=options, progress=not args.quiet
    )
    if rewritten:
        print(
            f"{args.store}: {before.describe()} -> {layout.describe()}; fingerprint {fingerprint} (unchanged)"
        )
    else:
        print(f"{args.store}: already {layout.describe()}; fingerprint {fingerprint}")
    return 0


def cmd_compute(args: argparse.Namespace) -> int:
    """Run the whole chain locally: weights, aggregation, indicators, encoding."""
    from service.pipeline import compute_to_file

    compute_to_file(
        store_location=args.store,
        request_path=Path(args.request),
        features_path=Path(args.features) if args.features else None,
        events_path=Path(args.events) if args.events else None,
        out_path=Path(args.out),
        settings=_settings(args),
        progress=not args.quiet,
    )
    return 0


def cmd_submit(args: argparse.Namespace) -> int:
    """Send a batch job to a server, follow it with a progress bar, and save the result."""
    from service.client import submit_files

    submit_files(
        server=args.server,
        request_path=Path(args.request),
        features_path=Path(args.features) if args.features else None,
        events_path=Path(args.events) if args.events else None,
        out_path=Path(args.out),
        token=args.token,
        progress=not args.quiet,
    )
    return 0


def cmd_openapi(args: argparse.Namespace) -> int:
    """Write the app's OpenAPI document (the committed contract) to a file or stdout."""
    from service.app import openapi_document

    text = json.dumps(openapi_document(), indent=2, sort_keys=True) + "\n"
    if args.out == "-":
        sys.stdout.write(text)
    else:
        Path(args.out).write_text(text, encoding="utf-8")
    return 0


def build_parser() -> argparse.ArgumentParser:
    """The argument parser of every subcommand."""
    parser = argparse.ArgumentParser(prog="wxshock", description=__doc__)
    parser.add_argument("--version", action="version", version=f"wxshock {__version__}")
    sub = parser.add_subparsers(dest="command", required=True)

    p = sub.add_parser("serve", help="run the HTTP service")
    p.add_argument("--store", action="append", help="store to serve (repeatable); default: the demo dataset")
    p.add_argument("--host", help="address to listen on (default 127.0.0.1)")
    p.add_argument("--port", type=int, help="port (default 8000)")
    p.add_argument("--data-dir", help="demo store, job database and results")
    p.add_argument("--scheduler", help="dask.distributed scheduler address, e.g. tcp://host:8786")
    p.set_defaults(func=cmd_serve)

    p = sub.add_parser("demo", help="build the invented demo store")
    p.add_argument("path", help="directory of the store to write")
    p.add_argument("--size", choices=["tiny", "small", "large"], default="small")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.set_defaults(func=cmd_demo)

    p = sub.add_parser("ingest", help="ingest CF NetCDF files into a store")
    p.add_argument("files", nargs="+", help="NetCDF files (one per year and variable, or any split)")
    p.add_argument("--out", required=True, help="store directory or s3:// URL; appended to when it exists")
    p.add_argument(
        "--var",
        action="append",
        default=[],
        metavar="VARIABLE=NAME[@FILES]",
        help="which file variable is tmax, tmin or prcp, e.g. tmax=tasmax; with @FILES only in the files whose "
        "name matches the pattern, e.g. 'tmax=t@tx_*.nc' (repeatable; tmax=t2m and tmin=t2m on sub-daily data "
        "give the daily maximum and minimum of one field)",
    )
    p.add_argument(
        "--grid",
        action="append",
        default=[],
        metavar="NAME | VARIABLE=NAME",
        help="name the files' grid in the store (a-z, 0-9, _), or the grid of one variable when the files lie on "
        "several grids, e.g. prcp=satellite (repeatable; default: the store's equal grid, else grid, grid2, ...)",
    )
    p.add_argument(
        "--utc-offset",
        metavar="+HH:MM",
        help="sub-daily data: days run midnight to midnight at this offset from UTC (default UTC)",
    )
    p.add_argument(
        "--period-stamp",
        choices=["end", "start", "middle"],
        default="end",
        help="sub-daily sums, means and extremes without time bounds: where the stamp sits in its time step "
        "(default end, as hourly reanalysis accumulations are stamped)",
    )
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.set_defaults(func=cmd_ingest)

    p = sub.add_parser("layer", help="add a weight layer to a store from a raster (GeoTIFF, NetCDF, any CRS)")
    p.add_argument("store", help="store directory or s3:// URL")
    p.add_argument("name", help='the layer\'s name, e.g. population (then "weighting": {"layer": NAME})')
    p.add_argument("file", help="a raster GDAL reads: GeoTIFF, NetCDF, ... in any CRS and resolution")
    p.add_argument(
        "--kind",
        required=True,
        choices=["count", "share"],
        help="count: a number per raster cell (people), shared among grid cells by overlap area; share: a fraction "
        "(cropland share), averaged over each grid cell by area",
    )
    p.add_argument("--variable", help="the NetCDF variable to read, when the file holds several")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.set_defaults(func=cmd_layer)

    p = sub.add_parser("describe", help="print what a store holds")
    p.add_argument("store")
    p.add_argument("--json", action="store_true", help="as JSON")
    p.set_defaults(func=cmd_describe)

    p = sub.add_parser("verify", help="recompute a store's fingerprint")
    p.add_argument("store")
    p.set_defaults(func=cmd_verify)

    p = sub.add_parser("migrate", help="migrate a store written by an older wxshock to today's layout")
    p.add_argument("store")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.set_defaults(func=cmd_migrate)

    p = sub.add_parser(
        "relayout",
        help="rewrite a store's daily variables in another chunking (default: today's layout for new stores)",
        description="Rewrite a store's daily variables in place with the chunking new stores get (or the one "
        "given), through the recoverable swap; the values and the fingerprint stay the same. A layout-1 store is "
        "migrated first. Needs free disk for a second copy of the store while it runs.",
    )
    p.add_argument("store")
    p.add_argument("--tile", type=int, help="cells per side of a compressed chunk (default: as new stores)")
    p.add_argument("--shard", type=int, help="cells per side of a shard of chunks, a multiple of --tile (0: no "
                   "shards; default: as new stores)")  # fmt: skip
    p.add_argument("--days", type=int, help="days per chunk (default: as new stores)")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.set_defaults(func=cmd_relayout)

    p = sub.add_parser("compute", help="compute indicators locally, without a server")
    p.add_argument(
        "--store",
        required=True,
        action="append",
        help="store directory or s3:// URL; repeat it for variants naming other datasets (by directory stem)",
    )
    p.add_argument("--request", required=True, help="request JSON (the same body as POST /v1/indicators)")
    p.add_argument("--features", help="GeoJSON file of communities (replaces the request's features)")
    p.add_argument(
        "--events", help="CSV or Parquet file of events: id, feature_id, date (replaces the request's)"
    )
    p.add_argument("--out", required=True, help="output file: .parquet, .csv or .json")
    p.add_argument("--scheduler", help="dask.distributed scheduler address")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.set_defaults(func=cmd_compute)

    p = sub.add_parser("submit", help="send a batch job to a wxshock server and save its result")
    p.add_argument("--server", required=True, help="base URL, e.g. http://127.0.0.1:8000")
    p.add_argument("--request", required=True, help="request JSON")
    p.add_argument("--features", help="GeoJSON file of communities (replaces the request's features)")
    p.add_argument(
        "--events", help="CSV or Parquet file of events: id, feature_id, date (replaces the request's)"
    )
    p.add_argument("--out", required=True, help="output file: .parquet, .csv or .json")
    p.add_argument("--token", help="bearer token (or set WXSHOCK_TOKEN)")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.set_defaults(func=cmd_submit)

    p = sub.add_parser("openapi", help="write the OpenAPI document")
    p.add_argument("--out", default="openapi/openapi.json", help="file, or - for stdout")
    p.set_defaults(func=cmd_openapi)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    """Entry point of the wxshock command; a user's mistake prints its reason and exits 2."""
    args = build_parser().parse_args(argv)
    try:
        return int(args.func(args))
    except WxshockError as exc:
        print(f"wxshock {args.command}: {exc.detail}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        print("wxshock: interrupted", file=sys.stderr)
        return 130
    except ModuleNotFoundError as exc:
        # The base install is the light client (submit); every other command needs the service extra.
        if (exc.name or "").split(".")[0] not in SERVICE_STACK:
            raise
        print(
            f"wxshock {args.command}: needs the service stack, which is not installed (no module {exc.name!r}); "
            "install it with: python -m pip install 'wxshock[service]'",
            file=sys.stderr,
        )
        return 2


if __name__ == "__main__":
    raise SystemExit(main())

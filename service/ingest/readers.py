"""Reading input files: CF NetCDF daily or sub-daily grids (lazily, with dask) and rasters for weight layers.

A file's grid is read from its 1-D coordinates and its CF grid_mapping (latitude-longitude, any projection,
rotated pole). Where a file also carries 2-D latitude and longitude, they are checked against the grid
mapping's own reading, so that a wrong pole or projection parameter is refused instead of placing every cell
elsewhere. A grid known only by 2-D latitude and longitude (a curvilinear grid without a grid mapping) is
refused: its cells cannot be placed exactly.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pyproj
import xarray as xr

from service.errors import IngestError
from service.ingest.units import length_factor

_LATITUDE_NAMES = ("lat", "latitude", "nav_lat")
_LONGITUDE_NAMES = ("lon", "longitude", "nav_lon")
_Y_STANDARD = ("latitude", "projection_y_coordinate", "grid_latitude")
_X_STANDARD = ("longitude", "projection_x_coordinate", "grid_longitude")
# Largest disagreement, in cells, allowed between a file's 2-D latitude/longitude and its grid mapping's reading
# of the cell centres (files store them as float32 and some compute them on another figure of the earth).
LONLAT_TOLERANCE_CELLS = 0.25


def open_netcdf(path: Path, chunks: dict[str, int] | None = None) -> xr.Dataset:
    """A NetCDF file opened lazily (dask-backed, CF-decoded: packing, fill values, dates in any calendar)."""
    if not path.is_file():
        raise IngestError(f"file {str(path)!r} does not exist", field="files")
    try:
        time_coder = xr.coders.CFDatetimeCoder(use_cftime=None)
        return xr.open_dataset(path, chunks=chunks if chunks is not None else {}, decode_times=time_coder)
    except Exception as exc:  # netCDF4 and h5netcdf raise many kinds; each is "not a readable file"
        raise IngestError(
            f"file {str(path)!r} cannot be read as NetCDF: {type(exc).__name__}: {exc}"
        ) from exc


@dataclass(frozen=True)
class FileGrid:
    """The grid of one file: 1-D cell centres in its CRS, and the 2-D longitude/latitude it carries, if any.

    ``x`` is in the order the store keeps (``x_order`` re-orders the file's columns to it, or is None);
    projected coordinates are in metres.
    """

    crs: pyproj.CRS
    x: np.ndarray
    y: np.ndarray
    y_dim: str
    x_dim: str
    x_order: np.ndarray | None
    lon: np.ndarray | None  # (ny, nx) degrees east, in store order, when the file gives them
    lat: np.ndarray | None
    described: str  # "latitude-longitude", "rotated pole (grid north pole 39.25 N, 162 W)", "Lambert ..."

    @property
    def shape(self) -> tuple[int, int]:
        """(ny, nx) cells."""
        return (self.y.size, self.x.size)

    def same_as(self, other: FileGrid) -> bool:
        """True when two files share the grid (CRS and cell centres, up to float noise)."""
        if self.shape != other.shape or not self.crs.equals(other.crs, ignore_axis_order=True):
            return False
        scale = max(1.0, float(np.abs(self.x).max()), float(np.abs(self.y).max()))
        return bool(
            np.allclose(self.x, other.x, rtol=0, atol=1e-9 * scale)
            and np.allclose(self.y, other.y, rtol=0, atol=1e-9 * scale)
        )

    def difference(self, other: FileGrid) -> str:
        """How another grid differs from this one, for messages."""
        if self.shape != other.shape:
            return f"{other.shape[0]} x {other.shape[1]} cells instead of {self.shape[0]} x {self.shape[1]}"
        if not self.crs.equals(other.crs, ignore_axis_order=True):
            return f"CRS {other.crs.name!r} instead of {self.crs.name!r}"
        dx = float(np.max(np.abs(self.x - other.x)))
        dy = float(np.max(np.abs(self.y - other.y)))
        return f"cell centres differ by up to {max(dx, dy)!r} (x {dx!r}, y {dy!r})"


def _coordinate_role(ds: xr.Dataset, name: str) -> str | None:
    """'y', 'x' or None for a 1-D coordinate, from its standard_name, axis or usual name."""
    attrs = ds[name].attrs
    standard = str(attrs.get("standard_name", "")).strip()
    axis = str(attrs.get("axis", "")).strip().upper()
    if standard in _Y_STANDARD or axis == "Y":
        return "y"
    if standard in _X_STANDARD or axis == "X":
        return "x"
    lower = name.lower()
    if lower in ("lat", "latitude", "y", "rlat", "yc"):
        return "y"
    if lower in ("lon", "longitude", "x", "rlon", "xc"):
        return "x"
    return None


def spatial_dims(path: Path, ds: xr.Dataset) -> tuple[str, str]:
    """(y dim, x dim) of a file: dims with a 1-D coordinate that CF attributes or usual names call y and x."""
    found: dict[str, str] = {}
    for name in ds.dims:
        key = str(name)
        if key in ds.coords and ds[key].ndim == 1:
            role = _coordinate_role(ds, key)
            if role is not None and role not in found:
                found[role] = key
    if "y" in found and "x" in found:
        return found["y"], found["x"]
    two_d = _two_d_lonlat(ds)
    if two_d is not None:
        raise IngestError(
            f"file {str(path)!r} locates its cells only by 2-D latitude and longitude ({two_d[1]!r}, {two_d[0]!r}) "
            "without 1-D coordinates in a CRS that a grid_mapping names (a curvilinear grid); wxshock cannot place "
            "such cells exactly. Regrid the data to a regular latitude-longitude or projected grid first, or add "
            "the 1-D projection coordinates and their grid_mapping"
        )
    raise IngestError(
        f"file {str(path)!r}: cannot tell its y and x coordinates (dims {list(map(str, ds.dims))!r}); give 1-D "
        "coordinates with standard_name latitude/longitude, projection_y_coordinate/projection_x_coordinate or "
        "grid_latitude/grid_longitude"
    )


def _two_d_lonlat(ds: xr.Dataset) -> tuple[str, str] | None:
    """(longitude name, latitude name) of 2-D longitude/latitude variables, if the file has them."""
    lon = lat = None
    for key in list(ds.coords) + list(ds.data_vars):
        name = str(key)
        var = ds[name]
        if var.ndim != 2:
            continue
        standard = str(var.attrs.get("standard_name", "")).strip()
        units = str(var.attrs.get("units", "")).strip().lower()
        if standard == "latitude" or (name.lower() in _LATITUDE_NAMES and units.startswith("degree")):
            lat = lat or name
        elif standard == "longitude" or (name.lower() in _LONGITUDE_NAMES and units.startswith("degree")):
            lon = lon or name
    return (lon, lat) if lon and lat else None


def _grid_mapping(path: Path, ds: xr.Dataset) -> tuple[str, dict[str, Any]] | None:
    """(name, attributes) of the grid_mapping variable that the file's data variables name, if any."""
    for var in ds.data_vars.values():
        mapping = (
            str(var.attrs.get("grid_mapping", "") or var.encoding.get("grid_mapping", ""))
            .split(":")[0]
            .strip()
        )
        if mapping and mapping in ds.variables:
            return mapping, dict(ds[mapping].attrs)
    return None


def _crs_from_mapping(path: Path, name: str, attrs: dict[str, Any]) -> pyproj.CRS:
    """The CRS of a CF grid_mapping variable: its crs_wkt (or spatial_ref), else its CF parameters.

    When a WKT and CF parameters are both present and disagree, the file contradicts itself: refused.
    """
    where = f"file {str(path)!r}: grid_mapping {name!r}"
    from_cf: pyproj.CRS | None = None
    from_wkt: pyproj.CRS | None = None
    try:
        if attrs.get("grid_mapping_name"):
            from_cf = pyproj.CRS.from_cf(
                {k: v for k, v in attrs.items() if k not in ("crs_wkt", "spatial_ref")}
            )
        for key in ("crs_wkt", "spatial_ref"):
            if attrs.get(key):
                from_wkt = pyproj.CRS.from_user_input(str(attrs[key]))
                break
    except pyproj.exceptions.CRSError as exc:
        raise IngestError(f"{where} is not a CRS pyproj reads: {exc}") from exc
    if from_cf is not None and from_wkt is not None and not _same_place(from_cf, from_wkt):
        raise IngestError(
            f"{where}: its crs_wkt ({from_wkt.name!r}) and its CF parameters ({attrs.get('grid_mapping_name')!r}) "
            "place the grid differently; fix or remove one of them"
        )
    crs = from_wkt or from_cf
    if crs is None:
        raise IngestError(
            f"{where} has neither crs_wkt nor grid_mapping_name; add the CF grid mapping attributes"
        )
    return crs


def _same_place(a: pyproj.CRS, b: pyproj.CRS) -> bool:
    """True when two CRSs put a few test points at the same longitude/latitude (within 1e-6 degree)."""
    if a.equals(b, ignore_axis_order=True):
        return True
    try:
        ta = pyproj.Transformer.from_crs(a, "EPSG:4326", always_xy=True)
        tb = pyproj.Transformer.from_crs(b, "EPSG:4326", always_xy=True)
        unit = 1.0 if a.is_geographic else 100_000.0
        points = np.array([-1.0, 0.0, 1.0]) * unit
        xa, ya = ta.transform(points, points[::-1])
        xb, yb = tb.transform(points, points[::-1])
    except pyproj.exceptions.ProjError:
        return False
    return bool(np.allclose(xa, xb, atol=1e-6) and np.allclose(ya, yb, atol=1e-6))


def _describe_crs(crs: pyproj.CRS, attrs: dict[str, Any] | None) -> str:
    """Plain words for a grid's CRS."""
    if attrs and attrs.get("grid_mapping_name") == "rotated_latitude_longitude":
        return (
            f"rotated pole (grid north pole at {attrs.get('grid_north_pole_latitude')} N, "
            f"{attrs.get('grid_north_pole_longitude')} E)"
        )
    if crs.is_geographic:
        return "latitude-longitude"
    return f"projected ({crs.name})"


def _is_rotated(crs: pyproj.CRS) -> bool:
    """True for a rotated-pole (or other derived geographic) CRS: its coordinates are not longitude/latitude."""
    return bool(crs.is_geographic and crs.is_derived)


def _longitudes(x: np.ndarray) -> tuple[np.ndarray, np.ndarray | None]:
    """Longitudes beyond 180 moved to -180..180 when the grid stays contiguous there (a global grid); a regional
    grid across the antimeridian keeps its 0..360 longitudes, which run on without a break."""
    if x.size < 2 or not np.any(x > 180.0):
        return x, None
    wrapped = ((x + 180.0) % 360.0) - 180.0
    order = np.argsort(wrapped, kind="stable")
    steps = np.diff(wrapped[order])
    step = abs(float(x[1] - x[0]))
    if np.allclose(steps, step, rtol=1e-6, atol=1e-9):
        identity = np.array_equal(order, np.arange(x.size))
        return wrapped[order], None if identity else order
    return x, None


def file_grid(path: Path, ds: xr.Dataset) -> FileGrid:
    """The grid of one file; checks 2-D latitude/longitude against the grid mapping where both are present."""
    y_dim, x_dim = spatial_dims(path, ds)
    y = np.array(ds[y_dim].values, dtype=np.float64)
    x = np.array(ds[x_dim].values, dtype=np.float64)
    for name, values in ((y_dim, y), (x_dim, x)):
        steps = np.diff(values)
        if not np.all(np.isfinite(values)) or (
            values.size > 1 and not (np.all(steps > 0) or np.all(steps < 0))
        ):
            raise IngestError(
                f"file {str(path)!r}: coordinate {name!r} is not finite and strictly monotonic; fix the file's "
                "coordinates"
            )
    mapping = _grid_mapping(path, ds)
    y_standard = str(ds[y_dim].attrs.get("standard_name", "")).strip()
    geographic_names = y_standard == "latitude" or (not y_standard and y_dim.lower() in ("lat", "latitude"))
    rotated_names = y_standard == "grid_latitude" or y_dim.lower() == "rlat"
    if mapping is not None:
        crs = _crs_from_mapping(path, *mapping)
    elif geographic_names:
        crs = pyproj.CRS.from_epsg(4326)
    elif rotated_names:
        raise IngestError(
            f"file {str(path)!r} has rotated-pole coordinates ({y_dim!r}, {x_dim!r}) but no grid_mapping variable "
            "naming the pole; add the CF rotated_latitude_longitude grid mapping"
        )
    else:
        raise IngestError(
            f"file {str(path)!r} has projected coordinates ({y_dim!r}, {x_dim!r}) but no grid_mapping variable; add "
            "the CF grid_mapping (with crs_wkt) so the grid's CRS is known"
        )
    if geographic_names and not crs.is_geographic:
        raise IngestError(
            f"file {str(path)!r}: coordinates {y_dim!r}/{x_dim!r} are latitude/longitude but the grid_mapping names a "
            f"projected CRS ({crs.name!r}); fix the grid_mapping or the coordinates' standard_name"
        )
    if not crs.is_geographic:
        for name, values in ((y_dim, y), (x_dim, x)):
            values *= length_factor(str(ds[name].attrs.get("units", "m")), f"file {str(path)!r}: {name!r}")
    order = None
    if crs.is_geographic and not _is_rotated(crs):
        x, order = _longitudes(x)
    lon = lat = None
    two_d = _two_d_lonlat(ds)
    if two_d is not None:
        lon_var = ds[two_d[0]].transpose(y_dim, x_dim) if set(ds[two_d[0]].dims) == {y_dim, x_dim} else None
        lat_var = ds[two_d[1]].transpose(y_dim, x_dim) if set(ds[two_d[1]].dims) == {y_dim, x_dim} else None
        if lon_var is not None and lat_var is not None:
            lon = np.asarray(lon_var.values, dtype=np.float64)
            lat = np.asarray(lat_var.values, dtype=np.float64)
            if order is not None:
                lon, lat = lon[:, order], lat[:, order]
            check_lonlat(path, crs, x, y, lon, lat)
    elif _is_rotated(crs):
        pass  # the pole alone places the cells; nothing to check them against
    grid = FileGrid(
        crs=crs,
        x=x,
        y=y,
        y_dim=y_dim,
        x_dim=x_dim,
        x_order=order,
        lon=lon,
        lat=lat,
        described=_describe_crs(crs, mapping[1] if mapping else None),
    )
    return grid


def check_lonlat(
    path: Path, crs: pyproj.CRS, x: np.ndarray, y: np.ndarray, lon: np.ndarray, lat: np.ndarray
) -> None:
    """Refuse a file whose 2-D latitude/longitude disagree with its grid mapping by more than a quarter cell.

    The file's own longitude/latitude of each cell are carried into the grid's CRS and compared with the 1-D
    centres, in cells: a wrong pole or projection parameter shows as a disagreement of many cells.
    """
    finite = np.isfinite(lon) & np.isfinite(lat)
    if not finite.any():
        return
    to_grid = pyproj.Transformer.from_crs("EPSG:4326", crs, always_xy=True)
    gx, gy = to_grid.transform(lon, lat)
    xx, yy = np.meshgrid(x, y)
    dx = gx - xx
    if crs.is_geographic:
        dx = (dx + 180.0) % 360.0 - 180.0
    dy = gy - yy
    cell_x = abs(float(np.median(np.diff(x)))) if x.size > 1 else 1.0
    cell_y = abs(float(np.median(np.diff(y)))) if y.size > 1 else 1.0
    miss = np.hypot(dx / cell_x, dy / cell_y)
    miss = np.where(finite & np.isfinite(miss), miss, np.inf)
    worst = int(np.argmax(miss))
    j, i = np.unravel_index(worst, miss.shape)
    if miss[j, i] > LONLAT_TOLERANCE_CELLS:
        ex, ey = pyproj.Transformer.from_crs(crs, "EPSG:4326", always_xy=True).transform(xx[j, i], yy[j, i])
        far = (
            "cannot be carried into the grid's CRS"
            if not np.isfinite(gx[j, i])
            else f"{miss[j, i]:.3g} cells off"
        )
        raise IngestError(
            f"file {str(path)!r}: its own 2-D latitude/longitude disagree with its grid_mapping ({crs.name!r}): at cell "
            f"(row {j}, column {i}) the file says lon {lon[j, i]:.4f}, lat {lat[j, i]:.4f}, the grid mapping "
            f"{ex:.4f}, {ey:.4f} ({far}; at most {LONLAT_TOLERANCE_CELLS} allowed). Check the grid mapping's "
            "parameters (for a rotated pole: grid_north_pole_latitude and grid_north_pole_longitude) against the "
            "latitude/longitude, fix the wrong one, and ingest again"
        )


def time_dim(path: Path, ds: xr.Dataset, var: xr.DataArray) -> str:
    """The time dim of a variable (a decoded date coordinate, or one with axis T)."""
    for name in var.dims:
        if name in ds.coords and (
            np.issubdtype(ds[name].dtype, np.datetime64)
            or ds[name].dtype == object
            or str(ds[name].attrs.get("axis", "")).upper() == "T"
        ):
            return str(name)
    raise IngestError(
        f"file {str(path)!r}: variable {var.name!r} has no decodable time coordinate (dims {var.dims!r})"
    )


def variable_data(path: Path, ds: xr.Dataset, name: str, grid: FileGrid, time_name: str) -> xr.DataArray:
    """One variable as a lazy (time, y, x) DataArray in the store's x order, coordinates dropped.

    Extra dims of length 1 (a height, an ensemble member) are dropped; longer ones are an error.
    """
    var = ds[name]
    extra = [d for d in var.dims if d not in (time_name, grid.y_dim, grid.x_dim)]
    long_extra = [d for d in extra if var.sizes[d] != 1]
    if long_extra or grid.y_dim not in var.dims or grid.x_dim not in var.dims:
        raise IngestError(
            f"file {str(path)!r}: variable {name!r} has dims {tuple(map(str, var.dims))!r} (sizes "
            f"{dict(var.sizes)!r}); expected time, {grid.y_dim!r} and {grid.x_dim!r}, plus only dims of length 1. "
            "Select one slice of the others (e.g. one ensemble member or version) first"
        )
    if extra:
        var = var.isel({d: 0 for d in extra})
    bounds = valid_bounds(var)
    if bounds is not None:
        lo, hi = bounds
        # CF: values outside the valid range are missing; xarray's decoding applies only _FillValue/missing_value
        var = var.where((var >= lo) & (var <= hi))
    data = var.transpose(time_name, grid.y_dim, grid.x_dim)
    data = data.rename({time_name: "time", grid.y_dim: "y", grid.x_dim: "x"})
    data = data.reset_coords(drop=True).drop_vars(["time", "y", "x"], errors="ignore")
    if grid.x_order is not None:
        data = data.isel(x=grid.x_order)
    return data


def valid_bounds(var: xr.DataArray) -> tuple[float, float] | None:
    """(lowest, highest) valid value of a variable in its decoded units from valid_range, valid_min, valid_max.

    CF gives them in the packed type for packed data: integer bounds of an integer-packed variable are unpacked
    with its scale_factor and add_offset; floating bounds are taken as already in the decoded units.
    """
    attrs = var.attrs
    lo, hi = -np.inf, np.inf
    raw: list[Any] = []
    if "valid_range" in attrs and np.size(attrs["valid_range"]) == 2:
        lo, hi = (np.asarray(attrs["valid_range"]).ravel()[k] for k in (0, 1))
        raw = [lo, hi]
    if "valid_min" in attrs:
        lo = np.asarray(attrs["valid_min"]).ravel()[0]
        raw.append(lo)
    if "valid_max" in attrs:
        hi = np.asarray(attrs["valid_max"]).ravel()[0]
        raw.append(hi)
    if not raw:
        return None
    scale = var.encoding.get("scale_factor")
    offset = var.encoding.get("add_offset")
    packed = (scale is not None or offset is not None) and np.issubdtype(
        np.dtype(var.encoding.get("dtype", "f8")), np.integer
    )
    if packed and all(np.issubdtype(np.asarray(v).dtype, np.integer) for v in raw):
        factor = float(scale) if scale is not None else 1.0
        shift = float(offset) if offset is not None else 0.0
        lo, hi = (float(v) * factor + shift if np.isfinite(v) else float(v) for v in (lo, hi))
        if factor < 0:
            lo, hi = hi, lo
    return float(lo), float(hi)


# --- rasters for weight layers --------------------------------------------------------------------------------


@dataclass(frozen=True)
class Raster:
    """A raster opened for reading by window: a regular grid given by its affine transform, in its CRS."""

    path: Path
    crs: pyproj.CRS
    transform: Any  # affine.Affine: column, row -> x, y of the upper-left corner
    width: int
    height: int
    nodata: float | None
    units: str
    source: Any  # the lazily opened rioxarray DataArray (y, x)

    def read(self, rows: slice, cols: slice) -> np.ndarray:
        """(rows, cols) float64 values of a window; NaN where the raster has no data."""
        block = np.asarray(self.source.isel(y=rows, x=cols).values, dtype=np.float64)
        return block

    def x_edges(self) -> np.ndarray:
        """(width + 1,) column edges in CRS units, increasing."""
        return self.transform.c + self.transform.a * np.arange(self.width + 1)

    def y_edges(self) -> np.ndarray:
        """(height + 1,) row edges in CRS units, in row order (decreasing for a north-up raster)."""
        return self.transform.f + self.transform.e * np.arange(self.height + 1)


def open_raster(path: Path, variable: str | None = None) -> Raster:
    """A GeoTIFF, NetCDF or any raster GDAL reads, opened with rioxarray; one band (or one NetCDF variable)."""
    import rioxarray

    if not path.is_file():
        raise IngestError(f"raster {str(path)!r} does not exist", field="file")
    source = f"NETCDF:{path}:{variable}" if variable else str(path)
    try:
        opened = rioxarray.open_rasterio(source, masked=True, chunks={"x": 2048, "y": 2048})
    except Exception as exc:  # rasterio raises several kinds for unreadable input
        hint = (
            " (a NetCDF with several variables needs --variable NAME)"
            if path.suffix.lower() in (".nc", ".nc4")
            else ""
        )
        raise IngestError(f"raster {str(path)!r} cannot be read: {type(exc).__name__}: {exc}{hint}") from exc
    if isinstance(opened, list) or isinstance(opened, xr.Dataset):
        names = sorted(map(str, opened.data_vars)) if isinstance(opened, xr.Dataset) else []
        raise IngestError(
            f"raster {str(path)!r} holds several variables {names!r}; choose one with --variable NAME",
            field="variable",
        )
    if "band" in opened.dims:
        if opened.sizes["band"] != 1:
            raise IngestError(
                f"raster {str(path)!r} has {opened.sizes['band']} bands; a weight layer is one band: extract it first"
            )
        opened = opened.isel(band=0, drop=True)
    extra = [d for d in opened.dims if d not in ("y", "x") and opened.sizes[d] != 1]
    if extra:
        raise IngestError(
            f"raster {str(path)!r} has dims {tuple(map(str, opened.dims))!r}; a weight layer is 2-D (y, x)"
        )
    opened = opened.squeeze(drop=True)
    crs = opened.rio.crs
    if crs is None:
        raise IngestError(
            f"raster {str(path)!r} has no CRS; give it one (e.g. gdal_edit.py -a_srs) and try again"
        )
    transform = opened.rio.transform()
    if transform.b != 0 or transform.d != 0:
        raise IngestError(
            f"raster {str(path)!r} is rotated or sheared (transform {tuple(transform)[:6]!r}); warp it north-up first"
        )
    units = str(opened.attrs.get("units", "") or "")
    return Raster(
        path=path,
        crs=pyproj.CRS.from_user_input(crs.to_wkt()),
        transform=transform,
        width=int(opened.sizes["x"]),
        height=int(opened.sizes["y"]),
        nodata=opened.rio.nodata,
        units=units,
        source=opened,
    )

"""Pictures of shocks: a community's seasonal z-scores over the years, and one season-year's anomaly map.

Pure matplotlib on the Agg canvas (no pyplot, so it is safe in a threaded server), arrays and frames in,
PNG bytes out; nothing here knows about HTTP or stores. Colours and class words are wxshock's own.
"""

from __future__ import annotations

import io
from collections.abc import Sequence
from typing import Any

import numpy as np
import pandas as pd
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.collections import PolyCollection
from matplotlib.colors import Colormap, LinearSegmentedColormap, Normalize
from matplotlib.figure import Figure
from matplotlib.patches import Patch
from matplotlib.ticker import MaxNLocator

from service.errors import RequestError
from service.indicators.classes import class_labels, classify

DEFAULT_EDGES: tuple[float, ...] = (-2.0, -1.0, 1.0, 2.0)

# wxshock's own palette: sand and umber for the dry side, sea-green and deep teal for the wet side;
# slate for the cool side, clay and brick for the warm side. Index 0 is the mildest shade.
DRY = ("#d2ad73", "#9a6a2f", "#5e3b12")
WET = ("#86c2b1", "#2f7f73", "#154a44")
COOL = ("#a3b8d9", "#4a6fa5", "#22385e")
WARM = ("#eba98b", "#b5492f", "#6e2114")
NEUTRAL = "#b9b4aa"
MISSING = "#d9d9d9"
OUTLINE = "#141414"
SPELL = "#6a3d8f"

_FAMILIES: dict[str, dict[str, Any]] = {
    "precipitation": {"low": DRY, "high": WET, "low_word": "drier", "high_word": "wetter"},
    "temperature": {"low": COOL, "high": WARM, "low_word": "cooler", "high_word": "warmer"},
}


# Plain words for the plotted indicators' axes and titles; others take the head of their catalog definition.
INDICATOR_WORDS: dict[str, str] = {
    "prcp_total": "season precipitation",
    "tmean": "mean temperature",
    "tmax_mean": "mean daily maximum temperature",
    "tmin_mean": "mean daily minimum temperature",
    "spi": "SPI (standardized precipitation)",
    "spei": "SPEI (standardized water balance)",
}
BASELINE = "#5f6b73"  # slate: the baseline years on the time axis
NAME_PROPERTIES = ("name", "Name", "NAME", "community", "village", "label")


def indicator_words(name: str) -> str:
    """What a plotted indicator is, in words ('prcp_total' -> 'season precipitation')."""
    if name in INDICATOR_WORDS:
        return INDICATOR_WORDS[name]
    try:
        from service.encode.codebook import short_title
        from service.indicators.base import get_indicator

        for candidate in (name, name.split("_", 1)[0]):
            try:
                return short_title(get_indicator(candidate).definition).lower()
            except LookupError:
                continue
    except ImportError:  # pragma: no cover - the catalog is part of the package
        pass
    return name.replace("_", " ")


def community_name(properties: object) -> str | None:
    """The community's name from its GeoJSON properties ('name' and the like), when it has one."""
    if not isinstance(properties, dict):
        return None
    for key in NAME_PROPERTIES:
        value = properties.get(key)
        if isinstance(value, str) and value.strip():
            return value.strip()[:80]
    return None


def class_word(family: str, class_number: int, edges: Sequence[float] = DEFAULT_EDGES) -> str:
    """The table's own plain word for a class ('near normal', 'drier', 'much warmer', ...)."""
    return class_labels(family, list(edges)).get(class_number, f"class {class_number}")


def class_numbers(edges: Sequence[float]) -> list[int]:
    """Class numbers of the n + 1 bands that n edges make, lowest first (the table's numbering)."""
    edges = [float(e) for e in edges]
    middles = (
        [edges[0] - 1.0] + [(a + b) / 2 for a, b in zip(edges, edges[1:], strict=False)] + [edges[-1] + 1.0]
    )
    return [int(c) for c in classify(np.asarray(middles), edges)]


def class_colour(family: str, class_number: int) -> str:
    """The fill colour of a class: neutral at 0, deeper shades further from normal."""
    if class_number == 0:
        return NEUTRAL
    shades = _FAMILIES[family]["high" if class_number > 0 else "low"]
    return shades[min(abs(class_number), len(shades)) - 1]


def _check_edges(edges: Sequence[float]) -> list[float]:
    """Edges as floats, finite and strictly increasing."""
    values = [float(e) for e in edges]
    if (
        not values
        or any(not np.isfinite(e) for e in values)
        or any(b <= a for a, b in zip(values, values[1:], strict=False))
    ):
        raise RequestError(
            f"class edges {list(edges)!r} must be finite and strictly increasing, e.g. [-2, -1, 1, 2]",
            field="classes.edges",
        )
    return values


def _z_column(frame: pd.DataFrame, indicator: str) -> str | None:
    """The column holding an indicator's z-score: '<name>_z', or the value itself for SPI/SPEI-like ones."""
    if f"{indicator}_z" in frame.columns:
        return f"{indicator}_z"
    if indicator in ("spi", "spei") and indicator in frame.columns:
        return indicator
    return None


def _png(fig: Figure) -> bytes:
    """Render a figure to PNG bytes at its own size (no tight crop, so the size is what was asked)."""
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", metadata={"Software": "wxshock"})
    return buffer.getvalue()


def _figure(size_px: tuple[int, int], dpi: int) -> Figure:
    """A white figure of exactly size_px pixels."""
    width, height = size_px
    if width < 200 or height < 150 or width > 4000 or height > 4000:
        raise RequestError(f"plot size {size_px!r} pixels is outside 200x150 .. 4000x4000", field="size")
    fig = Figure(figsize=(width / dpi, height / dpi), dpi=dpi, facecolor="white")
    FigureCanvasAgg(fig)  # an Agg canvas of its own (no pyplot): text sizes can be measured before saving
    return fig


def _z_panel(
    ax: Any, years: np.ndarray, z: np.ndarray, classes: np.ndarray, edges: list[float], family: str, name: str
) -> None:
    """One panel: class bands shaded behind bars of z, each bar coloured by its class."""
    finite = z[np.isfinite(z)]
    reach = max(
        3.0,
        float(np.max(np.abs(finite))) + 0.5 if finite.size else 3.0,
        abs(edges[0]) + 0.5,
        abs(edges[-1]) + 0.5,
    )
    bounds = [-reach, *edges, reach]
    numbers = class_numbers(edges)
    for low, high, number in zip(bounds[:-1], bounds[1:], numbers, strict=False):
        if number != 0:
            ax.axhspan(low, high, color=class_colour(family, number), alpha=0.16, linewidth=0, zorder=0)
        ax.text(
            1.005,
            (max(low, -reach) + min(high, reach)) / 2,
            class_word(family, number, edges),
            transform=ax.get_yaxis_transform(),
            fontsize=7.5,
            va="center",
            ha="left",
            color="#444444",
        )
    colours = [class_colour(family, int(c)) if np.isfinite(c) else MISSING for c in classes]
    ok = np.isfinite(z)
    # One collection of rectangles rather than a patch per bar: the same picture, drawn several times faster.
    half = 0.36
    bars = [
        [(year - half, 0.0), (year - half, value), (year + half, value), (year + half, 0.0)]
        for year, value in zip(years[ok], z[ok], strict=True)
    ]
    ax.add_collection(
        PolyCollection(
            bars,
            facecolors=[c for c, good in zip(colours, ok, strict=True) if good],
            edgecolors="#333333",
            linewidths=0.4,
            zorder=3,
        )
    )
    if (~ok).any():
        ax.scatter(
            years[~ok], np.zeros((~ok).sum()), marker="x", color="#777777", s=18, zorder=4, label="no value"
        )
        ax.legend(loc="upper left", fontsize=7, frameon=False)
    ax.axhline(0.0, color="#333333", linewidth=0.8, zorder=2)
    ax.set_ylim(-reach, reach)
    ax.set_ylabel(f"{indicator_words(name)}\nz (SD from normal)", fontsize=8.5)
    ax.tick_params(labelsize=8)
    ax.grid(axis="x", color="#e4e4e4", linewidth=0.5, zorder=1)


def series_plot(frame: pd.DataFrame, feature_id: str, **options: Any) -> bytes:
    """PNG of one community's seasonal z-scores over the years (see :func:`series_figure`)."""
    return _png(series_figure(frame, feature_id, **options))


def _series_title(feature_id: str, community: str | None, season: str | None, baseline: str | None) -> str:
    """'Ostehalo (qu-005): seasonal anomalies, May-Oct, against 1981-1990'."""
    who = f"{community} ({feature_id})" if community else f"community {feature_id}"
    parts = [f"{who}: seasonal anomalies"]
    if season:
        # 'season May-Oct', but 'the calendar year' and "each community's own season" as they are
        parts.append(season if season.startswith(("the ", "each ")) else f"season {season}")
    if baseline:
        parts.append(f"against {baseline}")
    return ", ".join(parts)


def series_figure(
    frame: pd.DataFrame,
    feature_id: str,
    *,
    precipitation: str = "prcp_total",
    temperature: str = "tmean",
    edges: Sequence[float] = DEFAULT_EDGES,
    spells: Sequence[str] | None = None,
    title: str | None = None,
    community: str | None = None,
    season: str | None = None,
    baseline_years: tuple[int, int] | None = None,
    baseline_text: str | None = None,
    size_px: tuple[int, int] = (1000, 640),
    dpi: int = 100,
) -> Figure:
    """One community's seasonal z-scores (precipitation above, temperature below) over the years.

    ``frame`` is a wide indicator table (one row per feature_id and year, columns ``<indicator>_z``);
    class bands between ``edges`` (SD units) are shaded; a strip at the foot marks the seasons where each
    spell (columns ``<name>_run``; all of them when ``spells`` is None) is running, with its run length.
    Years without a value are marked with a grey cross at 0, never drawn as 0. The title names the
    community (``community``, its name, beside its id) and the ``season``; a fixed baseline
    (``baseline_years``, first and last season-year) is marked on the time axis.
    """
    edges = _check_edges(edges)
    if "feature_id" not in frame.columns or "year" not in frame.columns:
        raise RequestError(
            "the table has no 'feature_id' and 'year' columns; ask for the wide layout", field="layout"
        )
    rows = frame[frame["feature_id"].astype(str) == str(feature_id)].sort_values("year")
    if rows.empty:
        known = sorted(frame["feature_id"].astype(str).unique())[:10]
        raise RequestError(
            f"feature {feature_id!r} is not in the table; it holds {known!r}",
            feature_id=str(feature_id),
            field="feature_id",
        )
    panels: list[tuple[str, str, str]] = []
    for name, family in ((precipitation, "precipitation"), (temperature, "temperature")):
        column = _z_column(rows, name)
        if column is not None:
            panels.append((name, family, column))
    if not panels:
        raise RequestError(
            f"the series plot needs the z-scores of {precipitation!r} or {temperature!r}; add them to "
            f"'indicators'",
            field="indicators",
        )
    if spells is None:
        spells = [c[: -len("_run")] for c in rows.columns if c.endswith("_run")]
    missing = [s for s in spells if f"{s}_run" not in rows.columns]
    if missing:
        raise RequestError(
            f"spell {missing[0]!r} has no '{missing[0]}_run' column; name a spell of the request",
            field="spells",
        )
    years = rows["year"].to_numpy(dtype=int)

    fig = _figure(size_px, dpi)
    heights = [3.0] * len(panels) + ([0.45 * len(spells) + 0.35] if spells else [])
    grid = fig.add_gridspec(
        len(heights), 1, height_ratios=heights, left=0.09, right=0.86, top=0.91, bottom=0.09, hspace=0.12
    )
    axes = [fig.add_subplot(grid[i, 0]) for i in range(len(heights))]
    for ax in axes[1:]:
        ax.sharex(axes[0])
    for ax, (name, family, column) in zip(axes, panels, strict=False):
        z = pd.to_numeric(rows[column], errors="coerce").to_numpy(dtype=float)
        # The table's own class column when it has one, so that the picture and the table agree.
        if f"{name}_class" in rows.columns:
            classes = pd.to_numeric(rows[f"{name}_class"], errors="coerce").to_numpy(dtype=float)
        else:
            classes = classify(z, edges)
        _z_panel(ax, years, z, classes, edges, family, name)
    if spells:
        _spell_strip(axes[-1], rows, years, list(spells))
    for ax in axes[:-1]:
        ax.tick_params(labelbottom=False)
    axes[-1].set_xlabel("season-year (the year in which the season ends)", fontsize=9)
    axes[-1].xaxis.set_major_locator(MaxNLocator(integer=True))
    axes[0].set_xlim(years.min() - 0.6, years.max() + 0.6)
    if baseline_years is not None:
        _mark_baseline(axes, baseline_years)
    if baseline_text is None and baseline_years is not None:
        baseline_text = f"{baseline_years[0]}-{baseline_years[1]}"
    fig.suptitle(
        title or _series_title(str(feature_id), community, season, baseline_text),
        fontsize=11,
        x=0.09,
        ha="left",
    )
    return fig


def _mark_baseline(axes: Sequence[Any], baseline_years: tuple[int, int]) -> None:
    """The baseline years as a light band in every panel and a labelled bar on the time axis."""
    first, last = baseline_years
    for ax in axes:
        ax.axvspan(first - 0.5, last + 0.5, color=BASELINE, alpha=0.10, linewidth=0, zorder=0.5)
    bottom = axes[-1]
    # A bar along the foot of the time axis (x in data, y in axes units), labelled inside the panel.
    bottom.plot(
        [first - 0.45, last + 0.45],
        [0.015, 0.015],
        transform=bottom.get_xaxis_transform(),
        color=BASELINE,
        linewidth=5,
        solid_capstyle="butt",
        clip_on=False,
        zorder=5,
        gid="baseline-bar",
    )
    top = axes[0]
    top.text(
        (first + last) / 2,
        0.97,
        f"baseline {first}-{last}",
        transform=top.get_xaxis_transform(),
        ha="center",
        va="top",
        fontsize=7.5,
        color=BASELINE,
        gid="baseline-label",
    )


def _spell_strip(ax: Any, rows: pd.DataFrame, years: np.ndarray, spells: list[str]) -> None:
    """A row per spell: a mark on each season where the spell runs, labelled with the run length."""
    for i, name in enumerate(spells):
        run = pd.to_numeric(rows[f"{name}_run"], errors="coerce").to_numpy(dtype=float)
        on = np.isfinite(run) & (run >= 1)
        ax.scatter(years[on], np.full(on.sum(), i), marker="s", s=70, color=SPELL, zorder=3)
        for year, length in zip(years[on], run[on], strict=False):
            ax.text(year, i, f"{int(length)}", color="white", fontsize=6, ha="center", va="center", zorder=4)
    ax.set_yticks(range(len(spells)), [f"spell {s}" for s in spells], fontsize=8)
    ax.set_ylim(-0.6, len(spells) - 0.4)
    ax.tick_params(labelsize=8)
    ax.text(
        1.005,
        0.5,
        "spell running\n(run length)",
        transform=ax.transAxes,
        fontsize=7.5,
        va="center",
        color="#444444",
    )
    ax.grid(axis="x", color="#e4e4e4", linewidth=0.5, zorder=1)


def anomaly_colours(family: str) -> Colormap:
    """Our diverging scale for a family: deep low shade -> pale neutral -> deep high shade; grey for no data."""
    if family not in _FAMILIES:
        raise RequestError(f"family {family!r} has no map colours; use 'precipitation' or 'temperature'")
    low, high = _FAMILIES[family]["low"], _FAMILIES[family]["high"]
    stops = [low[2], low[1], low[0], "#f5f2ec", high[0], high[1], high[2]]
    return LinearSegmentedColormap.from_list(f"wxshock_{family}", stops, N=256).with_extremes(bad=MISSING)


def _rings(geometry: Any) -> list[np.ndarray]:
    """Coordinate arrays of every ring or line of a shapely geometry (points give none)."""
    kind = geometry.geom_type
    if kind == "Polygon":
        return [np.asarray(geometry.exterior.coords)] + [np.asarray(r.coords) for r in geometry.interiors]
    if kind == "LineString" or kind == "LinearRing":
        return [np.asarray(geometry.coords)]
    if kind.startswith("Multi") or kind == "GeometryCollection":
        return [ring for part in geometry.geoms for ring in _rings(part)]
    return []


def _points(geometry: Any) -> list[tuple[float, float]]:
    """Point positions of a shapely geometry (polygons and lines give none)."""
    if geometry.geom_type == "Point":
        return [(geometry.x, geometry.y)]
    if geometry.geom_type in ("MultiPoint", "GeometryCollection"):
        return [p for part in geometry.geoms for p in _points(part)]
    return []


def map_title(indicator: str, season: str, year: int, baseline: tuple[int, int], dataset: str) -> str:
    """'Season precipitation, May-Oct 2010: z against 1981-1990 (demo)'."""
    season = season.removeprefix("the ")  # 'calendar year 2010'
    return f"{indicator_words(indicator).capitalize()}, {season} {year}: z against {baseline[0]}-{baseline[1]} ({dataset})"


def map_plot(
    field: np.ndarray, x_edges: np.ndarray, y_edges: np.ndarray, outlines: Sequence[Any], **options: Any
) -> bytes:
    """PNG of one season-year's anomaly field over the grid (see :func:`map_figure`)."""
    return _png(map_figure(field, x_edges, y_edges, outlines, **options))


# Space the map's frame needs around it, in pixels: tick labels and axis titles, the title, the legend.
_MAP_MARGINS = {"left": 78, "right": 24, "top": 44, "bottom": 56, "legend": 118}


def _map_axes_box(
    size_px: tuple[int, int], data_ratio: float
) -> tuple[tuple[float, float, float, float], tuple[float, float, float, float]]:
    """Figure-fraction boxes of the map and of its colour bar: the map as large as the figure allows.

    ``data_ratio`` is the map's height / width on screen. The map takes the full width left by the margins
    and the legend when the height allows, else the full height; map and legend are centred together.
    """
    width, height = size_px
    m = _MAP_MARGINS
    room_w = width - m["left"] - m["right"] - m["legend"]
    room_h = height - m["top"] - m["bottom"]
    map_w, map_h = room_w, room_w * data_ratio
    if map_h > room_h:
        map_w, map_h = room_h / data_ratio, room_h
    spare = room_w - map_w
    left = m["left"] + spare / 2
    bottom = m["bottom"] + (room_h - map_h) / 2
    bar_left = left + map_w + 22
    bar_h = min(map_h * 0.8, 360.0)
    bar_bottom = bottom + (map_h - bar_h) / 2 + 24
    return (
        (left / width, bottom / height, map_w / width, map_h / height),
        (bar_left / width, bar_bottom / height, 16 / width, max(bar_h - 24, 40) / height),
    )


def _place_labels(
    ax: Any, outlines: Sequence[Any], labels: Sequence[str], fontsize: float = 7.0
) -> list[Any]:
    """Label each outline where the text collides with no other label: above, below, right or left of it.

    Labels that fit nowhere are left out (the id stays in the table). Returns the texts drawn.
    """
    fig = ax.figure
    renderer = fig.canvas.get_renderer()
    frame = ax.get_window_extent(renderer)
    placed: list[Any] = []
    boxes: list[Any] = []
    # The smaller communities first: a large polygon has more room around it for its own label.
    order = sorted(range(len(outlines)), key=lambda i: outlines[i].area if not outlines[i].is_empty else 0.0)
    for i in order:
        geometry = outlines[i]
        if geometry.is_empty:
            continue
        where = geometry.representative_point()
        for offset, ha, va in (
            ((0, 8), "center", "bottom"),
            ((0, -8), "center", "top"),
            ((8, 0), "left", "center"),
            ((-8, 0), "right", "center"),
        ):
            text = ax.annotate(
                str(labels[i]),
                (where.x, where.y),
                xytext=offset,
                textcoords="offset points",
                fontsize=fontsize,
                ha=ha,
                va=va,
                color=OUTLINE,
                bbox={"boxstyle": "round,pad=0.12", "facecolor": "white", "edgecolor": "none", "alpha": 0.55},
            )
            box = text.get_window_extent(renderer).expanded(1.04, 1.1)
            inside = frame.x0 <= box.x0 and box.x1 <= frame.x1 and frame.y0 <= box.y0 and box.y1 <= frame.y1
            if inside and not any(box.overlaps(other) for other in boxes):
                boxes.append(box)
                placed.append(text)
                break
            text.remove()
    return placed


def map_figure(
    field: np.ndarray,
    x_edges: np.ndarray,
    y_edges: np.ndarray,
    outlines: Sequence[Any],
    *,
    labels: Sequence[str] | None = None,
    family: str = "precipitation",
    limit: float = 3.0,
    title: str | None = None,
    colour_label: str = "z (SD from normal)",
    geographic: bool = True,
    size_px: tuple[int, int] = (900, 700),
    dpi: int = 100,
) -> Figure:
    """One season-year's anomaly field over the grid, with the communities outlined and labelled.

    ``field`` is (ny, nx) in the units of ``colour_label`` (NaN cells grey, "no data" in the legend),
    ``x_edges`` (nx + 1,) and ``y_edges`` (ny + 1,) are the cell edges in the grid CRS (either direction),
    ``outlines`` are shapely geometries in that same CRS, labelled with ``labels`` when given (a label that
    would overlap another is moved around its community, or left out). The colour scale runs from -limit
    to +limit; values beyond are drawn at the end colours. Geographic grids keep a true aspect at
    mid-latitude. The map takes as much of the figure as its shape allows.
    """
    field = np.asarray(field, dtype=float)
    x_edges = np.asarray(x_edges, dtype=float)
    y_edges = np.asarray(y_edges, dtype=float)
    if field.ndim != 2 or field.shape != (y_edges.size - 1, x_edges.size - 1):
        raise RequestError(
            f"field of shape {field.shape!r} does not match edges of {y_edges.size} y and {x_edges.size} x "
            f"values (expected ({y_edges.size - 1}, {x_edges.size - 1}))",
            field="field",
        )
    if not np.isfinite(limit) or limit <= 0:
        raise RequestError(f"colour limit {limit!r} must be a positive number", field="limit")
    if labels is not None and len(labels) != len(outlines):
        raise RequestError(
            f"{len(labels)} labels for {len(outlines)} outlines; give one label per outline", field="labels"
        )
    fig = _figure(size_px, dpi)
    x_span = float(x_edges.max() - x_edges.min())
    y_span = float(y_edges.max() - y_edges.min())
    stretch = 1.0
    if geographic:
        middle = np.deg2rad((y_edges.min() + y_edges.max()) / 2)
        stretch = 1.0 / max(np.cos(middle), 0.05)
    map_box, bar_box = _map_axes_box(size_px, y_span * stretch / x_span)
    ax = fig.add_axes(map_box)
    bar = fig.add_axes(bar_box)
    mesh = ax.pcolormesh(
        x_edges,
        y_edges,
        np.ma.masked_invalid(field),
        cmap=anomaly_colours(family),
        norm=Normalize(-limit, limit),
        shading="flat",
    )
    colourbar = fig.colorbar(mesh, cax=bar, extend="both")
    colourbar.set_label(colour_label, fontsize=9)
    colourbar.ax.tick_params(labelsize=8)
    # No-data cells get their own key under the colour bar.
    fig.legend(
        handles=[Patch(facecolor=MISSING, edgecolor="#9a9a9a", linewidth=0.6, label="no data")],
        loc="upper left",
        bbox_to_anchor=(bar_box[0] - 4 / size_px[0], bar_box[1] - 18 / size_px[1]),
        frameon=False,
        fontsize=8,
        handlelength=1.2,
        handleheight=1.2,
        borderaxespad=0.0,
    )
    for geometry in outlines:
        for ring in _rings(geometry):
            ax.plot(ring[:, 0], ring[:, 1], color=OUTLINE, linewidth=1.6, solid_joinstyle="round")
        points = _points(geometry)
        if points:
            px, py = zip(*points, strict=False)
            ax.scatter(px, py, marker="o", s=28, facecolor="none", edgecolor=OUTLINE, linewidth=1.4)
    ax.set_xlim(x_edges.min(), x_edges.max())
    ax.set_ylim(y_edges.min(), y_edges.max())
    ax.set_aspect("auto")  # the axes box already has the map's true shape
    if geographic:
        ax.set_xlabel("longitude (degrees east)", fontsize=9)
        ax.set_ylabel("latitude (degrees north)", fontsize=9)
    else:
        ax.set_xlabel("x (grid CRS)", fontsize=9)
        ax.set_ylabel("y (grid CRS)", fontsize=9)
    ax.tick_params(labelsize=8)
    if title:
        fig.text(map_box[0], 1 - 14 / size_px[1], title, fontsize=11, ha="left", va="top")
    if labels is not None:
        _place_labels(ax, outlines, labels)
    return fig

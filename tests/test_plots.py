"""The series and map pictures: right size, and the drawn content where it should be."""

from __future__ import annotations

import io

import numpy as np
import pandas as pd
import pytest
import shapely
from matplotlib.colors import to_hex, to_rgb
from PIL import Image

from service.errors import RequestError
from service.plots import (
    DRY,
    OUTLINE,
    SPELL,
    WARM,
    WET,
    anomaly_colours,
    class_colour,
    class_numbers,
    class_word,
    map_plot,
    series_plot,
)


def _pixels(png: bytes) -> np.ndarray:
    """The PNG as an (height, width, 3) float array in 0..1."""
    image = Image.open(io.BytesIO(png))
    assert image.format == "PNG"
    return np.asarray(image.convert("RGB"), dtype=float) / 255.0


def _near(pixels: np.ndarray, colour: str, tolerance: float = 0.06) -> np.ndarray:
    """Boolean mask of the pixels within ``tolerance`` (each channel) of a named colour."""
    return (np.abs(pixels - np.asarray(to_rgb(colour))) <= tolerance).all(axis=2)


def _frame() -> pd.DataFrame:
    """Twenty season-years of one community with a very wet 1995, a very hot 2003 and a dry-hot spell."""
    years = np.arange(1991, 2011)
    prcp_z = np.zeros(years.size)
    tmean_z = np.zeros(years.size)
    prcp_z[years == 1995] = 2.6  # much wetter
    prcp_z[years == 2000] = np.nan  # no value: must not be drawn as a bar
    tmean_z[years == 2003] = 2.4  # much warmer
    run = np.where((years >= 2005) & (years <= 2007), years - 2004, 0)
    other = pd.DataFrame({"feature_id": "c-02", "year": years, "prcp_total_z": -3.0, "tmean_z": -3.0})
    one = pd.DataFrame(
        {"feature_id": "c-01", "year": years, "prcp_total_z": prcp_z, "tmean_z": tmean_z, "dry_hot_run": run}
    )
    return pd.concat([other, one], ignore_index=True)


def test_series_plot_draws_each_shock_in_its_panel_and_year() -> None:
    png = series_plot(_frame(), "c-01", size_px=(1000, 640))
    pixels = _pixels(png)
    assert pixels.shape == (640, 1000, 3)
    height, width = pixels.shape[:2]

    much_wetter = _near(pixels, class_colour("precipitation", 2))
    much_warmer = _near(pixels, class_colour("temperature", 2))
    spell = _near(pixels, SPELL)
    # Each shock is one bar of a few hundred pixels; nothing of the other community (z = -3) is drawn.
    assert much_wetter.sum() > 300 and much_warmer.sum() > 300 and spell.sum() > 100
    assert _near(pixels, class_colour("precipitation", -2)).sum() == 0

    rows_wet, cols_wet = np.nonzero(much_wetter)
    rows_warm, cols_warm = np.nonzero(much_warmer)
    rows_spell, cols_spell = np.nonzero(spell)
    # Panels top to bottom: precipitation above temperature above the spell strip.
    assert rows_wet.max() < rows_warm.min()
    assert rows_warm.max() < rows_spell.min()
    assert rows_wet.mean() < height / 2 < rows_warm.mean()
    # Along the year axis: the wet 1995 is left of the hot 2003, which is left of the 2005-2007 spell.
    assert cols_wet.mean() < cols_warm.mean() < cols_spell.mean()
    assert cols_wet.mean() < width / 2
    # A bar of z above 0 rises from the middle of its panel: its pixels lie above the panel's zero line.
    assert (cols_wet.max() - cols_wet.min()) < width / 30  # one bar, not a band


def test_series_plot_shades_the_class_bands() -> None:
    pixels = _pixels(series_plot(_frame(), "c-01"))
    # Band shading is the class colour at low opacity on white: bluish-green above, sandy below, in the top panel.
    top = pixels[: pixels.shape[0] // 2]
    greenish = (top[..., 1] > top[..., 0] + 0.02) & (top.min(axis=2) > 0.8)
    sandy = (top[..., 0] > top[..., 2] + 0.03) & (top.min(axis=2) > 0.8)
    assert greenish.sum() > 5_000 and sandy.sum() > 5_000
    assert np.nonzero(greenish)[0].mean() < np.nonzero(sandy)[0].mean()


def test_series_plot_colours_bars_by_the_tables_own_classes() -> None:
    # z = -1 exactly is class -1 in the table (an edge belongs to the class farther from 0): a 'drier' bar.
    frame = _frame()
    frame.loc[(frame["feature_id"] == "c-01") & (frame["year"] == 1992), "prcp_total_z"] = -1.0
    pixels = _pixels(series_plot(frame, "c-01"))
    assert _near(pixels, class_colour("precipitation", -1)).sum() > 100
    frame["prcp_total_class"] = 0  # a table that says 'near normal' everywhere wins over the z values
    frame["tmean_class"] = 0
    pixels = _pixels(series_plot(frame, "c-01"))
    assert _near(pixels, class_colour("precipitation", 2)).sum() == 0
    assert _near(pixels, class_colour("precipitation", -1)).sum() == 0


def test_series_plot_without_spells_and_only_temperature() -> None:
    frame = _frame().drop(columns=["prcp_total_z", "dry_hot_run"])
    pixels = _pixels(series_plot(frame, "c-01", size_px=(600, 400)))
    assert pixels.shape == (400, 600, 3)
    assert _near(pixels, class_colour("temperature", 2)).sum() > 100
    assert _near(pixels, SPELL).sum() == 0


@pytest.mark.parametrize(
    ("kwargs", "message"),
    [
        ({"feature_id": "nowhere"}, "feature 'nowhere' is not in the table"),
        ({"feature_id": "c-01", "precipitation": "wet_days", "temperature": "gdd"}, "needs the z-scores"),
        ({"feature_id": "c-01", "spells": ["hot_wet"]}, "spell 'hot_wet' has no 'hot_wet_run' column"),
        ({"feature_id": "c-01", "edges": [1, -1]}, "strictly increasing"),
        ({"feature_id": "c-01", "size_px": (50, 50)}, "outside 200x150"),
    ],
)
def test_series_plot_refuses_what_it_cannot_draw(kwargs: dict, message: str) -> None:
    feature_id = kwargs.pop("feature_id")
    with pytest.raises(RequestError, match=message):
        series_plot(_frame(), feature_id, **kwargs)


def test_class_words_and_numbers() -> None:
    assert class_numbers([-2, -1, 1, 2]) == [-2, -1, 0, 1, 2]
    assert class_numbers([0.5, 1.5]) == [0, 1, 2]
    assert class_numbers([-1.0]) == [-1, 0]
    # The words are the indicator table's own labels (service.indicators.classes).
    assert class_word("precipitation", -2) == "much drier"
    assert class_word("temperature", 1) == "warmer"
    assert class_word("temperature", 0) == "near normal"
    assert class_word("temperature", 1, [-3, -2, -1, 1, 2, 3]) == "slightly warmer"
    assert class_colour("precipitation", 1) == WET[0] and class_colour("precipitation", -1) == DRY[0]
    assert class_colour("temperature", 5) == WARM[-1]


def _map(size_px: tuple[int, int] = (900, 700), **kwargs: object) -> np.ndarray:
    """A 20 x 30 geographic grid, z running from -3 (west) to +3 (east), one square community outlined."""
    x_edges = np.linspace(10.0, 13.0, 31)
    y_edges = np.linspace(6.0, 4.0, 21)  # north to south, as stores usually hold it
    field = np.tile(np.linspace(-3, 3, 30), (20, 1))
    field[0, 0] = np.nan
    outline = shapely.box(11.0, 4.5, 12.0, 5.5)
    return _pixels(map_plot(field, x_edges, y_edges, [outline], labels=["c-01"], size_px=size_px, **kwargs))


def test_map_plot_places_the_anomalies_and_the_outline() -> None:
    pixels = _map()
    assert pixels.shape == (700, 900, 3)
    scale = anomaly_colours("precipitation")
    deep_dry = _near(pixels, to_hex(scale(0.02)))
    deep_wet = _near(pixels, to_hex(scale(0.98)))
    assert deep_dry.sum() > 2_000 and deep_wet.sum() > 2_000
    dry_cols = np.nonzero(deep_dry)[1]
    wet_cols = np.nonzero(deep_wet)[1]
    map_dry, map_wet = dry_cols[dry_cols < 700], wet_cols[wet_cols < 700]  # leave the colour bar out
    assert map_dry.size > 1_000 and map_wet.size > 1_000
    assert map_dry.mean() < map_wet.mean()  # dry in the west, wet in the east

    # The outline is a dark square in the middle third of the map, lower half (4.5-5.5 N of 4-6 N).
    dark = _near(pixels, OUTLINE, tolerance=0.12)
    rows, cols = np.nonzero(dark[:, :700])
    square = (cols > map_dry.min() + 100) & (cols < map_wet.max() - 100)
    assert square.sum() > 400
    map_rows = np.nonzero(deep_dry[:, :700].any(axis=1) | deep_wet[:, :700].any(axis=1))[0]
    middle_of_map = (map_rows.min() + map_rows.max()) / 2
    assert np.median(rows[square]) > middle_of_map  # south of the map's middle


def test_map_plot_marks_missing_cells_grey_and_takes_points() -> None:
    x_edges, y_edges = np.arange(0.0, 5.1, 1.0), np.arange(0.0, 4.1, 1.0)
    field = np.full((4, 5), np.nan)
    png = map_plot(field, x_edges, y_edges, [shapely.Point(2.5, 2.5)], family="temperature", geographic=False)
    pixels = _pixels(png)
    assert _near(pixels, "#d9d9d9", tolerance=0.02).sum() > 50_000
    assert _near(pixels, OUTLINE, tolerance=0.12).sum() > 20


@pytest.mark.parametrize(
    ("field_shape", "kwargs", "message"),
    [
        ((3, 3), {}, r"does not match edges"),
        ((4, 5), {"limit": 0.0}, "positive number"),
        ((4, 5), {"labels": ["a", "b"]}, "2 labels for 1 outlines"),
        ((4, 5), {"family": "wind"}, "no map colours"),
    ],
)
def test_map_plot_refuses_bad_input(field_shape: tuple[int, int], kwargs: dict, message: str) -> None:
    with pytest.raises(RequestError, match=message):
        map_plot(np.zeros(field_shape), np.arange(6.0), np.arange(5.0), [shapely.box(1, 1, 2, 2)], **kwargs)


# --- what the pictures say (issue 14: pictures a researcher would put in a talk) ----------------------------


def test_the_series_picture_names_the_community_and_season_and_marks_the_baseline() -> None:
    from service.plots import series_figure

    fig = series_figure(
        _frame(),
        "c-01",
        community="Vitrou",
        season="May-Oct",
        baseline_years=(1993, 1999),
        spells=["dry_hot"],
    )
    assert fig.get_suptitle() == "Vitrou (c-01): seasonal anomalies, season May-Oct, against 1993-1999"
    panels = fig.axes
    assert panels[0].get_ylabel() == "season precipitation\nz (SD from normal)"
    assert panels[1].get_ylabel() == "mean temperature\nz (SD from normal)"
    assert panels[-1].get_xlabel() == "season-year (the year in which the season ends)"
    assert [t.get_text() for t in panels[-1].get_yticklabels()] == ["spell dry_hot"]
    (bar,) = [a for a in panels[-1].get_lines() if a.get_gid() == "baseline-bar"]
    assert list(bar.get_xdata()) == [1993 - 0.45, 1999 + 0.45]
    (label,) = [t for t in panels[0].texts if t.get_gid() == "baseline-label"]
    assert label.get_text() == "baseline 1993-1999"
    # the band is drawn in every panel over the baseline years only
    pixels = _pixels(series_plot(_frame(), "c-01", baseline_years=(1993, 1999), spells=["dry_hot"]))
    slate = _near(pixels, "#5f6b73", 0.05)
    row = int(np.argmax(slate.sum(axis=1)))  # the bar at the foot of the time axis
    columns = np.flatnonzero(slate[row])
    assert row > pixels.shape[0] * 0.8  # at the foot, not in a panel
    # 7 of the 20 season-years on the axis: about a third of the time axis's width
    axis_width = pixels.shape[1] * (0.86 - 0.09)
    assert 0.25 < (columns.max() - columns.min()) / axis_width < 0.42
    untitled = series_figure(_frame(), "c-01")
    assert untitled.get_suptitle() == "community c-01: seasonal anomalies"


def test_the_series_picture_without_a_fixed_baseline_says_which_one() -> None:
    from service.plots import series_figure

    fig = series_figure(_frame(), "c-01", season="Nov-Feb", baseline_text="the 10 season-years before each")
    assert fig.get_suptitle().endswith("season Nov-Feb, against the 10 season-years before each")
    assert not [t for t in fig.axes[0].texts if t.get_gid() == "baseline-label"]


def _crowded() -> tuple[np.ndarray, np.ndarray, np.ndarray, list, list[str]]:
    """A 20 x 40 cell grid (wide) with 30 small communities, many of them close together."""
    rng = np.random.default_rng(3)
    x_edges, y_edges = np.linspace(10.0, 12.0, 41), np.linspace(5.0, 6.0, 21)
    field = rng.normal(size=(20, 40))
    field[:3, :5] = np.nan
    centres = list(zip(rng.uniform(10.1, 10.6, 30), rng.uniform(5.1, 5.4, 30), strict=True))
    outlines = [shapely.Point(x, y).buffer(0.01) for x, y in centres]
    return field, x_edges, y_edges, outlines, [f"village-{i:02d}" for i in range(30)]


def test_map_labels_never_overlap_and_colliding_ones_are_left_out() -> None:
    from service.plots import map_figure

    field, x_edges, y_edges, outlines, labels = _crowded()
    fig = map_figure(field, x_edges, y_edges, outlines, labels=labels, geographic=False)
    ax = fig.axes[0]
    renderer = fig.canvas.get_renderer()
    drawn = [t for t in ax.texts if t.get_text().startswith("village-")]
    boxes = [t.get_window_extent(renderer) for t in drawn]
    assert 5 <= len(drawn) < len(labels)  # crowded: some fit, the others are left out
    assert len({t.get_text() for t in drawn}) == len(drawn)
    for i, a in enumerate(boxes):
        for b in boxes[i + 1 :]:
            assert not a.overlaps(b)
    frame = ax.get_window_extent(renderer)
    assert all(frame.x0 <= b.x0 and b.x1 <= frame.x1 for b in boxes)


def test_map_shows_no_data_in_the_legend_and_uses_the_figures_width() -> None:
    from service.plots import map_figure, map_title

    field, x_edges, y_edges, outlines, labels = _crowded()
    fig = map_figure(field, x_edges, y_edges, outlines, geographic=False, size_px=(1000, 700))
    (legend,) = fig.legends
    assert [t.get_text() for t in legend.get_texts()] == ["no data"]
    assert to_hex(legend.legend_handles[0].get_facecolor()) == to_hex("#d9d9d9")
    # A map twice as wide as high fills the width left by the margins and the colour bar.
    left, _, width, height = fig.axes[0].get_position().bounds
    assert width > 0.75 and abs(width * 1000 / (height * 700) - 2.0) < 0.02
    # A tall map fills the height instead.
    tall = map_figure(field.T, y_edges, x_edges, [], geographic=False, size_px=(1000, 700))
    _, _, width, height = tall.axes[0].get_position().bounds
    assert height > 0.8
    assert map_title("prcp_total", "May-Oct", 2010, (1981, 1990), "demo") == (
        "Season precipitation, May-Oct 2010: z against 1981-1990 (demo)"
    )


def test_titles_read_for_a_whole_year_season() -> None:
    from service.plots import map_title, series_figure

    fig = series_figure(_frame(), "c-01", season="the calendar year", baseline_years=(1993, 1999))
    assert fig.get_suptitle() == "community c-01: seasonal anomalies, the calendar year, against 1993-1999"
    assert map_title("tmean", "the calendar year", 2010, (1981, 1990), "demo") == (
        "Mean temperature, calendar year 2010: z against 1981-1990 (demo)"
    )

"""Figures of a results folder, drawn with matplotlib ``Figure`` objects (no pyplot).

Every function here draws what it is given and never recomputes a result:
long inputs are thinned or binned for drawing only, and each figure states
when that happened. The look is plain: white background, the colour-blind-safe
Okabe–Ito colours, sentence-case titles, units on every axis.

Labels taken from the data (object ids, role names) are passed through
:func:`plain_text` so that matplotlib shows them as typed, never as mathtext.
"""

from __future__ import annotations

import io
import re
from collections.abc import Iterator, Sequence
from contextlib import contextmanager
from dataclasses import dataclass

import matplotlib
import matplotlib.dates as mdates
import numpy as np
import pandas as pd
from matplotlib.axes import Axes
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.colors import ListedColormap
from matplotlib.figure import Figure

from comove.io.times import human_seconds

#: Okabe–Ito colours without black, for lines and bars (Okabe & Ito 2008).
PALETTE: tuple[str, ...] = (
    "#E69F00",  # orange
    "#56B4E9",  # sky blue
    "#009E73",  # bluish green
    "#0072B2",  # blue
    "#D55E00",  # vermillion
    "#CC79A7",  # reddish purple
    "#F0E442",  # yellow
)
INK = "#222222"
MUTED = "#8c8c8c"
FAINT = "#d9d9d9"

#: Resolution of every figure, dots per inch.
DPI = 100
#: Width of every figure, inches (800 pixels at ``DPI``).
WIDTH_IN = 8.0
#: Most time bins drawn per participation-index timeline.
SERIES_POINTS = 2000
#: Most vertices drawn per episode path.
PATH_VERTICES = 2000

_STYLE: dict[str, object] = {
    "font.family": "DejaVu Sans",
    "font.size": 9,
    "axes.titlesize": 9.5,
    "axes.titleweight": "normal",
    "axes.titlelocation": "left",
    "axes.labelsize": 9,
    "axes.edgecolor": INK,
    "axes.labelcolor": INK,
    "axes.linewidth": 0.8,
    "axes.spines.top": False,
    "axes.spines.right": False,
    "axes.facecolor": "white",
    "axes.prop_cycle": matplotlib.cycler(color=list(PALETTE)),
    "figure.facecolor": "white",
    "figure.titlesize": 11,
    "xtick.color": INK,
    "ytick.color": INK,
    "xtick.labelsize": 8,
    "ytick.labelsize": 8,
    "legend.fontsize": 8,
    "legend.frameon": False,
    "savefig.facecolor": "white",
    "timezone": "UTC",
    "text.usetex": False,
}


@contextmanager
def style() -> Iterator[None]:
    """Apply the report's plain style while figures are built and rendered.

    Notes
    -----
    Tick labels are made when a figure is drawn, so rendering must happen in
    the same style as building; :func:`to_png` enters it again for that.
    """
    with matplotlib.rc_context(_STYLE):
        yield


#: Control characters and the bidirectional controls, which could hide or reorder what
#: a name shows (U+202A-U+202E, U+2066-U+2069, U+200E-U+200F, U+061C).
_HIDDEN = re.compile("[\x00-\x08\x0b-\x1f\x7f-\x9f\u061c\u200e\u200f\u202a-\u202e\u2066-\u2069]")


def visible(text: object) -> str:
    """Return ``text`` with control and direction characters shown as ``<U+XXXX>`` codes."""
    return _HIDDEN.sub(lambda m: f"<U+{ord(m.group()):04X}>", str(text))


def plain_text(text: object, limit: int | None = None) -> str:
    """Return ``text`` as a label matplotlib shows literally (dollar signs escaped).

    Parameters
    ----------
    text : object
        Any value; it is turned into a string.
    limit : int, optional
        Longest label; longer ones are cut and end with an ellipsis.

    Returns
    -------
    str
    """
    s = visible(text)
    if limit is not None and len(s) > limit:
        s = s[: limit - 1] + "…"
    return s.replace("$", r"\$")


def _figure(height_in: float, layout: str | None = "constrained") -> Figure:
    """Return an empty figure of the report's width, rendering with Agg."""
    height_in = round(height_in * DPI) / DPI  # whole pixels, so the PNG is exactly this size
    fig = Figure(figsize=(WIDTH_IN, height_in), dpi=DPI, layout=layout)
    FigureCanvasAgg(fig)
    return fig


@dataclass(frozen=True)
class Png:
    """A rendered figure.

    Attributes
    ----------
    data : bytes
        The PNG file.
    width, height : int
        Size in pixels.
    """

    data: bytes
    width: int
    height: int


def to_png(fig: Figure) -> Png:
    """Return ``fig`` rendered as PNG at :data:`DPI`, at exactly its figure size."""
    buf = io.BytesIO()
    with style():
        fig.savefig(buf, format="png", dpi=DPI, metadata={"Software": None})
    data = buf.getvalue()
    # the size as written, from the PNG header (IHDR width and height, big-endian)
    width, height = int.from_bytes(data[16:20], "big"), int.from_bytes(data[20:24], "big")
    return Png(data, width, height)


def _date_axis(ax: Axes, label: str = "time (UTC)") -> None:
    """Format the x axis of ``ax`` as UTC dates."""
    locator = mdates.AutoDateLocator(minticks=3, maxticks=8)
    ax.xaxis.set_major_locator(locator)
    # days carry their month ("08 May"), so the offset needs only the year; the default
    # offset names the month of the last tick, which misleads when a month boundary falls
    # inside the axis
    ax.xaxis.set_major_formatter(mdates.ConciseDateFormatter(
        locator,
        formats=["%Y", "%b", "%d %b", "%H:%M", "%H:%M", "%S.%f"],
        offset_formats=["", "%Y", "%Y", "%Y-%m-%d", "%Y-%m-%d", "%Y-%m-%d %H:%M"],
    ))  # fmt: skip
    if label:
        ax.set_xlabel(label)


def _days(ns: np.ndarray) -> np.ndarray:
    """Return int64 nanoseconds since the epoch as matplotlib date numbers (days)."""
    return mdates.date2num(np.asarray(ns, dtype="int64").astype("datetime64[ns]"))


def ns_times(times: pd.Series) -> np.ndarray:
    """Return timestamps (UTC; text or datetimes) as int64 nanoseconds since the epoch."""
    return pd.DatetimeIndex(pd.to_datetime(times, utc=True)).as_unit("ns").asi8


def bin_series(
    t_ns: np.ndarray,
    value: np.ndarray,
    flag: np.ndarray,
    start_ns: int,
    end_ns: int,
    step_ns: int,
    max_bins: int = SERIES_POINTS,
) -> dict[str, np.ndarray | int]:
    """Return a time series reduced to at most ``max_bins`` equal time bins, for drawing.

    Parameters
    ----------
    t_ns : ndarray of int64
        Times, nanoseconds since the epoch.
    value : ndarray of float
        The value at each time.
    flag : ndarray of bool
        A mark at each time (e.g. prevalent).
    start_ns, end_ns : int
        The whole period to cover; bins run from ``start_ns``.
    step_ns : int
        The sampling step; bins are never narrower, so an undownsampled series
        keeps one snapshot per bin.
    max_bins : int, default SERIES_POINTS
        Most bins.

    Returns
    -------
    dict
        ``centre`` (ns), ``left`` (ns), ``mean``, ``low``, ``high`` (NaN in
        empty bins), ``any`` (a flagged time in the bin), ``width`` (ns) and
        ``downsampled`` (1 when a bin can hold more than one snapshot).

    Notes
    -----
    Empty bins stay NaN so a drawn line breaks where the series has no data.
    """
    span = max(int(end_ns) - int(start_ns), 0) + 1
    width = max(int(step_ns), -(-span // max(int(max_bins), 1)), 1)
    n = -(-span // width)
    b = np.clip((np.asarray(t_ns, dtype="int64") - int(start_ns)) // width, 0, n - 1)
    value = np.asarray(value, dtype="float64")
    count = np.bincount(b, minlength=n)
    total = np.bincount(b, weights=value, minlength=n)
    high = np.full(n, -np.inf)
    low = np.full(n, np.inf)
    np.maximum.at(high, b, value)
    np.minimum.at(low, b, value)
    empty = count == 0
    with np.errstate(invalid="ignore", divide="ignore"):
        mean = np.where(empty, np.nan, total / np.maximum(count, 1))
    high[empty] = np.nan
    low[empty] = np.nan
    flagged = np.bincount(b, weights=np.asarray(flag, dtype="float64"), minlength=n) > 0
    left = int(start_ns) + np.arange(n, dtype="int64") * width
    return {
        "left": left,
        "centre": left + width // 2,
        "mean": mean,
        "low": low,
        "high": high,
        "any": flagged,
        "width": width,
        "downsampled": int(width > step_ns),
    }


def _runs(mask: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Return the first and one-past-last index of each run of True in ``mask``."""
    edges = np.diff(np.concatenate([[0], mask.astype("int8"), [0]]))
    return np.flatnonzero(edges == 1), np.flatnonzero(edges == -1)


def pi_timelines(
    series: pd.DataFrame,
    patterns: Sequence[str],
    *,
    threshold: float | None,
    start_ns: int,
    end_ns: int,
    step_ns: int,
    labels: Sequence[str] | None = None,
    max_bins: int = SERIES_POINTS,
) -> tuple[Figure, str]:
    """Return small-multiple timelines of the participation index of ``patterns``.

    Parameters
    ----------
    series : DataFrame
        ``roles``, ``time`` (UTC), ``participation_index``, ``prevalent``.
    patterns : sequence of str
        The role sets to draw (``;``-joined, as in ``roles``), top first.
    threshold : float or None
        The prevalence threshold (``min_participation``), drawn as a line.
    start_ns, end_ns : int
        The whole period of the run, nanoseconds since the epoch.
    step_ns : int
        The snapshot step, nanoseconds.
    labels : sequence of str, optional
        A panel subtitle per pattern.
    max_bins : int, default SERIES_POINTS
        Most time bins per pattern.

    Returns
    -------
    Figure, str
        The figure and a one-line note on what was drawn (says "downsampled"
        when bins hold more than one snapshot).
    """
    with style():
        fig = _figure(1.1 + 1.25 * len(patterns))
        axes = fig.subplots(len(patterns), 1, sharex=True, squeeze=False)[:, 0]
        codes = series["roles"].astype(str).to_numpy()
        t_all = ns_times(series["time"])
        pi_all = series["participation_index"].to_numpy(dtype="float64")
        prev_all = series["prevalent"].to_numpy(dtype=bool)
        downsampled = False
        width = step_ns
        for i, (ax, roles) in enumerate(zip(axes, patterns, strict=True)):
            rows = codes == roles
            binned = bin_series(
                t_all[rows], pi_all[rows], prev_all[rows], start_ns, end_ns, step_ns, max_bins
            )
            width = int(binned["width"])
            downsampled |= bool(binned["downsampled"])
            _pi_panel(ax, binned, threshold, (start_ns, end_ns, step_ns))
            title = roles
            if labels is not None:
                title = f"{title}  ({labels[i]})"
            ax.set_title(plain_text(title, 110))
            _date_axis(ax, "time (UTC)" if i == len(patterns) - 1 else "")
        handles, names = axes[0].get_legend_handles_labels()
        # the legend takes the title's place: constrained layout does not stack the two
        fig.legend(handles, names, loc="outside upper center", ncols=4)
        if downsampled:
            note = (
                f"Downsampled for drawing: {len(series):,} snapshot values in time bins of "
                f"{human_seconds(width / 1e9)} (at most {max_bins:,} per role set); "
                "line = bin mean, "
                "band = bin min–max, shading = bins with a prevalent snapshot."
            )
        else:
            note = "Every snapshot drawn; shading marks prevalent snapshots; gaps: role set absent."
    return fig, note


def _pi_panel(
    ax: Axes, binned: dict, threshold: float | None, period: tuple[int, int, int]
) -> None:
    """Draw one pattern's binned participation index, prevalent bins shaded, on ``ax``.

    ``binned`` comes from :func:`bin_series`; ``period`` is the run's start, end and step
    in nanoseconds.
    """
    start_ns, end_ns, step_ns = period
    x = _days(binned["centre"])
    first, stop = _runs(binned["any"])
    left = _days(binned["left"])
    w_days = int(binned["width"]) / 86_400e9
    spans = [(left[a], (stop_i - a) * w_days) for a, stop_i in zip(first, stop, strict=True)]
    ax.broken_barh(spans, (0, 1.05), facecolors=PALETTE[1], alpha=0.22, linewidth=0,
                   label="prevalent")  # fmt: skip
    if binned["downsampled"]:
        ax.fill_between(x, binned["low"], binned["high"], color=PALETTE[3], alpha=0.25,
                        linewidth=0, label="bin min–max")  # fmt: skip
    line_label = "participation index" + (" (bin mean)" if binned["downsampled"] else "")
    ax.plot(x, binned["mean"], color=PALETTE[3], linewidth=1.0, label=line_label)
    if threshold is not None:
        ax.axhline(threshold, color=INK, linewidth=0.8, linestyle="--",
                   label=f"threshold {threshold:g}")  # fmt: skip
    ax.set_ylim(0, 1.05)
    ax.set_xlim(_days(np.array([start_ns]))[0], _days(np.array([end_ns + step_ns]))[0])
    ax.set_ylabel("participation\nindex")


def count_of(n: int, noun: str, plural: str | None = None) -> str:
    """Return ``n`` with its noun, singular or plural: ``"1 episode"``, ``"3 episodes"``."""
    return f"{n:,} {noun if n == 1 else plural or noun + 's'}"


def _nice_length(target: float) -> float:
    """Return the 1, 2 or 5 × 10^k closest below ``target`` (common practice for scale bars)."""
    if not np.isfinite(target) or target <= 0:
        return 1.0
    exp = np.floor(np.log10(target))
    for m in (5.0, 2.0, 1.0):
        if m * 10**exp <= target:
            return float(m * 10**exp)
    return float(10**exp)


def _metres_text(m: float) -> str:
    """Return a scale-bar label in metres or kilometres."""
    return f"{m / 1000:g} km" if m >= 1000 else f"{m:g} m"


def _scale_bar(ax: Axes, metres_per_unit: float) -> None:
    """Draw a horizontal scale bar about a fifth of the axes wide, bottom left."""
    x0, x1 = ax.get_xlim()
    y0, y1 = ax.get_ylim()
    length_m = _nice_length(0.2 * (x1 - x0) * metres_per_unit)
    length = length_m / metres_per_unit
    bx, by = x0 + 0.04 * (x1 - x0), y0 + 0.05 * (y1 - y0)
    ax.plot([bx, bx + length], [by, by], color=INK, linewidth=2.5, solid_capstyle="butt")
    ax.text(bx + length / 2, by + 0.025 * (y1 - y0), _metres_text(length_m), ha="center",
            va="bottom", fontsize=8, color=INK)  # fmt: skip


def _thin_line(coords: np.ndarray, limit: int = PATH_VERTICES) -> np.ndarray:
    """Return at most ``limit`` evenly spaced vertices of ``coords``, ends kept."""
    if len(coords) <= limit:
        return coords
    return coords[np.unique(np.linspace(0, len(coords) - 1, limit).round().astype(int))]


def _members_text(members: str, limit: int = 4) -> str:
    """Return a short listing of ``;``-joined members."""
    ids = [m for m in str(members).split(";") if m]
    shown = ";".join(ids[:limit])
    return shown + (f" +{len(ids) - limit} more" if len(ids) > limit else "")


def track_map(
    sample: pd.DataFrame | None,
    paths: pd.DataFrame | None,
    *,
    lonlat: bool,
    max_points: int,
    stored_every: int = 1,
    path_coords: Sequence[np.ndarray] = (),
) -> tuple[Figure, str]:
    """Return a map of the sampled positions with episode paths drawn over them.

    Parameters
    ----------
    sample : DataFrame or None
        ``x``, ``y`` of the results folder's track sample (input CRS).
    paths : DataFrame or None
        One row per episode to draw (``episode``, ``members``), top first.
    lonlat : bool
        Whether coordinates are longitude/latitude degrees (else planar metres).
    max_points : int
        Most positions drawn; the sample is thinned evenly when longer.
    stored_every : int, default 1
        The sample's own thinning (every k-th snapshot), for the note.
    path_coords : sequence of ndarray
        The ``(n, 2)`` vertices of each row of ``paths``.

    Returns
    -------
    Figure, str
        The figure and a one-line note on how many positions were drawn.

    Notes
    -----
    Lon/lat data are drawn as plain degrees with the aspect ``1 / cos(mean
    latitude)`` so a metre east and a metre north have the same length near the
    middle of the map; the scale bar's metres per degree of longitude come
    from the WGS 84 ellipsoid at the mean latitude.
    """
    x, y, note = _positions_drawn(sample, max_points, stored_every)
    lines = [_thin_line(np.asarray(c, dtype="float64").reshape(-1, 2)) for c in path_coords]
    view = _map_view(x, y, lines, lonlat)
    legend = paths is not None and len(paths) > 0
    box, anchor, height, view.ylim = _map_box(view, legend)
    with style():
        fig = _figure(height, layout=None)
        ax = fig.add_axes(box)
        _draw_tracks(ax, x, y, paths, lines)
        _map_axes(ax, view, lonlat)
        if legend:
            fig.legend(loc="upper left", bbox_to_anchor=anchor, title="Longest episodes",
                       alignment="left", markerscale=4)  # fmt: skip
            ax.set_title("Tracks, with the longest co-moving episodes (dot = start)")
        else:
            ax.set_title("Tracks")
    return fig, note


def _positions_drawn(
    sample: pd.DataFrame | None, max_points: int, stored_every: int
) -> tuple[np.ndarray, np.ndarray, str]:
    """Return the sample's positions to draw (thinned evenly to ``max_points``) and a note."""
    note = "No track sample in the results folder; episode paths only."
    x = y = np.zeros(0)
    if sample is None or not len(sample):
        return x, y, note
    n = len(sample)
    x = sample["x"].to_numpy(dtype="float64")
    y = sample["y"].to_numpy(dtype="float64")
    if n > max_points:
        keep = np.unique(np.linspace(0, n - 1, max(int(max_points), 1)).round().astype(int))
        x, y = x[keep], y[keep]
    stored = (
        f" The track sample of the results folder holds 1 snapshot in {stored_every:,}."
        if stored_every > 1
        else ""
    )
    if n > max_points:
        note = (f"Positions thinned for drawing: {len(x):,} of {n:,} sampled positions "
                f"drawn, evenly spaced.{stored}")  # fmt: skip
    else:
        note = f"{count_of(n, 'sampled position')} drawn.{stored}"
    return x, y, note


@dataclass
class _MapView:
    """What a map shows: its limits, its aspect and the middle of the data."""

    xlim: tuple[float, float]
    ylim: tuple[float, float]
    aspect: float  # y units per x unit drawn at equal length
    mean_x: float
    mean_y: float


def _map_view(x: np.ndarray, y: np.ndarray, lines: list[np.ndarray], lonlat: bool) -> _MapView:
    """Return the limits around the finite positions and path vertices, with a margin."""
    allx = np.concatenate([x, *(c[:, 0] for c in lines)])
    ally = np.concatenate([y, *(c[:, 1] for c in lines)])
    finite = np.isfinite(allx) & np.isfinite(ally)
    allx, ally = (allx[finite], ally[finite]) if finite.any() else (np.zeros(1), np.zeros(1))
    xr = max(float(np.ptp(allx)), 1e-9)
    yr = max(float(np.ptp(ally)), 1e-9)
    xlim = (allx.min() - 0.04 * xr, allx.max() + 0.04 * xr)
    ylim = (ally.min() - 0.09 * yr, ally.max() + 0.04 * yr)
    mean_lat = float(np.mean(ally))
    aspect = 1.0 / max(np.cos(np.radians(mean_lat)), 1e-6) if lonlat else 1.0
    return _MapView(xlim, ylim, aspect, float(np.mean(allx)), mean_lat)


def _map_box(
    view: _MapView, legend: bool
) -> tuple[tuple[float, float, float, float], tuple[float, float], float, tuple[float, float]]:
    """Return where the map goes: axes box, legend anchor, figure height and y limits.

    The box and anchor are figure fractions, the height is in inches. Placed by hand:
    constrained layout cuts labels of fixed-aspect axes. The plot is at most 6.5 inches
    high; a flatter scene is drawn 2.5 inches high with the y limits widened to fill it.
    """
    xlim, ylim, aspect = view.xlim, view.ylim, view.aspect
    left, bottom, top = 0.85, 0.8, 0.35
    right = 2.7 if legend else 0.3
    shape = (ylim[1] - ylim[0]) * aspect / (xlim[1] - xlim[0])
    plot_w = WIDTH_IN - left - right
    plot_h = plot_w * shape
    if plot_h > 6.5:
        plot_h = 6.5
        plot_w = plot_h / shape
    if plot_h < 2.5:  # a flat scene: widen the y range instead of drawing a sliver
        plot_h = 2.5
        half = 0.5 * plot_h / plot_w * (xlim[1] - xlim[0]) / aspect
        mid = 0.5 * (ylim[0] + ylim[1])
        ylim = (mid - half, mid + half)
    height = round((plot_h + bottom + top) * DPI) / DPI  # whole pixels
    box = (left / WIDTH_IN, bottom / height, plot_w / WIDTH_IN, plot_h / height)
    anchor = ((left + plot_w + 0.15) / WIDTH_IN, (bottom + plot_h) / height)
    return box, anchor, height, ylim


def _draw_tracks(
    ax: Axes,
    x: np.ndarray,
    y: np.ndarray,
    paths: pd.DataFrame | None,
    lines: list[np.ndarray],
) -> None:
    """Draw the sampled positions as dots and each episode's path in its own colour."""
    if len(x):
        ax.scatter(x, y, s=1.2, color=MUTED, alpha=0.45, linewidths=0, rasterized=True,
                   label="positions (sample)")  # fmt: skip
    if paths is None:
        return
    for i, ((_, row), c) in enumerate(zip(paths.iterrows(), lines, strict=True)):
        if len(c) == 0:
            continue
        colour = PALETTE[i % len(PALETTE)]
        label = plain_text(f"{row['episode']}: {_members_text(row['members'], 3)}", 38)
        ax.plot(c[:, 0], c[:, 1], color=colour, linewidth=2.0, label=label)
        ax.plot(c[:1, 0], c[:1, 1], marker="o", color=colour, markersize=4)


def _map_axes(ax: Axes, view: _MapView, lonlat: bool) -> None:
    """Set the map's limits, aspect, axis labels and scale bar."""
    ax.set_xlim(*view.xlim)
    ax.set_ylim(*view.ylim)
    ax.set_aspect(view.aspect)
    if lonlat:
        from pyproj import Geod

        lon0, lat0 = view.mean_x, view.mean_y
        metres_per_degree = Geod(ellps="WGS84").inv(lon0, lat0, lon0 + 1.0, lat0)[2]
        ax.set_xlabel("longitude (°)")
        ax.set_ylabel("latitude (°)")
        _scale_bar(ax, metres_per_degree)
    else:
        ax.set_xlabel("x (m)")
        ax.set_ylabel("y (m)")
        _scale_bar(ax, 1.0)
    ax.ticklabel_format(useOffset=False, style="plain")


def episode_timeline(episodes: pd.DataFrame, top: int = 40) -> tuple[Figure, str]:
    """Return one bar per episode from start to end, the ``top`` longest, on a UTC axis.

    Parameters
    ----------
    episodes : DataFrame
        ``episode``, ``start``, ``end``, ``duration_s``, ``members``, ``roles``.
    top : int, default 40
        Most episodes drawn (the longest).

    Returns
    -------
    Figure, str
        The figure and a one-line note on how many episodes were drawn.
    """
    chosen = episodes.sort_values(["duration_s", "episode"], ascending=[False, True]).head(top)
    chosen = chosen.sort_values(["start", "episode"], ascending=[False, False])
    roles = chosen["roles"].fillna("").astype(str)
    rank = (
        chosen.assign(r=roles).groupby("r")["duration_s"].sum().sort_values(ascending=False).index
    )
    colour_of = {r: PALETTE[i] for i, r in enumerate(rank[: len(PALETTE)])}
    with style():
        fig = _figure(1.3 + 0.2 * max(len(chosen), 4))
        ax = fig.add_subplot()
        start = _days(ns_times(chosen["start"]))
        end = _days(ns_times(chosen["end"]))
        y = np.arange(len(chosen))
        colours = [colour_of.get(r, MUTED) for r in roles]
        ax.barh(y, np.maximum(end - start, 1e-9), left=start, height=0.7, color=colours)
        tick = [
            plain_text(f"{e}  {(' + '.join(r.split(';')) if r else _members_text(m))}", 48)
            for e, r, m in zip(chosen["episode"], roles, chosen["members"], strict=True)
        ]
        ax.set_yticks(y, tick)
        ax.set_ylim(-0.7, len(chosen) - 0.3)
        ax.xaxis_date()
        _date_axis(ax)
        ax.set_title("Episodes from start to end, coloured by role set")
        if len(episodes) > len(chosen):
            note = f"The {len(chosen)} longest of {count_of(len(episodes), 'episode')} drawn."
        else:
            note = f"All {count_of(len(episodes), 'episode')} drawn."
    return fig, note


def association_matrix(
    dyads: pd.DataFrame, column: str = "half_weight_index", max_objects: int = 200
) -> tuple[pd.DataFrame, str]:
    """Return the symmetric object × object matrix of ``column``, ordered by clustering.

    Parameters
    ----------
    dyads : DataFrame
        ``object_a``, ``object_b`` and ``column``, one row per pair.
    column : str, default "half_weight_index"
        The association index, between 0 and 1.
    max_objects : int, default 200
        Most objects kept (those with the largest summed index).

    Returns
    -------
    DataFrame, str
        The matrix (NaN on the diagonal and for pairs never present together),
        rows and columns in the order of the leaves of an average-linkage tree
        on ``1 − index``; and a note on how many objects were kept.

    Notes
    -----
    A pair with no row (never present together) counts as index 0, distance 1,
    in the clustering.
    """
    from scipy.cluster.hierarchy import leaves_list, linkage
    from scipy.spatial.distance import squareform

    a = dyads["object_a"].astype(str).to_numpy()
    b = dyads["object_b"].astype(str).to_numpy()
    v = dyads[column].to_numpy(dtype="float64")
    objects = np.unique(np.concatenate([a, b]))
    note = f"All {count_of(len(objects), 'object')}."
    if len(objects) > max_objects:
        strength = pd.Series(np.concatenate([np.nan_to_num(v)] * 2), index=np.concatenate([a, b]))
        keep = strength.groupby(level=0).sum().nlargest(max_objects).index.to_numpy()
        mask = np.isin(a, keep) & np.isin(b, keep)
        a, b, v = a[mask], b[mask], v[mask]
        note = f"The {len(keep)} most associated of {len(objects):,} objects."
        objects = np.sort(keep)
    index = pd.Index(objects)
    i, j = index.get_indexer(a), index.get_indexer(b)
    m = np.full((len(objects), len(objects)), np.nan)
    m[i, j] = v
    m[j, i] = v
    np.fill_diagonal(m, np.nan)
    if len(objects) > 2:
        dist = np.clip(1.0 - np.nan_to_num(m, nan=0.0), 0.0, 1.0)
        np.fill_diagonal(dist, 0.0)
        order = leaves_list(linkage(squareform(dist, checks=False), method="average"))
    else:
        order = np.arange(len(objects))
    ordered = objects[order]
    return pd.DataFrame(m[np.ix_(order, order)], index=ordered, columns=ordered), note


def dyad_heatmap(matrix: pd.DataFrame) -> tuple[Figure, str]:
    """Return a heatmap of an association matrix from :func:`association_matrix`.

    Parameters
    ----------
    matrix : DataFrame
        Square, index and columns the same objects in the same order.

    Returns
    -------
    Figure, str
        The figure and a note on its labels and blank cells, for its caption.
    """
    n = len(matrix)
    cmap = ListedColormap(matplotlib.colormaps["viridis"](np.linspace(0, 1, 256)))
    cmap = cmap.with_extremes(bad="white")
    with style():
        fig = _figure(6.8)
        ax = fig.add_subplot()
        im = ax.imshow(np.ma.masked_invalid(matrix.to_numpy()), cmap=cmap, vmin=0, vmax=1,
                       interpolation="nearest")  # fmt: skip
        every = max(1, -(-n // 40))
        ticks = np.arange(0, n, every)
        names = [plain_text(s, 16) for s in matrix.index.to_numpy()[ticks]]
        ax.set_xticks(ticks, names, rotation=90)
        ax.set_yticks(ticks, names)
        ax.tick_params(length=2)
        for side in ("top", "right"):
            ax.spines[side].set_visible(True)
        bar = fig.colorbar(im, ax=ax, shrink=0.8)
        bar.set_label("half-weight index (0 = never together, 1 = always)")
        ax.set_xlabel("object")
        ax.set_ylabel("object")
        ax.set_title("Dyad association, objects ordered by average-linkage clustering")
    labelled = f"1 object in {every} labelled. " if every > 1 else ""
    return fig, labelled + "Blank: diagonal, or never present together."


def part_heatmap(matrix: pd.DataFrame, what: str) -> tuple[Figure, str]:
    """Return the time prevalence of role sets (rows) in each period and area (columns).

    Parameters
    ----------
    matrix : DataFrame
        Time prevalence in [0, 1], index the role sets, columns the parts
        ("period / area"); NaN where a set is not kept in a part.
    what : str
        What the rows are, for the title (e.g. "durable role sets").

    Returns
    -------
    Figure, str
        The figure and a note on its blank cells, for its caption.
    """
    n_rows, n_cols = matrix.shape
    cmap = ListedColormap(matplotlib.colormaps["viridis"](np.linspace(0, 1, 256)))
    cmap = cmap.with_extremes(bad="white")
    values = matrix.to_numpy(dtype="float64")
    with style():
        fig = _figure(max(2.4, 1.4 + 0.32 * n_rows))
        ax = fig.add_subplot()
        im = ax.imshow(np.ma.masked_invalid(values), cmap=cmap, vmin=0, vmax=1, aspect="auto",
                       interpolation="nearest")  # fmt: skip
        ax.set_xticks(
            np.arange(n_cols),
            [plain_text(c, 24) for c in matrix.columns],
            rotation=30 if n_cols > 4 else 0,
            ha="right" if n_cols > 4 else "center",
        )
        ax.set_yticks(np.arange(n_rows), [plain_text(r, 40) for r in matrix.index])
        ax.tick_params(length=2)
        if n_rows * n_cols <= 200:  # the value in each cell, dark text on the light end
            for (r, c), v in np.ndenumerate(values):
                if np.isfinite(v):
                    ax.text(c, r, f"{v:.2f}", ha="center", va="center", fontsize=7,
                            color=INK if v > 0.55 else "white")  # fmt: skip
        for side in ("top", "right"):
            ax.spines[side].set_visible(True)
        bar = fig.colorbar(im, ax=ax, shrink=0.9)
        bar.set_label("time prevalence")
        ax.set_xlabel("period / area")
        ax.set_title(f"Time prevalence of the leading {what} in each part")
    return fig, "Blank: not kept in that part at these thresholds."


def cross_l_curves(cross: pd.DataFrame, top: int = 6) -> tuple[Figure, list[tuple[str, str]]]:
    """Return L(r) − r curves, with null envelopes when present, for the top role pairs.

    Parameters
    ----------
    cross : DataFrame
        ``role_a``, ``role_b``, ``radius_m``, ``l_m``, ``l_minus_r_m`` and
        optionally ``null_low_m``, ``null_high_m``, ``null_mean_m`` (envelopes of
        ``l_m``).
    top : int, default 6
        Most role pairs drawn, by largest ``l_minus_r_m``.

    Returns
    -------
    Figure, list of (str, str)
        The figure and the pairs drawn, in panel order.
    """
    peak = cross.groupby(["role_a", "role_b"], observed=True)["l_minus_r_m"].max()
    pairs = list(peak.sort_values(ascending=False, kind="stable").head(top).index)
    ncols = min(3, len(pairs))
    nrows = -(-len(pairs) // ncols)
    has_env = {"null_low_m", "null_high_m"} <= set(cross.columns)
    with style():
        fig = _figure(0.8 + 2.3 * nrows)
        axes = fig.subplots(nrows, ncols, squeeze=False).ravel()
        for ax, (ra, rb) in zip(axes, pairs, strict=False):
            rows = cross[(cross["role_a"] == ra) & (cross["role_b"] == rb)].sort_values("radius_m")
            r = rows["radius_m"].to_numpy(dtype="float64")
            if has_env:
                ax.fill_between(r, rows["null_low_m"] - r, rows["null_high_m"] - r,
                                color=PALETTE[1], alpha=0.35, linewidth=0,
                                label="null envelope")  # fmt: skip
                if "null_mean_m" in rows:
                    ax.plot(r, rows["null_mean_m"] - r, color=PALETTE[3], linewidth=0.9,
                            linestyle=":", label="null mean")  # fmt: skip
            ax.axhline(0.0, color=MUTED, linewidth=0.8, label="independence (0)")
            ax.plot(r, rows["l_minus_r_m"], color=PALETTE[4], marker="o", markersize=3,
                    linewidth=1.3, label="observed")  # fmt: skip
            ax.set_title(plain_text(f"{ra} – {rb}", 50))
            ax.set_xlabel("r (m)")
            ax.set_ylabel("L(r) − r (m)")
        for ax in axes[len(pairs) :]:
            ax.set_visible(False)
        handles, names = axes[0].get_legend_handles_labels()
        fig.legend(handles, names, loc="outside upper center", ncols=4)
    return fig, pairs


#: Most participation thresholds drawn by :func:`sweep_curves`, one panel each.
SWEEP_PANELS = 6


def sweep_curves(
    sweep: pd.DataFrame, min_prevalence: float | None = None, top: int = len(PALETTE)
) -> tuple[Figure, str]:
    """Return time prevalence against radius of the leading role sets, one panel per threshold.

    Parameters
    ----------
    sweep : DataFrame
        ``sweep.csv``: ``radius_m``, ``min_participation``, ``roles``,
        ``time_prevalence``.
    min_prevalence : float, optional
        The persistence threshold, drawn as a dashed line.
    top : int
        Most role sets drawn: those with the highest time prevalence anywhere
        on the grid, each in the same colour in every panel.

    Returns
    -------
    Figure, str
        The figure and a note for its caption (what was left out).
    """
    thresholds = sorted(float(v) for v in sweep["min_participation"].unique())
    shown = thresholds
    if len(thresholds) > SWEEP_PANELS:
        shown = [thresholds[i] for i in np.linspace(0, len(thresholds) - 1, SWEEP_PANELS)
                 .round().astype(int)]  # fmt: skip
    best = sweep.groupby("roles", observed=True)["time_prevalence"].max()
    lead = list(best.sort_values(ascending=False, kind="stable").head(top).index)
    colour = dict(zip(lead, PALETTE, strict=False))
    radii = np.sort(sweep["radius_m"].unique().astype("float64"))
    ncols = min(3, len(shown))
    nrows = -(-len(shown) // ncols)
    with style():
        fig = _figure(1.2 + 2.4 * nrows)
        axes = fig.subplots(nrows, ncols, squeeze=False, sharex=True, sharey=True).ravel()
        for ax, threshold in zip(axes, shown, strict=False):
            at = sweep[np.isclose(sweep["min_participation"].astype("float64"), threshold)]
            for roles in lead:
                rows = at[at["roles"] == roles].set_index("radius_m")["time_prevalence"]
                # a role set never prevalent at a radius has time prevalence 0 there
                values = rows.reindex(radii).fillna(0.0).to_numpy(dtype="float64")
                ax.plot(radii, values, color=colour[roles], marker="o", markersize=3,
                        linewidth=1.2, label=plain_text(roles, 60))  # fmt: skip
            if min_prevalence is not None:
                ax.axhline(min_prevalence, color=MUTED, linewidth=0.8, linestyle="--",
                           label=f"least time prevalence ({min_prevalence:g})")  # fmt: skip
            ax.set_title(f"participation threshold {threshold:g}")
            ax.set_ylim(0, 1.02)
            ax.set_xlabel("radius (m)")
            ax.set_ylabel("time prevalence")
            ax.label_outer()
        for ax in axes[len(shown) :]:
            ax.set_visible(False)
        handles, names = axes[0].get_legend_handles_labels()
        # above the panels, never over the curves
        fig.legend(handles, names, loc="outside upper center", ncols=2)
    notes = []
    if len(shown) < len(thresholds):
        notes.append(f"{len(shown)} of {count_of(len(thresholds), 'participation threshold')} "
                     "drawn, evenly spaced; sweep.csv holds them all.")  # fmt: skip
    if best.size > len(lead):
        notes.append(f"The {len(lead)} role sets with the highest time prevalence of "
                     f"{best.size:,} drawn.")  # fmt: skip
    return fig, " ".join(notes)


#: Most objects drawn in the association network (the most associated).
NETWORK_OBJECTS = 60
#: Objects whose names are written beside their node when no more are drawn.
NETWORK_LABELS = 40


def association_network(
    dyads: pd.DataFrame, column: str = "half_weight_index", max_objects: int = NETWORK_OBJECTS
) -> tuple[Figure, str]:
    """Return the association network of the most associated objects, drawn with a spring layout.

    Parameters
    ----------
    dyads : DataFrame
        ``dyads.csv``: ``object_a``, ``object_b``, ``role_a``, ``role_b`` and ``column``.
    column : str, default "half_weight_index"
        The index that weighs the layout and sets each edge's width.
    max_objects : int
        Most objects drawn: those with the largest sum of the index over their pairs.

    Returns
    -------
    Figure, str
        The figure and a note for its caption.

    Notes
    -----
    Fruchterman–Reingold force-directed placement (``networkx.spring_layout``,
    edges pulling by the index, a fixed seed so that a report draws the same
    picture twice); nodes coloured by their role (the palette in the order of
    the role names, grey beyond it); edge width grows with the index.

    References
    ----------
    .. [1] T. M. J. Fruchterman, E. M. Reingold, "Graph drawing by force-directed
       placement", Software: Practice and Experience 21(11), 1129-1164, 1991.
       doi:10.1002/spe.4380211102
    """
    import networkx as nx

    weight = dyads[column].to_numpy(dtype="float64")
    a, b = dyads["object_a"].astype(str).to_numpy(), dyads["object_b"].astype(str).to_numpy()
    linked = np.nan_to_num(weight) > 0
    strength = pd.Series(np.concatenate([np.nan_to_num(weight)] * 2), index=np.concatenate([a, b]))
    strength = strength.groupby(level=0).sum()
    keep = set(strength[strength > 0].nlargest(max_objects).index)
    drawn = linked & np.isin(a, list(keep)) & np.isin(b, list(keep))
    ends = np.concatenate([a, b])
    ends_role = np.concatenate([dyads["role_a"].astype(str), dyads["role_b"].astype(str)])
    role_of = dict(zip(ends, ends_role, strict=True))
    graph = nx.Graph()
    graph.add_nodes_from(sorted(keep))
    graph.add_weighted_edges_from(zip(a[drawn], b[drawn], weight[drawn], strict=True))
    position = nx.spring_layout(graph, weight="weight", seed=7) if len(graph) else {}
    roles = sorted({role_of[n] for n in graph})
    colour = {r: PALETTE[k] if k < len(PALETTE) else MUTED for k, r in enumerate(roles)}
    with style():
        fig = _figure(6.4)
        ax = fig.add_subplot()
        for u, v, w in graph.edges(data="weight"):
            (x0, y0), (x1, y1) = position[u], position[v]
            ax.plot([x0, x1], [y0, y1], color=INK, alpha=0.25 + 0.5 * w, linewidth=0.4 + 3.6 * w,
                    zorder=1, solid_capstyle="round")  # fmt: skip
        for role in roles:
            nodes = [n for n in graph if role_of[n] == role]
            xy = np.array([position[n] for n in nodes])
            ax.scatter(xy[:, 0], xy[:, 1], s=60, color=colour[role], edgecolors="white",
                       linewidths=0.8, zorder=2, label=plain_text(role, 40))  # fmt: skip
        if len(graph) <= NETWORK_LABELS:
            for n, (x, y) in position.items():
                ax.annotate(plain_text(n, 16), (x, y), xytext=(4, 4), textcoords="offset points",
                            fontsize=7, color=INK, zorder=3)  # fmt: skip
        ax.set_axis_off()
        ax.set_title("Association network: objects pulled together by their half-weight index")
        if roles:
            fig.legend(loc="outside lower center", ncols=min(4, len(roles)), title="role")
    note = (
        f"All {count_of(len(keep), 'associated object')}."
        if len(keep) == strength.gt(0).sum()
        else f"The {len(keep)} most associated of {int(strength.gt(0).sum()):,} objects."
    )
    if len(roles) > len(PALETTE):
        note += f" Roles beyond the first {len(PALETTE)} by name are grey."
    return fig, note


#: Most pairs drawn in the leadership figure.
LEADERSHIP_PAIRS = 20


def leadership_bars(leaders: pd.DataFrame, top: int = LEADERSHIP_PAIRS) -> tuple[Figure, str]:
    """Return the delays of the pairs with a clear leader, one bar per pair.

    Parameters
    ----------
    leaders : DataFrame
        ``leadership.csv``: ``leader``, ``follower``, ``leader_role``,
        ``delay_s``, ``correlation``, ``moving_together_s``, ``clear_leader``,
        and ``p_value``, ``significant`` when the leads were tested.
    top : int
        Most pairs drawn: the clear leads with the highest heading correlation.

    Returns
    -------
    Figure, str
        The figure and a note for its caption.
    """
    clear = leaders[leaders["clear_leader"].astype(bool)]
    shown = clear.sort_values(["correlation", "delay_s"], ascending=False, kind="stable").head(top)
    roles = sorted(shown["leader_role"].astype(str).unique())
    colour = {r: PALETTE[k] if k < len(PALETTE) else MUTED for k, r in enumerate(roles)}
    with style():
        fig = _figure(max(2.4, 1.2 + 0.28 * len(shown)))
        ax = fig.add_subplot()
        y = np.arange(len(shown))[::-1]
        tested = "significant" in shown.columns
        strong = shown["significant"].astype(bool).to_numpy() if tested else np.ones(len(y), bool)
        for role in roles:
            rows = shown["leader_role"].astype(str).to_numpy() == role
            for sure, fade in ((True, 1.0), (False, 0.35)):
                ax.barh(y[rows & (strong == sure)],
                        shown["delay_s"].to_numpy(dtype="float64")[rows & (strong == sure)],
                        height=0.7, color=colour[role], alpha=fade,
                        label=plain_text(role, 40)
                        if sure == (rows & strong).any() else None)  # fmt: skip
        labels = [plain_text(f"{a} → {b}", 40)
                  for a, b in zip(shown["leader"], shown["follower"], strict=True)]  # fmt: skip
        ax.set_yticks(y, labels)
        p_values = shown["p_value"] if tested else [None] * len(y)
        for yy, delay, corr, p in zip(y, shown["delay_s"], shown["correlation"], p_values,
                                      strict=True):  # fmt: skip
            text = f"r = {corr:.2f}" + ("" if p is None else f", p = {p:.2g}")
            ax.annotate(text, (delay, yy), xytext=(3, 0), textcoords="offset points",
                        va="center", fontsize=7, color=INK)  # fmt: skip
        ax.set_xlabel("delay of the follower's heading behind the leader's (s)")
        ax.set_title("Who leads whom: pairs with a clear leader, leader → follower")
        if roles:
            fig.legend(loc="outside lower center", ncols=min(4, len(roles)), title="leader's role")
    note = (f"The {len(shown)} clear leads with the highest heading correlation of "
            f"{count_of(len(clear), 'pair')} with a clear leader."
            if len(clear) > len(shown) else f"All {count_of(len(clear), 'pair')} with a clear "
            "leader.")  # fmt: skip
    if tested:
        note += (" p: Monte Carlo p-value of the lead under the swap of leader and follower in "
                 "blocks of time; faded bars: not significant after the false discovery rate "
                 "control.")  # fmt: skip
    return fig, note


#: Most role sets drawn around the focal role, and most exact neighbourhoods.
FOCAL_SETS = 15


def focal_bars(
    sets: pd.DataFrame, neighbourhoods: pd.DataFrame, top: int = FOCAL_SETS
) -> tuple[Figure, str]:
    """Return what surrounds the focal role: durable sets, and exact neighbourhoods.

    Parameters
    ----------
    sets : DataFrame
        ``focal.csv``: ``around``, ``time_prevalence``, ``mean_share``.
    neighbourhoods : DataFrame
        ``focal_neighbourhoods.csv``: ``around`` (empty: nobody around), ``share``.
    top : int
        Most bars in each panel.

    Returns
    -------
    Figure, str
        The figure and a note for its caption.
    """
    shown = sets.head(top)
    hoods = neighbourhoods.head(top)
    rows = max(len(shown), len(hoods), 1)
    with style():
        fig = _figure(max(2.6, 1.3 + 0.26 * rows))
        left, right = fig.subplots(1, 2, width_ratios=[1, 1])
        y = np.arange(len(shown))[::-1]
        left.barh(y, shown["time_prevalence"].to_numpy(dtype="float64"), height=0.7,
                  color=PALETTE[1], label="time prevalence")  # fmt: skip
        left.plot(shown["mean_share"].to_numpy(dtype="float64"), y, "o", color=PALETTE[4],
                  markersize=4, label="mean share")  # fmt: skip
        left.set_yticks(y, [plain_text(a, 36) for a in shown["around"]])
        left.set_xlim(0, 1)
        left.set_title("Durable role sets around it")
        fig.legend(*left.get_legend_handles_labels(), loc="outside lower center", ncols=2)
        y = np.arange(len(hoods))[::-1]
        labels = [plain_text(a, 36) if isinstance(a, str) and a else "(nobody)"
                  for a in hoods["around"]]  # fmt: skip
        right.barh(y, hoods["share"].to_numpy(dtype="float64"), height=0.7, color=PALETTE[2])
        right.set_yticks(y, labels)
        right.set_xlim(0, 1)
        right.set_title("Exactly these roles around it")
        for ax in (left, right):
            ax.set_xlabel("share")
    parts = []
    if len(sets) > len(shown):
        parts.append(f"the {len(shown)} of {count_of(len(sets), 'durable role set')} with the "
                     "highest time prevalence")  # fmt: skip
    if len(neighbourhoods) > len(hoods):
        parts.append(f"the {len(hoods)} most frequent of "
                     f"{count_of(len(neighbourhoods), 'neighbourhood')}")  # fmt: skip
    note = ("Shown: " + "; ".join(parts) + ".") if parts else ""
    return fig, note

"""A self-contained HTML report of a results folder.

:func:`build_report` reads what ``comove mine`` and ``comove groups`` wrote
into a folder and writes ``report.html`` beside it: one file with the figures
embedded as PNG data URIs, inline CSS, no scripts and nothing fetched from a
network, plus the same figures as PNG files under ``figures/``. Each section
appears only when its data are in the folder. Everything drawn is thinned or
binned for drawing; nothing is recomputed.
"""

from __future__ import annotations

import base64
import html
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from comove.errors import InputError
from comove.io.results import (
    ALL_PARTS,
    CAUTION,
    REPORT,
    ResultsFolder,
    bytes_writer,
    claim,
    flat_settings,
    open_results,
    overall,
    text_writer,
)
from comove.io.times import human_seconds, utc_iso
from comove.present import figures

#: The report's page, beside the results.
PAGE = "report.html"
#: The report's figures, each written as ``figures/<name>.png``.
FIGURE_NAMES = ("patterns_pi", "track_map", "episode_timeline", "dyad_matrix", "cross_l")
#: Most durable role sets drawn as timelines.
TOP_PATTERNS = 8
#: Most durable role sets listed in the table.
TABLE_PATTERNS = 30
#: Most episodes drawn on the map.
MAP_EPISODES = 6
#: Most episodes drawn on the timeline.
TIMELINE_EPISODES = 40
#: Most role pairs drawn as cross-L curves.
CROSS_PAIRS = 6

_CSS = """
body{font-family:"DejaVu Sans",Verdana,sans-serif;color:#222;background:#fff;margin:0 auto;
max-width:60rem;padding:1.5rem;line-height:1.45;font-size:15px}
h1{font-size:1.5rem;font-weight:600;margin:.2rem 0 1rem}
h2{font-size:1.2rem;font-weight:600;margin:2.2rem 0 .6rem;border-bottom:1px solid #ccc;
padding-bottom:.2rem}
h3{font-size:1rem;font-weight:600;margin:1.2rem 0 .4rem}
.caution{border:2px solid #D55E00;background:#fff6ef;padding:.7rem 1rem;margin:1rem 0;
font-weight:600}
table{border-collapse:collapse;margin:.5rem 0 1rem;font-size:.85rem}
th,td{border:1px solid #ddd;padding:.25rem .5rem;text-align:left;vertical-align:top}
th{background:#f4f4f4;font-weight:600}
td.num{text-align:right;font-variant-numeric:tabular-nums}
figure{margin:1rem 0}
figure img{max-width:100%;height:auto;border:1px solid #eee}
figcaption{font-size:.85rem;color:#555}
.muted{color:#666;font-size:.85rem}
code{font-size:.85rem}
"""


@dataclass
class _Picture:
    """One figure of the report."""

    name: str
    png: figures.Png
    alt: str
    caption: str


@dataclass
class _Results:
    """What a results folder holds (absent files are None or empty)."""

    source: ResultsFolder
    runs: dict[str, dict] = field(default_factory=dict)
    quality: dict[str, dict] = field(default_factory=dict)
    patterns: pd.DataFrame | None = None
    cross_k: pd.DataFrame | None = None
    episodes: pd.DataFrame | None = None
    dyads: pd.DataFrame | None = None
    sweep: pd.DataFrame | None = None
    leaders: pd.DataFrame | None = None
    leader_roles: pd.DataFrame | None = None
    focal: pd.DataFrame | None = None
    neighbourhoods: pd.DataFrame | None = None
    by_part: dict[str, pd.DataFrame] = field(default_factory=dict)


def _load(source: ResultsFolder) -> _Results:
    """Return the tables and records of a results folder."""
    res = _Results(source)
    res.runs = source.runs()
    res.quality = source.quality()
    for name in ("patterns.csv", "focal.csv", "episodes.csv"):  # split by period and area
        table = source.table(name)
        if table is not None and "period" in table.columns:
            res.by_part[name] = table
    res.patterns = overall(source.table("patterns.csv"))
    res.cross_k = overall(source.table("cross_k.csv"))
    res.episodes = overall(source.table("episodes.csv"))
    res.dyads = overall(source.table("dyads.csv"))
    res.sweep = source.table("sweep.csv")
    res.leaders = overall(source.table("leadership.csv"))
    res.leader_roles = overall(source.table("leadership_roles.csv"))
    res.focal = overall(source.table("focal.csv"))
    res.neighbourhoods = overall(source.table("focal_neighbourhoods.csv"))
    return res


# ---------------------------------------------------------------- text helpers


#: Characters of a name shown in full; a longer one is cut, whole in its tooltip.
NAME_CHARS = 80


def _e(value: object) -> str:
    """Return ``value`` as HTML-escaped text, control and direction characters shown as codes."""
    return html.escape(figures.visible(value), quote=True)


def _name(value: object) -> str:
    """Return a name (roles, members, an object id) escaped, long ones cut (whole in a tooltip)."""
    text = str(value)
    if len(text) <= NAME_CHARS:
        return _e(text)
    return f'<span title="{_e(text)}">{_e(text[: NAME_CHARS - 1])}…</span>'


def _num(value: object, digits: int = 3) -> str:
    """Return a number with ``digits`` significant digits, or a dash when missing."""
    try:
        v = float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return _e(value)
    if not np.isfinite(v):
        return "—" if np.isnan(v) else ("∞" if v > 0 else "−∞")
    if v == int(v) and abs(v) < 1e9:
        return f"{int(v):,}"
    return f"{v:.{digits}g}"


def _duration(seconds: object) -> str:
    """Return a duration as the console writes it (:func:`~comove.io.times.human_seconds`)."""
    try:
        s = float(seconds)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return "—"
    return human_seconds(s) if np.isfinite(s) else "—"


def _table(header: list[str], rows: list[list[str]], numeric: set[int] | None = None) -> str:
    """Return an HTML table; cells are already escaped HTML."""
    numeric = numeric or set()
    head = "".join(f"<th>{_e(h)}</th>" for h in header)
    body = "".join(
        "<tr>"
        + "".join(
            f'<td class="num">{c}</td>' if i in numeric else f"<td>{c}</td>"
            for i, c in enumerate(row)
        )
        + "</tr>"
        for row in rows
    )
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def _roles_text(roles: object) -> str:
    """Return a role set as the tables write it (names joined by ``;``); empty when missing."""
    return roles if isinstance(roles, str) else ""


def _when(value: object) -> str:
    """Return a UTC time as the tables and the console write it (``...T10:03:57.2Z``)."""
    if not isinstance(value, str) or not value:
        return "—"
    try:
        ts = pd.Timestamp(value)
    except ValueError:
        return value
    ts = ts.tz_convert("UTC") if ts.tzinfo else ts.tz_localize("UTC")
    return utc_iso(ts.value)


def _figure_html(pic: _Picture) -> str:
    """Return an HTML figure embedding ``pic`` as a PNG data URI."""
    data = base64.b64encode(pic.png.data).decode("ascii")
    return (
        f'<figure><img src="data:image/png;base64,{data}" width="{pic.png.width}" '
        f'height="{pic.png.height}" alt="{_e(pic.alt)}">'
        f"<figcaption>{_e(pic.caption)}</figcaption></figure>"
    )


# ---------------------------------------------------------------- sections


def _run_section(res: _Results) -> str:
    """Return the section on the run: input, settings, versions, data quality, caution."""
    parts = ["<h2>The run</h2>"]
    cautions = {str(r.get("caution")) for r in res.runs.values() if r.get("caution")}
    for text in sorted(cautions) or [CAUTION]:
        parts.append(f'<p class="caution">Caution: {_e(text)}</p>')
    if not res.runs:
        parts.append('<p class="muted">No run.json in the folder.</p>')
    for command, run in res.runs.items():
        parts.append(f"<h3>Command: comove {_e(command)}</h3>")
        inputs = run.get("input")
        inputs = inputs if isinstance(inputs, list) else [inputs]
        rows = [
            ["input", "<br>".join(f"<code>{_e(p)}</code>" for p in inputs)],
            ["input digest", f"<code>{_e(run.get('input_digest', '—'))}</code>"],
            ["created", _e(run.get("created", "—"))],
        ]
        if run.get("preset"):
            rows.append(["preset", _e(run["preset"])])
        for name, value in flat_settings(run).items():
            rows.append([f"<code>--{_e(name.replace('_', '-'))}</code>", _e(_setting(value))])
        versions = run.get("versions") or {}
        rows.append(["versions", _e(", ".join(f"{k} {v}" for k, v in versions.items()))])
        parts.append(_table(["item", "value"], rows))
    parts.append(_quality_html(res.quality))
    return "\n".join(parts)


def _setting(value: object) -> str:
    """Return a setting's value as a user writes it: yes/no, a list joined by commas, off."""
    if value is None:
        return "off"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, (list, tuple)):
        return ",".join(f"{v:g}" if isinstance(v, float) else str(v) for v in value)
    if isinstance(value, float):
        return f"{value:g}"
    return str(value)


def _quality_html(quality: dict[str, dict]) -> str:
    """Return the data-quality summary, one table per distinct quality record."""
    if not quality:
        return '<p class="muted">No quality.json in the folder.</p>'
    distinct: list[tuple[list[str], dict]] = []
    for command, q in quality.items():
        for names, seen in distinct:
            if seen == q:
                names.append(command)
                break
        else:
            distinct.append(([command], q))
    parts = []
    for names, q in distinct:
        label = " and ".join(f"comove {n}" for n in names)
        parts.append(f"<h3>Data quality ({_e(label)})</h3>")
        dropped = {k: v for k, v in (q.get("dropped") or {}).items() if v}
        merged = {k: v for k, v in (q.get("merged") or {}).items() if v}
        interval = q.get("sampling_interval_s") or {}
        coords = q.get("coordinates") or {}
        align = q.get("alignment") or {}
        rows = [
            ["rows read", _num(q.get("rows_read"))],
            ["rows kept", _num(q.get("rows_kept"))],
            [
                "dropped",
                _e("; ".join(f"{k.replace('_', ' ')}: {v:,}" for k, v in dropped.items()))
                if dropped
                else "none",
            ],
        ]
        if merged:
            rows.append(["merged", _e("; ".join(f"{k.replace('_', ' ')}: {v:,}"
                                               for k, v in merged.items()))])  # fmt: skip
        rows += [
            ["objects", _num(q.get("objects"))],
            [
                "roles",
                _num(q.get("roles"))
                if (q.get("role_names") or [""]) != [""]
                else "no role column: every object has one role",
            ],
            [
                "time span",
                _e(
                    f"{_when(q.get('time_start'))} to {_when(q.get('time_end'))} "
                    f"({_duration(q.get('time_span_s'))})"
                ),  # fmt: skip
            ],
            [
                "sampling interval",
                _e(
                    f"median {_num(interval.get('median'))} s "
                    f"(10–90 %: {_num(interval.get('p10'))}–{_num(interval.get('p90'))} s)"
                )
                if interval
                else "—",  # fmt: skip
            ],
            [
                "coordinates",
                _e(
                    f"input {coords.get('input', '—')}"
                    + (f" ({coords['input_crs']})" if coords.get("input_crs") else "")
                    + f"; working plane {coords.get('working_crs', '—')}"
                ),  # fmt: skip
            ],
        ]
        if align:
            rows.append([
                "alignment",
                _e(f"step {_num(align.get('step_s'))} s, gaps bridged up to "
                   f"{_num(align.get('max_gap_s'))} s, {_num(align.get('snapshots'))} snapshots, "
                   f"{_num(align.get('entries'))} positions"),
            ])  # fmt: skip
        if q.get("time_note"):
            rows.append(["time note", _e(q["time_note"])])
        parts.append(_table(["item", "value"], rows))
    return "\n".join(parts)


def _mine_settings(res: _Results) -> dict[str, Any]:
    """Return the settings of the mine run by option name, or an empty dict."""
    return flat_settings(res.runs.get("mine") or {})


def _period(res: _Results, times: pd.Series | None) -> tuple[int, int, int]:
    """Return the run's start, end and step in nanoseconds (from quality, else the data)."""
    q = res.quality.get("mine") or next(iter(res.quality.values()), {})
    start = end = None
    if q.get("time_start") and q.get("time_end"):
        start = pd.Timestamp(q["time_start"]).as_unit("ns").value
        end = pd.Timestamp(q["time_end"]).as_unit("ns").value
    step_s = (q.get("alignment") or {}).get("step_s") or _mine_settings(res).get("step")
    if times is not None and len(times):
        t = figures.ns_times(times)
        lo, hi = int(t.min()), int(t.max())
        start = lo if start is None else min(start, lo)
        end = hi if end is None else max(end, hi)
        if not step_s:
            gaps = np.diff(np.unique(t))
            step_s = float(np.median(gaps)) / 1e9 if len(gaps) else 1.0
    step_ns = max(int(round(float(step_s or 1.0) * 1e9)), 1)
    return int(start or 0), int(end or 0), step_ns


def _ranked(patterns: pd.DataFrame) -> pd.DataFrame:
    """Return patterns ranked by time prevalence, then longest run, then prevalent time."""
    keys = [c for c in ("time_prevalence", "longest_run_s", "prevalent_s")
            if c in patterns]  # fmt: skip
    if not keys:
        return patterns
    return patterns.sort_values(keys, ascending=False, kind="stable").reset_index(drop=True)


def _patterns_section(res: _Results) -> tuple[str, list[_Picture]]:
    """Return the durable role sets, ranked: table and participation-index timelines."""
    patterns = _ranked(res.patterns)  # type: ignore[arg-type]
    parts = ["<h2>Durable role sets, ranked</h2>"]
    if patterns.empty:
        parts.append("<p>No role set met the thresholds of this run.</p>")
        return "\n".join(parts), []
    tested = "p_value" in patterns
    header = ["rank", "roles", "time prevalence", "prevalent", "longest run", "from", "mean PI"]
    if tested:
        header += ["p", "q"]
    rows = []
    for i, row in patterns.head(TABLE_PATTERNS).iterrows():
        cells = [
            str(i + 1),
            _name(_roles_text(row["roles"])),
            _num(row.get("time_prevalence")),
            _e(_duration(row.get("prevalent_s"))),
            _e(_duration(row.get("longest_run_s"))),
            _e(_when(row.get("longest_run_start"))),
            _num(row.get("mean_participation_index")),
        ]
        if tested:
            cells += [_num(row.get("p_value")), _num(row.get("q_value"))]
        rows.append(cells)
    numeric = {0, 2, 6, 7, 8}
    if len(patterns) > TABLE_PATTERNS:
        parts.append(f'<p class="muted">The top {TABLE_PATTERNS} of {len(patterns):,} '
                     "durable role sets; all are in patterns.csv.</p>")  # fmt: skip
    parts.append(_table(header, rows, numeric))
    # folders written before the file was renamed hold pi_series.parquet
    name = next((n for n in ("participation_series.parquet", "pi_series.parquet")
                 if res.source.has(n)), None)  # fmt: skip
    if name is None:
        return "\n".join(parts), []
    top = [str(r) for r in patterns["roles"].head(TOP_PATTERNS)]
    columns = ["roles", "time", "participation_index", "prevalent"]
    try:
        series = res.source.parquet(name, columns=columns, filters=[("roles", "in", top)])
    except (InputError, NotImplementedError, TypeError):  # a reader without filter support
        series = res.source.parquet(name, columns=columns)
        series = series[series["roles"].astype(str).isin(top)]
    if series is None or series.empty:
        return "\n".join(parts), []
    threshold = _mine_settings(res).get("min_participation")
    start, end, step = _period(res, series["time"])
    labels = [f"time prevalence {_num(v)}" for v in patterns["time_prevalence"].head(len(top))]
    fig, note = figures.pi_timelines(
        series, top, threshold=threshold, start_ns=start, end_ns=end, step_ns=step,
        labels=labels,
    )  # fmt: skip
    pic = _Picture(
        "patterns_pi",
        figures.to_png(fig),
        "Participation index over time of the leading durable role sets",
        f"Participation index of {_leading(len(top), 'leading durable role set')} over the whole "
        f"period; shaded: prevalent (index at or above the threshold). {note}",
    )
    parts.append(_figure_html(pic))
    return "\n".join(parts), [pic]


def _leading(n: int, noun: str) -> str:
    """Return ``"the 3 longest episodes"`` or ``"the longest episode"``, by ``n``."""
    return f"the {noun}" if n == 1 else f"the {n:,} {noun}s"


def _lonlat(res: _Results, paths: Any) -> bool:
    """Return whether the folder's coordinates are longitude/latitude."""
    for q in res.quality.values():
        coords = q.get("coordinates") or {}
        if coords.get("input"):
            return coords["input"] == "lonlat"
    crs = getattr(paths, "crs", None)
    return bool(crs is not None and crs.is_geographic)


def _top_episodes(episodes: pd.DataFrame, n: int) -> pd.DataFrame:
    """Return the ``n`` longest episodes."""
    return episodes.sort_values(["duration_s", "episode"], ascending=[False, True]).head(n)


def _map_section(res: _Results, max_points: int) -> tuple[str, list[_Picture]]:
    """Return the map of the track sample with the longest episodes' paths."""
    sample = res.source.parquet("track_sample.parquet", columns=["x", "y"])
    stored_every = 1
    if sample is not None:
        stored_every = int(sample.attrs.get("every", 1) or 1)
    paths = coords = geo = None
    if res.episodes is not None and len(res.episodes):
        geo = overall(res.source.geoparquet("episode_paths.parquet"))
    if geo is not None:
        import shapely

        chosen = _top_episodes(res.episodes, MAP_EPISODES)["episode"].astype(str)
        geo = geo.assign(episode=geo["episode"].astype(str)).set_index("episode")
        chosen = [e for e in chosen if e in geo.index]
        paths = geo.loc[chosen].reset_index()[["episode", "members"]]
        coords = [shapely.get_coordinates(g) for g in geo.loc[chosen].geometry]
        lonlat = _lonlat(res, geo)
    else:
        lonlat = _lonlat(res, None)
    if (sample is None or sample.empty) and (paths is None or paths.empty):
        return "", []
    fig, note = figures.track_map(
        sample, paths, lonlat=lonlat, max_points=max_points, stored_every=stored_every,
        path_coords=coords or [],
    )  # fmt: skip
    what = "longitude/latitude, equal-distance aspect" if lonlat else "planar metres"
    drawn = paths is not None and len(paths) > 0
    lines = (f"; coloured lines: centroid paths of {_leading(len(paths), 'longest episode')}, "
             "dot at the start") if drawn else ""  # fmt: skip
    pic = _Picture(
        "track_map",
        figures.to_png(fig),
        "Map of the sampled track positions"
        + (" with the longest episodes' paths" if drawn else ""),
        f"Positions of the results folder's track sample ({what}), grey{lines}. {note}",
    )
    return "<h2>Map of the tracks</h2>\n" + _figure_html(pic), [pic]


def _timeline_section(res: _Results) -> tuple[str, list[_Picture]]:
    """Return the timeline of episodes and a short table of the longest."""
    episodes = res.episodes
    parts = ["<h2>Timeline of episodes</h2>"]
    if episodes is None or episodes.empty:
        parts.append("<p>No episode met the thresholds of this run.</p>")
        return "\n".join(parts), []
    fig, note = figures.episode_timeline(episodes, TIMELINE_EPISODES)
    pic = _Picture(
        "episode_timeline",
        figures.to_png(fig),
        "Timeline of the longest episodes",
        f"One bar per episode from its start to its end (UTC). {note}",
    )
    parts.append(_figure_html(pic))
    rows = []
    for _, row in _top_episodes(episodes, 15).iterrows():
        rows.append([
            _e(row["episode"]), _e(_when(row["start"])), _e(_duration(row["duration_s"])),
            # results written before time together was recorded have no such column
            _e(_duration(row["together_s"])) if "together_s" in row else "",
            _num(row["size"]), _name(_roles_text(row.get("roles", ""))),
            _name(str(row["members"])),
        ])  # fmt: skip
    parts.append("<h3>The longest episodes</h3>")
    parts.append(_table(["episode", "start", "duration", "together", "size", "roles", "members"],
                        rows, {4}))  # fmt: skip
    return "\n".join(parts), [pic]


def _dyad_section(res: _Results) -> tuple[str, list[_Picture]]:
    """Return the dyad association heatmap and the strongest pairs."""
    dyads = res.dyads
    if dyads is None or dyads.empty or "half_weight_index" not in dyads:
        return "", []
    matrix, note = figures.association_matrix(dyads)
    if len(matrix) < 2:
        return "", []
    heatmap, labels = figures.dyad_heatmap(matrix)
    pic = _Picture(
        "dyad_matrix",
        figures.to_png(heatmap),
        "Heatmap of the half-weight association index between objects",
        "Half-weight index of every pair of objects; objects ordered by average-linkage "
        f"clustering on 1 − index, so groups that keep together show as bright blocks. {note} "
        f"{labels}",
    )
    strongest = dyads.sort_values("half_weight_index", ascending=False).head(10)
    rows = [
        [_name(r["object_a"]), _name(r["object_b"]), _num(r["half_weight_index"]),
         _e(_duration(r.get("together_s")))]
        for _, r in strongest.iterrows()
    ]  # fmt: skip
    table = _table(["object a", "object b", "half-weight index", "time together"], rows, {2})
    network, drawn = figures.association_network(dyads)
    web = _Picture(
        "association_network",
        figures.to_png(network),
        "Association network of the most associated objects",
        "Objects placed by a force-directed layout in which pairs pull by their half-weight "
        "index, so objects often together end up close; edge width grows with the index, "
        f"colour: the object's role. {drawn} The whole network is in association.graphml.",
    )
    return (
        "<h2>Dyad association</h2>\n"
        + _figure_html(pic)
        + "<h3>Strongest pairs</h3>"
        + table
        + _figure_html(web),
        [pic, web],
    )


def _leader_section(res: _Results) -> tuple[str, list[_Picture]]:
    """Return who leads whom: the clear leads as bars, and their roll-up by role pair."""
    leaders = res.leaders
    if leaders is None:
        return "", []
    parts = ["<h2>Who leads whom</h2>"]
    clear = leaders[leaders["clear_leader"].astype(bool)] if len(leaders) else leaders
    if clear.empty:
        judged = figures.count_of(len(leaders), "pair")
        parts.append(f"<p>No clear leader among the {_e(judged)} moving together long enough "
                     "(see leadership.csv).</p>")  # fmt: skip
        return "\n".join(parts), []
    fig, note = figures.leadership_bars(leaders)
    pic = _Picture(
        "leadership",
        figures.to_png(fig),
        "Delays of the pairs with a clear leader",
        "Each bar: how long after the leader the follower heads the same way (directional "
        "correlation delay); r: their heading correlation at that delay. A lead says who turns "
        f"first, not who causes the turn. {note}",
    )
    parts.append(_figure_html(pic))
    roles = res.leader_roles
    if roles is not None and len(roles):
        tested = "significant_pairs" in roles.columns
        rows = [[_name(r["leader_role"]), _name(r["follower_role"]), _num(r["pairs"]),
                 _e(_duration(r["median_delay_s"])), _num(r["mean_correlation"])]
                + ([_num(r["significant_pairs"])] if tested else [])
                for _, r in roles.iterrows()]  # fmt: skip
        parts.append("<h3>Leads by role pair</h3>")
        parts.append(_table(["leader's role", "follower's role", "pairs", "median delay",
                             "mean correlation"] + (["significant"] if tested else []), rows,
                            {2, 4, 5}))  # fmt: skip
    return "\n".join(parts), [pic]


def _focal_section(res: _Results) -> tuple[str, list[_Picture]]:
    """Return what surrounds the focal role: bars, and the durable sets as a table."""
    sets, hoods = res.focal, res.neighbourhoods
    if sets is None or hoods is None:
        return "", []
    role = flat_settings(res.runs.get("focal") or {}).get("focal_role", "the focal role")
    parts = [f"<h2>What surrounds {_e(role)}</h2>"]
    if hoods.empty:
        parts.append(f"<p>No object of the role {_e(role)} was present.</p>")
        return "\n".join(parts), []
    hoods = hoods.assign(around=hoods["around"].fillna(""))
    fig, note = figures.focal_bars(sets, hoods)
    pic = _Picture(
        "focal",
        figures.to_png(fig),
        f"Role sets around the objects of {role}",
        f"Left: role sets durably around {role}: bar, the share of the snapshots at which at "
        "least --min-share of its objects have every role of the set among their neighbours "
        "(time prevalence); dot, the mean of that share. Right: how often an object of "
        f"{role} has exactly these roles around it, each object and snapshot counted once. " + note,
    )
    parts.append(_figure_html(pic))
    if sets.empty:
        parts.append("<p>No role set is durably around it at these thresholds.</p>")
        return "\n".join(parts), [pic]
    tested = "p_value" in sets.columns
    rows = []
    for _, r in sets.head(TABLE_PATTERNS).iterrows():
        row = [_roles_text(r["around"]), _num(r["time_prevalence"]), _num(r["mean_share"]),
               _e(_duration(r["longest_run_s"])), _num(r["exact_share"])]  # fmt: skip
        if tested:
            row += [_num(r["p_value"]), _num(r["q_value"])]
        rows.append(row)
    header = ["around", "time prevalence", "mean share", "longest run", "exactly these"]
    parts.append(_table(header + (["p", "q"] if tested else []), rows, {1, 2, 4, 5, 6}))
    return "\n".join(parts), [pic]


#: Most role sets compared across periods and areas.
PART_SETS = 12


def _parts_section(res: _Results) -> tuple[str, list[_Picture]]:
    """Return the comparison of periods and areas: the leading sets' time prevalence per part."""
    if not res.by_part:
        return "", []
    parts = ["<h2>By period and area</h2>",
             "<p class=\"muted\">Each part is analysed on its own entries (an object counts in "
             "an area while inside it; episodes are cut at a period's ends); the sections "
             "above describe the rows over everything (all / all). Blank: not kept there."
             "</p>"]  # fmt: skip
    compared = (
        ("patterns.csv", "roles", "Durable role sets", "durable role sets"),
        ("focal.csv", "around", "Role sets around the focal role",
         "role sets around the focal role"),
    )  # fmt: skip
    pictures = []
    for name, key, title, what in compared:
        table = res.by_part.get(name)
        if table is None or table.empty:
            continue
        label = table["period"].astype(str) + " / " + table["area"].astype(str)
        zones = list(dict.fromkeys(label))
        everything = label == f"{ALL_PARTS} / {ALL_PARTS}"
        shown = list(dict.fromkeys(table.loc[everything, key].astype(str)))[:PART_SETS]
        value = dict(zip(zip(table[key].astype(str), label, strict=True),
                         table["time_prevalence"], strict=True))  # fmt: skip
        parts.append(f"<h3>{_e(title)}: time prevalence in each part</h3>")
        if shown:
            matrix = pd.DataFrame(
                [[value.get((s, z), np.nan) for z in zones] for s in shown],
                index=[s.replace(";", ", ") for s in shown],
                columns=zones,
            )
            fig, note = figures.part_heatmap(matrix, what)
            pic = _Picture(f"parts_{key}", figures.to_png(fig),
                           f"{title}: time prevalence in each period and area",
                           f"Rows: the leading {what} over everything (all / all); columns: "
                           f"the parts. {note}")  # fmt: skip
            parts.append(_figure_html(pic))
            pictures.append(pic)
        rows = [[_roles_text(s)] + [_num(value[(s, z)]) if (s, z) in value else ""
                                    for z in zones] for s in shown]  # fmt: skip
        parts.append(_table(["role set", *zones], rows, set(range(1, len(zones) + 1))))
    episodes = res.by_part.get("episodes.csv")
    if episodes is not None:
        label = episodes["period"].astype(str) + " / " + episodes["area"].astype(str)
        rows = [[_e(z), _num(int((label == z).sum())),
                 _e(_duration(episodes.loc[label == z, "together_s"].sum()))]
                for z in dict.fromkeys(label)]  # fmt: skip
        parts.append("<h3>Episodes in each part</h3>")
        parts.append(_table(["period / area", "episodes", "time together, summed"], rows, {1}))
    return "\n".join(parts), pictures


def _cross_section(res: _Results) -> tuple[str, list[_Picture]]:
    """Return the cross-L curves of the top role pairs."""
    cross = res.cross_k
    if cross is None or cross.empty or not np.isfinite(cross["l_minus_r_m"]).any():
        return "", []
    cross = cross[np.isfinite(cross["l_minus_r_m"])]
    fig, pairs = figures.cross_l_curves(cross, CROSS_PAIRS)
    band = ("band: pointwise null envelope." if {"null_low_m", "null_high_m"} <= set(cross.columns)
            else "no envelope: no tests were run (--replicates 0).")  # fmt: skip
    pic = _Picture(
        "cross_l",
        figures.to_png(fig),
        "Cross-L curves of the role pairs that depart most from independence",
        f"L(r) − r of {_leading(len(pairs), 'role pair')} with the largest departure; above 0: "
        f"closer than independent placement; {band}",
    )
    return "<h2>Cross-L curves of role pairs</h2>\n" + _figure_html(pic), [pic]


def _sweep_section(res: _Results) -> tuple[str, list[_Picture]]:
    """Return the sweep over radii and thresholds: curves, and role sets kept per grid point."""
    sweep = res.sweep
    parts = ["<h2>Role sets over a grid of radii and thresholds</h2>"]
    if sweep is None or sweep.empty:
        parts.append("<p>No role set was prevalent at any point of the grid.</p>")
        return "\n".join(parts), []
    settings = flat_settings(res.runs.get("sweep") or {})
    fig, note = figures.sweep_curves(sweep, settings.get("min_prevalence"))
    pic = _Picture(
        "sweep_curves",
        figures.to_png(fig),
        "Time prevalence against radius of the leading role sets, per participation threshold",
        "Time prevalence of the leading role sets at each radius of the grid, one panel per "
        "participation threshold; dashed: the least time prevalence a durable role set needs. "
        + note,
    )
    parts.append(_figure_html(pic))
    kept = sweep[sweep["kept"].astype(bool)]
    counts = kept.groupby(["radius_m", "min_participation"]).size()
    # every grid point of the run, also those where no role set was prevalent
    radii = settings.get("radius") or sorted(sweep["radius_m"].unique())
    levels = settings.get("min_participation") or sorted(sweep["min_participation"].unique())
    rows = [[_num(r), _num(m), _num(counts.get((float(r), float(m)), 0))]
            for r in radii for m in levels]  # fmt: skip
    parts.append("<h3>Durable role sets at each grid point</h3>")
    parts.append(_table(["radius (m)", "participation threshold", "durable role sets"], rows,
                        {0, 1, 2}))  # fmt: skip
    return "\n".join(parts), [pic]


# ---------------------------------------------------------------- assembly


def _page(title: str, body: str) -> str:
    """Return the whole HTML page."""
    return (
        '<!DOCTYPE html>\n<html lang="en"><head><meta charset="utf-8">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>{_e(title)}</title><style>{_CSS}</style></head>\n<body>\n"
        f"<h1>{_e(title)}</h1>\n{body}\n</body></html>\n"
    )


def build_report(folder: str | os.PathLike, *, max_points: int = 50_000) -> Path:
    """Write ``report.html`` and ``figures/*.png`` for a results folder and return the report.

    Parameters
    ----------
    folder : path
        A folder written by ``comove mine`` and/or ``comove groups`` (merged
        folders give one report of both).
    max_points : int, default 50_000
        Most track positions drawn on the map; the folder's track sample is
        thinned evenly to this for drawing.

    Returns
    -------
    Path
        ``folder/report.html``.

    Raises
    ------
    InputError
        When ``folder`` does not exist or holds neither ``patterns.csv`` nor
        ``episodes.csv``, or when one of its files cannot be read.

    Notes
    -----
    Sections, each only when its data exist: the run (input, settings,
    versions, data quality and the caution); the durable role sets, ranked, with
    participation-index timelines; a map of the tracks with the longest
    episodes' paths; a timeline of episodes; the dyad association matrix;
    cross-L curves with envelopes. The page is one self-contained file (PNG
    data URIs, inline CSS, no scripts); every text from the data is
    HTML-escaped. The folder is locked while the report is built, and the
    page and figures are written through :func:`comove.io.results.claim`: staged
    under temporary names and renamed into place, figures first, so a failure
    leaves the previous report (or none), never half of one. Only the report's
    own files are replaced: anything else in ``figures/`` is kept.
    """
    source = open_results(folder)
    owned = (PAGE, *(f"figures/{name}.png" for name in FIGURE_NAMES))  # older comove's report
    with claim(source.path, command=REPORT, owned=owned) as held:
        page, pictures = _assemble(_load(source), max_points)
        files = {f"figures/{pic.name}.png": bytes_writer(pic.png.data) for pic in pictures}
        files[PAGE] = text_writer(page)
        held.commit(files)
    return source.path / PAGE


def _assemble(res: _Results, max_points: int) -> tuple[str, list[_Picture]]:
    """Return the report's page and its figures."""
    body = [_run_section(res)]
    pictures: list[_Picture] = []
    builders: list[Any] = []
    if res.patterns is not None:
        builders.append(lambda: _patterns_section(res))
    if res.source.has("track_sample.parquet") or res.source.has("episode_paths.parquet"):
        builders.append(lambda: _map_section(res, max_points))
    if res.episodes is not None:
        builders.append(lambda: _timeline_section(res))
    builders += [
        lambda: _dyad_section(res),
        lambda: _leader_section(res),
        lambda: _focal_section(res),
        lambda: _parts_section(res),
        lambda: _cross_section(res),
    ]
    if res.sweep is not None:
        builders.append(lambda: _sweep_section(res))
    for build in builders:
        html_part, pics = build()
        if html_part:
            body.append(html_part)
            pictures += pics
    commands = " and ".join(f"comove {c}" for c in res.runs) or "comove"
    title = f"Results of {commands}: {res.source.path.resolve().name}"
    return _page(title, "\n".join(body)), pictures

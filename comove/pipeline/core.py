"""The jobs end to end: raw tracks in, durable role sets or co-moving groups out.

Stages run forward, each a plain function of the previous stage's output::

    read_tracks -> clean_fixes -> align -> neighbour_pairs
        -> mine_levels -> durable_patterns                       (mine)
        -> entry_motion -> linked_pairs -> snapshot_groups
           -> find_episodes -> episode_table, role_rollup;
           dyad_table                                            (groups)

:func:`mine` and :func:`groups` run them and return a :class:`MiningResult` or
:class:`GroupsResult`, whose ``write`` stores a results folder.
"""

from __future__ import annotations

import os
import warnings
from collections.abc import Callable, Iterator
from concurrent.futures import Future, ThreadPoolExecutor
from contextlib import contextmanager
from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import Any

import pandas as pd

from comove.errors import ComoveNote, bad_setting
from comove.groups.chain import GroupTally, group_chain
from comove.groups.dyads import DyadParams, dyads_and_objects
from comove.groups.episodes import EpisodeParams
from comove.groups.grouping import GroupParams
from comove.groups.leadership import (
    LeadBlocks,
    LeadershipParams,
    lead_rollup,
    leadership,
    tested_leadership,
)
from comove.groups.presets import preset_subject, preset_values
from comove.groups.summary import episode_paths, episode_table, role_rollup
from comove.io.projection import working_to_input
from comove.io.provenance import input_digest, run_record, settings_record
from comove.io.reading import ColumnSpec, read_tracks
from comove.io.results import (
    CAUTION,
    caution_for,
    csv_writer,
    geojson_writer,
    geoparquet_writer,
    graphml_writer,
    json_writer,
    overall,
    parquet_writer,
    write_folder,
)
from comove.io.runfile import current_names
from comove.pipeline.windows import (
    group_windows,
    mine_windows,
    windowed_tracks,
    windows_at_once,
)
from comove.roles.chain import role_chain
from comove.roles.colocation import ColocationParams
from comove.roles.crossk import CrossKParams
from comove.roles.persistence import PersistenceParams, durable_patterns
from comove.stats.engine import RunParams
from comove.stats.significance import (
    TEST_COLUMNS,
    SignificanceParams,
    cross_k_tests,
    group_tests,
    lead_tests,
    pattern_tests,
)
from comove.tracks.alignment import (
    AlignParams,
    Snapshots,
    align,
    alignment_summary,
    fix_extents,
    sample_every,
    track_sample,
)
from comove.tracks.cleaning import CleanParams, clean_fixes
from comove.tracks.motion import Motion
from comove.tracks.neighbours import NeighbourPairs
from comove.tracks.streaming import WindowParams, plan_windows
from comove.tracks.zones import Zone, ZoneParams, plan_zones

#: The stage settings of ``mine``, in pipeline order; the periods and areas the
#: results are split by come last (:mod:`comove.tracks.zones`).
MINE_STAGES: tuple[type, ...] = (
    ColumnSpec, CleanParams, AlignParams, ColocationParams, PersistenceParams, SignificanceParams,
    CrossKParams, WindowParams, RunParams, ZoneParams,
)  # fmt: skip

#: The stage settings of ``groups``, in pipeline order (periods and areas last).
GROUP_STAGES: tuple[type, ...] = (
    ColumnSpec, CleanParams, AlignParams, GroupParams, EpisodeParams, DyadParams,
    LeadershipParams, SignificanceParams, WindowParams, RunParams, ZoneParams,
)  # fmt: skip


def split_options(stages: tuple[type, ...], options: dict[str, Any]) -> list[Any]:
    """Return one settings object per stage built from flat keyword ``options``.

    Raises
    ------
    TypeError
        When an option belongs to no stage.

    Notes
    -----
    A setting given by a former name (a stage's ``FORMER_NAMES``) is read as
    the new one, with a :class:`~comove.errors.RenamedSetting` note.
    """
    options = current_names(options, stages)
    known: dict[str, type] = {}
    for stage in stages:
        for f in fields(stage):
            known.setdefault(f.name, stage)
    unknown = sorted(set(options) - set(known))
    if unknown:
        raise TypeError(f"unknown option(s): {', '.join(unknown)}")
    return [stage(**{k: v for k, v in options.items() if known[k] is stage}) for stage in stages]


class _Progress:
    """A stage progress bar that can be switched off."""

    def __init__(self, enabled: bool, total: int) -> None:
        self.bar = None
        if enabled:
            from tqdm.auto import tqdm  # imported when used: it costs start-up time

            # disable=None: shown on a terminal only, so logs and pipes get no bar debris
            self.bar = tqdm(total=total, disable=None, unit="stage", leave=False)

    @contextmanager
    def stage(self, name: str) -> Iterator[None]:
        if self.bar is not None:
            self.bar.set_description(name)
        yield
        if self.bar is not None:
            self.bar.update(1)

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()


def folder_files(
    sample: Any,
    tables: dict[str, Callable],
    quality: dict,
    run: dict,
    optional: dict[str, pd.DataFrame | None] | None = None,
) -> dict[str, Callable]:
    """Return the writers of a command's results folder, in the order they are written.

    The track sample, the command's own ``tables`` (name -> writer), its
    quality and run records, then each ``optional`` table that was computed
    (None: left out).
    """
    files = {"track_sample.parquet": parquet_writer(sample), **tables,
             "quality.json": json_writer(quality), "run.json": json_writer(run)}  # fmt: skip
    files.update({name: csv_writer(t) for name, t in (optional or {}).items() if t is not None})
    return files


@dataclass
class MiningResult:
    """Durable role sets and everything needed to trust them.

    Attributes
    ----------
    patterns : DataFrame
        One row per kept role set; see :func:`comove.roles.persistence.durable_patterns`.
    participation : DataFrame
        Mean participation ratio of each role of each kept set.
    series : DataFrame
        Participation index of each kept set at each snapshot where all its
        roles are present.
    quality : dict
        What was read, dropped and why, and how the tracks were aligned.
    run : dict
        Settings, versions and input digest (the content of ``run.json``).
    snapshots : Snapshots
        The aligned tracks, for further analysis. A run over time windows
        keeps only their names, step and span (no entries).
    tests : DataFrame or None
        Monte Carlo tests of every role set with a prevalent snapshot (see
        :func:`comove.stats.significance.pattern_tests`); None when not run.
    cross_k : DataFrame or None
        Cross-K/L per role pair and radius with pointwise envelopes (see
        :func:`comove.stats.significance.cross_k_tests`); None when not asked for.
    """

    patterns: pd.DataFrame
    participation: pd.DataFrame
    series: pd.DataFrame
    quality: dict
    run: dict
    snapshots: Snapshots = field(repr=False)
    tests: pd.DataFrame | None = None
    cross_k: pd.DataFrame | None = None
    sample: Any = field(default=None, repr=False)

    def write(
        self, out_dir: str | os.PathLike[str], force: bool = False, merge: bool = False
    ) -> Path:
        """Write the results folder atomically and return its path.

        Files: ``patterns.csv``, ``participation.csv``, ``participation_series.parquet``,
        ``track_sample.parquet`` (thinned positions for maps),
        ``quality.json``, ``run.json``, ``significance.csv`` (every role set
        tested) when significance tests ran, and ``cross_k.csv`` when asked for.
        """
        tables = {
            "patterns.csv": csv_writer(self.patterns),
            "participation.csv": csv_writer(self.participation),
            "participation_series.parquet": parquet_writer(self.series),
        }
        files = folder_files(
            self.sample,
            tables,
            self.quality,
            self.run,
            {"significance.csv": self.tests, "cross_k.csv": self.cross_k},
        )
        return write_folder(out_dir, files, force=force, merge="mine" if merge else None)


def mine(source: Any, *, progress: bool = False, **options: Any) -> MiningResult:
    """Return the durable role sets of the tracks in ``source``.

    Parameters
    ----------
    source : path, glob, list of paths, DataFrame, GeoDataFrame or TrajectoryCollection
        The tracks; see :func:`comove.io.reading.read_tracks`.
    progress : bool, default False
        Show a progress bar over the stages.
    **options
        Any field of :class:`~comove.io.reading.ColumnSpec`,
        :class:`~comove.tracks.cleaning.CleanParams`,
        :class:`~comove.tracks.alignment.AlignParams`,
        :class:`~comove.roles.colocation.ColocationParams` (``radius`` is required)
        or :class:`~comove.roles.persistence.PersistenceParams`.

    Returns
    -------
    MiningResult

    Examples
    --------
    >>> import pandas as pd
    >>> tracks = pd.DataFrame({
    ...     "id": ["a", "a", "b", "b"], "time": [0, 10, 0, 10],
    ...     "x": [0.0, 10.0, 1.0, 11.0], "y": [0.0, 0.0, 0.0, 0.0],
    ...     "role": ["dog", "dog", "owner", "owner"]})
    >>> result = mine(tracks, radius=2.0, step=1.0)
    >>> result.patterns[["roles", "time_prevalence"]].to_dict("records")
    [{'roles': 'dog;owner', 'time_prevalence': 1.0}]
    """
    stages = split_options(MINE_STAGES, options)
    columns, cleaning, alignment, colocation, persistence, significance, k_params = stages[:7]
    window_params, run_params, zone_params = stages[7], stages[8].resolved(), stages[9]
    plan = _plan(source, columns, window_params, run_params, significance, k_params)
    bar = _Progress(progress, total=7)
    digest = _digest_beside(source)
    try:
        snaps, quality, sample, found = _over_zones(
            source, stages, plan, run_params, bar, progress,
            windowed=lambda run: _mine_windowed(run, colocation, persistence),
            whole=lambda zone, seen: _mine_snaps(seen, stages, run_params, _bar_of(zone, bar),
                                                 progress),
        )  # fmt: skip
        parts = [(zone, mined) for zone, _, mined in found]
    finally:
        bar.close()
    settings = settings_record(columns, cleaning, _effective(snaps), *stages[3:8], run_params,
                               zone_params)  # fmt: skip
    run = run_record("mine", source, settings, extra={"caution": CAUTION, **_windows_note(plan)},
                     digest=digest.result())  # fmt: skip
    mined = [_Mined(*(zoned_table(zone, getattr(m, f.name), zone_params.split)
                      for f in fields(_Mined))) for zone, m in parts]  # fmt: skip
    tables = [joined_tables([getattr(m, f.name) for m in mined]) for f in fields(_Mined)]
    return MiningResult(*tables[:3], quality, run, snaps, *tables[3:], sample)


@dataclass
class _Mined:
    """What ``mine`` finds on the snapshots of one zone (or of the whole run)."""

    patterns: pd.DataFrame
    participation: pd.DataFrame
    series: pd.DataFrame
    tests: pd.DataFrame | None = None
    cross_k: pd.DataFrame | None = None


def _mine_snaps(snaps: Snapshots, stages: list, run_params: RunParams, bar: _Progress,
                progress: bool) -> _Mined:  # fmt: skip
    """Return the durable role sets of ``snaps``, with their tests and cross-K when asked for."""
    colocation, persistence, significance, k_params = stages[3:7]
    with bar.stage("co-location"):
        tally = role_chain(snaps, colocation,
                           min_prevalent_snapshots=persistence.min_prevalent_snapshots(snaps.step_s),
                           workers=run_params.threads)  # fmt: skip
    with bar.stage("persistence"):
        tables = durable_patterns(tally, persistence, colocation.min_participation)
    found = _Mined(tables.patterns, tables.participation, tables.series)
    if significance.replicates > 0:
        with bar.stage("significance"):
            found.tests = pattern_tests(snaps, tally, colocation, significance, run_params,
                                        progress)  # fmt: skip
            found.patterns = found.patterns.merge(
                found.tests[["roles", *TEST_COLUMNS]], on="roles", how="left", validate="1:1"
            )
    if k_params.k_radii is not None:
        with bar.stage("cross-K"):
            found.cross_k = cross_k_tests(snaps, k_params, significance, run_params, progress)
    return found


def zoned_table(zone: Zone, table: Any, split: bool) -> Any:
    """Return ``table`` with the zone's ``period`` and ``area`` as its first columns.

    Unchanged when results are not split by period or area (``split`` false),
    or when there is no table.
    """
    if table is None or not split:
        return table
    table = table.copy()
    table.insert(0, "period", pd.Series([zone.period] * len(table), index=table.index,
                                        dtype=object))  # fmt: skip
    table.insert(1, "area", pd.Series([zone.area] * len(table), index=table.index, dtype=object))
    return table


def joined_tables(tables: list[Any]) -> Any:
    """Return the zones' tables one after the other (None when none exists)."""
    present = [t for t in tables if t is not None]
    if len(present) <= 1:
        return present[0] if present else None
    joined = pd.concat(present, ignore_index=True)
    for column, dtype in present[0].dtypes.items():  # categories differ between zones
        if isinstance(dtype, pd.CategoricalDtype):
            joined[column] = joined[column].astype("category")
    return joined


def _plan(
    source: Any,
    columns: ColumnSpec,
    window_params: WindowParams,
    run_params: RunParams,
    significance: SignificanceParams,
    k_params: CrossKParams | None = None,
) -> tuple[int, int | None] | None:
    """Return the windows a run is cut into (bucket ns, most rows), or None for one piece.

    Significance tests and cross-K read the whole period at once: with them an
    explicit ``chunk`` is refused, and ``auto`` keeps the run in one piece.
    """
    tested = significance.replicates > 0 or (k_params is not None and k_params.k_radii)
    if tested:
        if window_params.chunk_ns() is not None:
            raise bad_setting(
                "chunk",
                "cannot be used with significance tests or cross-K yet: they read the whole "
                "period at once; give --replicates 0 (and no --k-radii), or leave --chunk out",
            )
        if str(window_params.chunk).strip().lower() == "auto":
            if plan_windows(source, columns, window_params)[0] is not None:
                warnings.warn(
                    "the input needs more memory in one piece than this run plans to use, but "
                    "significance tests and cross-K read the whole period at once, so it runs "
                    "in one piece; give --replicates 0 (and no --k-radii) to run it in time "
                    "windows (docs/long-inputs.md)",
                    ComoveNote,
                    stacklevel=3,
                )
        return None
    bucket, max_rows = plan_windows(source, columns, window_params,
                                    at_once=windows_at_once(run_params))  # fmt: skip
    return None if bucket is None else (bucket, max_rows)


def _windows_note(plan: tuple[int, int | None] | None) -> dict:
    """Return what run.json records of the windows a run was cut into."""
    if plan is None:
        return {"windows": None}
    return {"windows": {"bucket_s": plan[0] / 1e9, "max_rows": plan[1]}}


def _mine_windowed(run: Any, colocation: Any, persistence: PersistenceParams) -> _Mined:
    """Return the durable role sets of one zone of a run over time windows."""
    tally = mine_windows(run, colocation, persistence.min_prevalent_snapshots(run.shell.step_s))
    tables = durable_patterns(tally, persistence, colocation.min_participation)
    return _Mined(tables.patterns, tables.participation, tables.series)


def _over_zones(
    source: Any,
    stages: list,
    plan: tuple[int, int | None] | None,
    run_params: RunParams,
    bar: _Progress,
    progress: bool,
    windowed: Callable[[Any], Any],
    whole: Callable[[Zone, Snapshots], Any],
) -> tuple[Snapshots, dict, Any, list[tuple[Zone, Snapshots, Any]]]:
    """Return the snapshots, quality, track sample, and what a command found in each zone.

    The first three stages are the columns, cleaning and alignment; the
    windows' and zones' settings are found among the rest by their types.
    Over time windows (``plan``), ``windowed(run)`` finds a zone's part on
    its windows (``Windowed.zoned``) and the snapshots are the windows' shell;
    in one piece, ``whole(zone, snaps)`` finds it on the zone's own
    snapshots (``Zone.apply``). Zone ``all``/``all`` comes first.
    """
    columns, cleaning, alignment = stages[:3]
    window_params = next(s for s in stages if isinstance(s, WindowParams))
    zone_params = next(s for s in stages if isinstance(s, ZoneParams))
    if plan is not None:
        with windowed_tracks(source, columns, cleaning, alignment, plan, window_params.scratch,
                             run_params, progress) as run:  # fmt: skip
            zones = plan_zones(zone_params, run.shell, columns.time_zone)
            found = [(zone, run.shell, windowed(run.zoned(zone, n)))
                     for n, zone in enumerate(zones)]  # fmt: skip
            return run.shell, run.quality(), run.sample(), found
    snaps, quality, sample = _aligned(source, columns, cleaning, alignment, bar,
                                      run_params.threads)  # fmt: skip
    found = []
    for zone in plan_zones(zone_params, snaps, columns.time_zone):
        seen = zone.apply(snaps)
        found.append((zone, seen, whole(zone, seen)))
    return snaps, quality, sample, found


def _digest_beside(source: Any) -> Future[str]:
    """Return the future digest of ``source``, taken in a helper thread while the stages run.

    Reading and hashing the input files mostly waits on the disk or runs in
    hashlib, which releases the interpreter lock over large blocks.
    """
    helper = ThreadPoolExecutor(max_workers=1)
    digest = helper.submit(input_digest, source)
    helper.shutdown(wait=False)  # its thread ends once the digest is taken
    return digest


def _sample(snaps: Snapshots, every: int) -> Any:
    """Return a writer's source of the thinned positions a results folder keeps for maps."""
    return lambda: track_sample(snaps, lambda x, y: working_to_input(snaps, x, y), every=every)


def _aligned(
    source: Any,
    columns: ColumnSpec,
    cleaning: CleanParams,
    alignment: AlignParams,
    bar: _Progress,
    workers: int = 1,
) -> tuple[Snapshots, dict, Any]:
    """Return the aligned snapshots of ``source``, its quality report and its track sample.

    The sample is a function that draws it when a results folder is written.
    """
    with bar.stage("reading"):
        raw = read_tracks(source, columns)
    with bar.stage("cleaning"):
        fixes, quality = clean_fixes(raw, cleaning, workers)
    with bar.stage("aligning"):
        snaps = align(fixes, alignment)
        quality["alignment"] = alignment_summary(snaps)
    every = sample_every(*fix_extents(fixes), snaps.step_ns)
    return snaps, quality, _sample(snaps, every)


def _effective(snaps: Snapshots) -> AlignParams:
    """Return the alignment settings actually used (defaults resolved)."""
    return AlignParams(step=snaps.step_s, max_gap=snaps.max_gap_ns / 1e9)


@dataclass
class _Grouped:
    """The tables ``groups`` gives of one zone (or of the whole run), and its episodes' paths.

    :class:`GroupsResult` is these and the run's records.
    """

    episodes: pd.DataFrame
    roles: pd.DataFrame
    dyads: pd.DataFrame
    objects: pd.DataFrame
    leaders: pd.DataFrame
    leader_roles: pd.DataFrame
    paths: Any
    display_paths: Any
    centroids: list = field(repr=False)


@dataclass
class GroupsResult(_Grouped):
    """Co-moving groups of objects: episodes, their role roll-up, and dyads.

    Attributes
    ----------
    episodes : DataFrame
        One row per maximal episode; see :func:`comove.groups.summary.episode_table`.
    roles : DataFrame
        Per role set of episodes: count, total and longest time.
    dyads : DataFrame
        One row per pair of objects with shared presence; see
        :func:`comove.groups.dyads.dyad_table`.
    objects : DataFrame
        One row per object present: its main role and time present
        (:func:`comove.groups.dyads.object_rows`); with the dyads, the
        association network.
    leaders, leader_roles : DataFrame
        Who leads whom: the directional correlation delay of every pair that
        moves together long enough, and its roll-up by role pair
        (:func:`comove.groups.leadership.leadership_tables`).
    paths : GeoDataFrame
        The centroid path of each episode as a LineString, in the input's CRS
        (lon/lat input gives lon/lat paths; planar input has no CRS), one
        vertex per snapshot.
    display_paths : GeoDataFrame
        The same paths thinned to about one vertex per second for viewing
        (written as GeoJSON); see :func:`comove.groups.summary.episode_paths`.
    centroids : list of ndarray
        Each episode's centroid path, row for row with ``episodes``: time (ns),
        x and y in the working plane.
    quality, run : dict
        As in :class:`MiningResult`.
    snapshots : Snapshots
        The aligned tracks (a run over time windows keeps only their names,
        step and span).
    """

    quality: dict
    run: dict
    snapshots: Snapshots = field(repr=False)
    sample: Any = field(default=None, repr=False)

    def write(
        self, out_dir: str | os.PathLike[str], force: bool = False, merge: bool = False
    ) -> Path:
        """Write the results folder atomically and return its path.

        Files: ``episodes.csv``, ``episode_roles.csv``, ``dyads.csv``,
        ``association.graphml`` (objects as nodes, dyads as edges, every
        column an attribute) and ``association_edges.csv`` (source, target,
        half-weight index as weight), ``leadership.csv`` and
        ``leadership_roles.csv`` (who leads whom), ``track_sample.parquet``
        (thinned positions for maps),
        ``episode_paths.parquet`` (GeoParquet, every snapshot),
        ``episode_paths.geojson`` (thinned for viewing),
        ``quality.json`` and ``run.json``.
        """
        tables = {
            "episodes.csv": csv_writer(self.episodes),
            "episode_roles.csv": csv_writer(self.roles),
            "dyads.csv": csv_writer(self.dyads),
            "association.graphml": graphml_writer(
                overall(self.objects), "object", overall(self.dyads), "object_a", "object_b"
            ),
            "association_edges.csv": csv_writer(association_edges(self.dyads)),
            "leadership.csv": csv_writer(self.leaders),
            "leadership_roles.csv": csv_writer(self.leader_roles),
            "episode_paths.parquet": geoparquet_writer(self.paths),
            "episode_paths.geojson": geojson_writer(self.display_paths),
        }
        files = folder_files(self.sample, tables, self.quality, self.run)
        return write_folder(out_dir, files, force=force, merge="groups" if merge else None)

    def to_trajectories(self) -> Any:
        """Return the episode centroid paths as a movingpandas ``TrajectoryCollection``.

        With periods or areas, an episode's trajectory id is ``period/area/episode``.
        """
        import geopandas as gpd
        import movingpandas as mpd

        frames = []
        for (_, row), path in zip(self.episodes.iterrows(), self.centroids, strict=True):
            x, y = working_to_input(self.snapshots, path[:, 1], path[:, 2])
            name = row["episode"]
            if "period" in row:
                name = f"{row['period']}/{row['area']}/{name}"
            frames.append(pd.DataFrame({
                "episode": name,
                "time": pd.to_datetime(path[:, 0].astype("int64"), utc=True).tz_localize(None),
                "x": x, "y": y,
            }))  # fmt: skip
        points = (
            pd.concat(frames, ignore_index=True)
            if frames
            else pd.DataFrame(columns=["episode", "time", "x", "y"])
        )
        gdf = gpd.GeoDataFrame(
            points, geometry=gpd.points_from_xy(points["x"], points["y"]),
            crs=self.paths.crs,
        )  # fmt: skip
        return mpd.TrajectoryCollection(gdf, "episode", t="time")


def groups(
    source: Any, *, preset: str | None = None, progress: bool = False, **options: Any
) -> GroupsResult:
    """Return the co-moving groups (episodes) and dyads of the tracks in ``source``.

    Parameters
    ----------
    source : path, glob, list of paths, DataFrame, GeoDataFrame or TrajectoryCollection
        The tracks; see :func:`comove.io.reading.read_tracks`. A role column is
        optional here.
    preset : str, optional
        Name of a preset of defaults (see :mod:`comove.groups.presets`); options given
        explicitly override it.
    progress : bool, default False
        Show a progress bar over the stages.
    **options
        Any field of :class:`~comove.io.reading.ColumnSpec`,
        :class:`~comove.tracks.cleaning.CleanParams`,
        :class:`~comove.tracks.alignment.AlignParams`,
        :class:`~comove.groups.grouping.GroupParams` (``radius`` is required unless a
        preset gives it) or :class:`~comove.groups.episodes.EpisodeParams`.

    Returns
    -------
    GroupsResult
    """
    merged = preset_values(preset)
    merged.update(options)  # an explicit None (a predicate switched off) overrides too
    merged.setdefault("require_role", False)
    if merged.get("radius") is None:
        raise bad_setting("radius", "is required: give it in metres, or a preset that sets one")
    stages = split_options(GROUP_STAGES, merged)
    columns, cleaning, alignment = stages[:3]
    significance, window_params, zone_params = stages[7], stages[8], stages[10]
    run_params = stages[9].resolved()
    plan = _plan(source, columns, window_params, run_params, significance)
    bar = _Progress(progress, total=6 if significance.replicates > 0 else 5)
    digest = _digest_beside(source)

    def observed(zone: Zone, seen: Snapshots) -> _Found:
        with _bar_of(zone, bar).stage("groups, episodes, dyads and leaders"):
            return _observed_groups(seen, stages, run_params)

    try:
        snaps, quality, sample, found = _over_zones(
            source, stages, plan, run_params, bar, progress,
            windowed=lambda run: _groups_windowed(run, stages), whole=observed,
        )  # fmt: skip
        parts = [(zone, _group_tables(seen, one, stages, run_params, _bar_of(zone, bar), progress))
                 for zone, seen, one in found]  # fmt: skip
    finally:
        bar.close()
    settings = settings_record(columns, cleaning, _effective(snaps), *stages[3:9], run_params,
                               zone_params)  # fmt: skip
    run = run_record("groups", source, settings,
                     extra={"preset": preset, "caution": caution_for(preset_subject(preset)),
                            **_windows_note(plan)},
                     digest=digest.result())  # fmt: skip
    tables = {f.name: joined_tables([zoned_table(zone, getattr(g, f.name), zone_params.split)
                                     for zone, g in parts])
              for f in fields(_Grouped) if f.name != "centroids"}  # fmt: skip
    centroids = [c for _, g in parts for c in g.centroids]
    return GroupsResult(**tables, quality=quality, run=run, snapshots=snaps, centroids=centroids,
                        sample=sample)  # fmt: skip


def _bar_of(zone: Zone, bar: _Progress) -> _Progress:
    """Return the run's progress bar for the whole run, and a silent one for each zone."""
    return bar if zone.everything else _Progress(False, 0)


def _group_tables(snaps: Snapshots, found: _Found, stages: list, run_params: RunParams,
                  bar: _Progress, progress: bool) -> _Grouped:  # fmt: skip
    """Return the tables of what ``groups`` found on ``snaps``: paths, roll-up, tests."""
    grouping, episode_params = stages[3:5]
    significance = stages[7]
    with bar.stage("paths"):
        paths, display = episode_paths(snaps, found.table, found.centroids)
    roles, dyads, leaders = role_rollup(found.table), found.dyads, found.leaders
    leader_roles = found.leader_roles
    if significance.replicates > 0:
        with bar.stage("significance"):
            pair_tests, role_tests = group_tests(
                snaps, found.tally, dyads, found.table["roles"], grouping, episode_params,
                significance, run_params, progress,
            )  # fmt: skip
            leaders = lead_tests(found.lead_blocks, leaders, snaps, significance,
                                 run_params.seed)  # fmt: skip
            leader_roles = lead_rollup(leaders)
        if pair_tests is not None:
            dyads = dyads.merge(pair_tests, on=["object_a", "object_b"], how="left",
                                validate="1:1")  # fmt: skip
        roles = roles.merge(role_tests.drop(columns=["episodes", "together_s"]), on="roles",
                            how="left", validate="1:1")  # fmt: skip
    return _Grouped(found.table, roles, dyads, found.objects, leaders, leader_roles, paths,
                    display, found.centroids)  # fmt: skip


def association_edges(dyads: pd.DataFrame) -> pd.DataFrame:
    """Return the dyads as an edge list for network tools: ``source``, ``target``, ``weight``.

    The weight is the half-weight index; every index is in ``dyads.csv`` and
    ``association.graphml``.
    """
    zones = [c for c in ("period", "area") if c in dyads.columns]
    return pd.DataFrame({**{c: dyads[c] for c in zones}, "source": dyads["object_a"],
                         "target": dyads["object_b"],
                         "weight": dyads["half_weight_index"]})  # fmt: skip


def _groups_windowed(run: Any, stages: list) -> _Found:
    """Return what ``groups`` finds in one zone of a run over time windows, before the tests."""
    found = group_windows(run, *stages[3:7])
    return _Found(found.table, found.centroids, found.dyads, found.objects, *found.leaders)


@dataclass
class _Found:
    """What ``groups`` finds before the tests: episodes, dyads, objects and leaders."""

    table: pd.DataFrame
    centroids: list
    dyads: pd.DataFrame
    objects: pd.DataFrame
    leaders: pd.DataFrame
    leader_roles: pd.DataFrame
    lead_blocks: LeadBlocks | None = None
    tally: GroupTally | None = None


def _observed_groups(snaps: Snapshots, stages: list, run_params: RunParams) -> _Found:
    """Return the episode table and paths, the dyads, objects and leaders, and the chain's tally.

    The dyads and then the leaders (whole-array numpy, which releases the
    interpreter lock) are counted in a helper thread while the episodes (mostly
    Python) are searched: all only read the snapshots, pairs and velocities, so
    the results are those of one after the other.
    """
    grouping, episode_params, dyad_params, lead_params = stages[3:7]
    tested = stages[7].replicates > 0  # the leads' tests need their sums per block of time
    with ThreadPoolExecutor(max_workers=1) as side:
        counting: list[Future] = []

        def count_dyads(pairs: NeighbourPairs, motion: Motion) -> None:
            counting.append(side.submit(dyads_and_objects, snaps, pairs, dyad_params))
            lead = tested_leadership if tested else leadership
            counting.append(side.submit(lead, snaps, motion, pairs, grouping.min_speed,
                                        lead_params))  # fmt: skip

        tally = group_chain(snaps, grouping, episode_params, workers=run_params.threads,
                            before_search=count_dyads)  # fmt: skip
        table, centroids = episode_table(snaps, tally.episodes, tally.motion, grouping.min_speed,
                                         workers=run_params.threads)  # fmt: skip
        dyads, leaders = (done.result() for done in counting)
        return _Found(table, centroids, *dyads, *leaders, tally=tally)

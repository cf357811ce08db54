"""What surrounds one role: raw tracks in, the role sets around its objects out.

Stages run forward, each a plain function of the previous stage's output::

    read_tracks -> clean_fixes -> align -> neighbours_of (from the focal entries)
        -> focal_chain -> surrounding_sets -> focal_tables       (focal)

:func:`focal` runs them and returns a :class:`FocalResult`, whose ``write``
stores a results folder.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pandas as pd

from comove.io.reading import ColumnSpec
from comove.io.results import CAUTION, csv_writer, parquet_writer, write_folder
from comove.pipeline.core import (
    _bar_of,
    _digest_beside,
    _effective,
    _over_zones,
    _plan,
    _Progress,
    _windows_note,
    folder_files,
    joined_tables,
    split_options,
    zoned_table,
)
from comove.pipeline.windows import focal_windows
from comove.roles.focal import FocalParams, FocalTally, focal_chain, focal_tables, surrounding_sets
from comove.roles.persistence import PersistenceParams
from comove.stats.engine import RunParams
from comove.stats.significance import TEST_COLUMNS, SignificanceParams, focal_tests
from comove.tracks.alignment import AlignParams, Snapshots
from comove.tracks.cleaning import CleanParams
from comove.tracks.streaming import WindowParams
from comove.tracks.zones import Zone, ZoneParams

#: The stage settings of ``focal``, in pipeline order.
FOCAL_STAGES: tuple[type, ...] = (
    ColumnSpec, CleanParams, AlignParams, FocalParams, PersistenceParams, SignificanceParams,
    WindowParams, RunParams, ZoneParams,
)  # fmt: skip


@dataclass
class FocalResult:
    """What surrounds the focal role, and everything needed to trust it.

    Attributes
    ----------
    sets : DataFrame
        One row per kept role set around the focal role; see
        :func:`comove.roles.focal.focal_tables`. With tests, their columns too.
    neighbourhoods : DataFrame
        Every exact neighbourhood of the focal role's objects and its share.
    series : DataFrame
        The share of each kept set at each snapshot where it could surround.
    quality, run : dict
        As for :class:`comove.pipeline.core.MiningResult`.
    snapshots : Snapshots
        The aligned tracks (a run over time windows keeps only their names,
        step and span).
    tests : DataFrame or None
        Monte Carlo tests of every set that surrounds the focal role at a
        snapshot (:func:`comove.stats.significance.focal_tests`); None when
        not run.
    """

    sets: pd.DataFrame
    neighbourhoods: pd.DataFrame
    series: pd.DataFrame
    quality: dict
    run: dict
    snapshots: Snapshots = field(repr=False)
    tests: pd.DataFrame | None = None
    sample: Any = field(default=None, repr=False)

    def write(
        self, out_dir: str | os.PathLike[str], force: bool = False, merge: bool = False
    ) -> Path:
        """Write the results folder atomically and return its path.

        Files: ``focal.csv``, ``focal_neighbourhoods.csv``,
        ``focal_series.parquet``, ``track_sample.parquet``, ``quality.json``,
        ``run.json``, and ``focal_significance.csv`` when tests ran.
        """
        tables = {
            "focal.csv": csv_writer(self.sets),
            "focal_neighbourhoods.csv": csv_writer(self.neighbourhoods),
            "focal_series.parquet": parquet_writer(self.series),
        }
        files = folder_files(
            self.sample, tables, self.quality, self.run, {"focal_significance.csv": self.tests}
        )
        return write_folder(out_dir, files, force=force, merge="focal" if merge else None)


def focal(source: Any, *, progress: bool = False, **options: Any) -> FocalResult:
    """Return the role sets that surround the objects of one role, and how durably.

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
        :class:`~comove.roles.focal.FocalParams` (``focal_role`` and
        ``radius`` are required),
        :class:`~comove.roles.persistence.PersistenceParams`,
        :class:`~comove.stats.significance.SignificanceParams`,
        :class:`~comove.tracks.streaming.WindowParams` or
        :class:`~comove.stats.engine.RunParams`.

    Returns
    -------
    FocalResult

    Examples
    --------
    >>> import pandas as pd
    >>> tracks = pd.DataFrame({
    ...     "id": ["c", "c", "m", "m", "y", "y"], "time": [0, 10, 0, 10, 0, 10],
    ...     "x": [0.0, 10.0, 1.0, 11.0, 50.0, 10.5], "y": [0.0] * 6,
    ...     "role": ["calf", "calf", "mother", "mother", "yearling", "yearling"]})
    >>> result = focal(tracks, focal_role="calf", radius=2.0, step=10.0)
    >>> print(result.sets[["around", "time_prevalence", "exact_share"]].to_string(index=False))
             around  time_prevalence  exact_share
             mother              1.0          0.5
           yearling              0.5          0.0
    mother;yearling              0.5          0.5
    """
    from comove.io.provenance import run_record, settings_record

    stages = split_options(FOCAL_STAGES, options)
    columns, cleaning, alignment, params = stages[:4]
    significance, window_params, zone_params = stages[5], stages[6], stages[8]
    run_params = stages[7].resolved()
    plan = _plan(source, columns, window_params, run_params, significance)
    bar = _Progress(progress, total=6)
    digest = _digest_beside(source)

    def surroundings(zone: Zone, seen: Snapshots) -> FocalTally:
        with _bar_of(zone, bar).stage("surroundings"):
            return focal_chain(seen, params, workers=run_params.threads)

    try:
        snaps, quality, sample, found = _over_zones(
            source, stages, plan, run_params, bar, progress,
            windowed=lambda run: focal_windows(run, params), whole=surroundings,
        )  # fmt: skip
        parts = [(zone, _focal_tables(seen, tally, stages, run_params, _bar_of(zone, bar),
                                      progress)) for zone, seen, tally in found]  # fmt: skip
    finally:
        bar.close()
    settings = settings_record(columns, cleaning, _effective(snaps), *stages[3:7], run_params,
                               zone_params)  # fmt: skip
    run = run_record("focal", source, settings, extra={"caution": CAUTION, **_windows_note(plan)},
                     digest=digest.result())  # fmt: skip
    sets, hoods, series, tests = (
        joined_tables([zoned_table(zone, part[k], zone_params.split) for zone, part in parts])
        for k in range(4)
    )
    return FocalResult(sets, hoods, series, quality, run, snaps, tests, sample)


def _focal_tables(snaps: Snapshots, tally: FocalTally, stages: list, run_params: RunParams,
                  bar: Any, progress: bool) -> tuple:  # fmt: skip
    """Return the kept sets, neighbourhoods, series and tests of one zone's neighbourhoods."""
    params, persistence, significance = stages[3:6]
    tested = significance.replicates > 0
    with bar.stage("persistence"):
        # with tests, every set seen surrounding (the family) is grown; the kept ones are
        # the same, since a kept set has at least the bound's prevalent snapshots
        bound = 1 if tested else persistence.min_prevalent_snapshots(snaps.step_s)
        levels = surrounding_sets(tally, params, bound)
        tables = focal_tables(tally, levels, params, persistence)
    sets, tests = tables.sets, None
    if tested:
        with bar.stage("significance"):
            tests = focal_tests(snaps, tally, levels, params, significance, run_params, progress)
        sets = sets.merge(tests[["around", *TEST_COLUMNS]], on="around", how="left",
                          validate="1:1")  # fmt: skip
    return sets, tables.neighbourhoods, tables.series, tests

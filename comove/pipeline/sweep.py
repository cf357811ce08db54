"""Choosing thresholds: the miner over a grid of radii and participation thresholds.

The tracks are read, cleaned and aligned once; the neighbour pairs are found
once, at the largest radius, with their distances, and every smaller radius
takes the pairs within it from that one search (a pair within r is within
every larger radius). The grid points then run in worker processes that
receive the aligned snapshots and pairs once.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from comove.errors import bad_setting
from comove.io.reading import ColumnSpec
from comove.io.results import csv_writer, flat_settings, json_writer, write_folder
from comove.io.runfile import as_grid
from comove.roles.chain import role_chain
from comove.roles.colocation import RATIO_EPS, ColocationParams
from comove.roles.persistence import PersistenceParams, role_label
from comove.stats.engine import RunParams
from comove.tracks.alignment import AlignParams, Snapshots, longest_runs
from comove.tracks.cleaning import CleanParams
from comove.tracks.neighbours import NeighbourPairs, neighbour_pairs

SWEEP_COLUMNS = [
    "radius_m", "min_participation", "roles", "size", "time_prevalence", "prevalent_s",
    "longest_run_s", "kept",
]  # fmt: skip


@dataclass(frozen=True)
class SweepParams:
    """The grid of a sweep.

    Parameters
    ----------
    radius : tuple of float
        Neighbour distances in metres. Text is read as ``start:stop:step``
        (stop included) or ``r1,r2,...``; one number is a grid of one.
    min_participation : tuple of float, default (0.5,)
        Participation-index thresholds, given like ``radius``.
    max_size : int, default 3
        Largest role set mined.
    """

    radius: tuple[float, ...] = field(
        default=(),
        metadata={
            "help": "neighbour distances in metres: start:stop:step (stop included) or r1,r2,..."
        },  # fmt: skip
    )
    min_participation: tuple[float, ...] = field(
        default=(0.5,),
        metadata={"help": "participation thresholds: start:stop:step (stop included) or p1,p2,..."},
    )
    max_size: int = field(default=3, metadata={"help": "largest role set mined"})

    def __post_init__(self) -> None:
        for name in ("radius", "min_participation"):
            object.__setattr__(self, name, as_grid(getattr(self, name), name))
        if not self.radius:
            raise bad_setting("radius", "is required: give the radii of the sweep")
        for r in self.radius:
            ColocationParams(radius=r, max_size=self.max_size)  # validates each value
        for m in self.min_participation:
            ColocationParams(radius=1.0, min_participation=m)


#: The settings of a sweep: the stages it runs, its grid, and how the run is carried out.
SWEEP_STAGES: tuple[type, ...] = (
    ColumnSpec, CleanParams, AlignParams, PersistenceParams, SweepParams, RunParams,
)  # fmt: skip


@dataclass(frozen=True)
class _SweepInputs:
    """What every grid point reads: the snapshots and the pairs at the largest radius."""

    snaps: Snapshots
    pairs: NeighbourPairs
    distance: np.ndarray
    persistence: PersistenceParams
    max_size: int


def _grid_point(shared: _SweepInputs, point: tuple[float, float]) -> pd.DataFrame:
    """Return the sweep rows of one (radius, min_participation) grid point."""
    radius, min_participation = point
    snaps, pairs, distance = shared.snaps, shared.pairs, shared.distance
    persistence, max_size = shared.persistence, shared.max_size
    within = distance <= radius
    subset = NeighbourPairs(pairs.i[within], pairs.j[within], float(radius))
    params = ColocationParams(radius=radius, min_participation=min_participation,
                              max_size=max_size)  # fmt: skip
    tally = role_chain(snaps, params, min_prevalent_snapshots=1, pairs=subset)
    rows = []
    for level in tally.levels:
        with np.errstate(invalid="ignore", divide="ignore"):
            prevalence = level.prevalent / np.maximum(level.present, 1)
        kept = persistence.keeps(level.prevalent, level.present, snaps.step_s)
        longest = _longest_runs(level, min_participation)
        for s in np.flatnonzero(level.prevalent >= 1):  # per role set seen prevalent
            rows.append((radius, min_participation, role_label(level.roles[s], snaps.roles),
                         level.size, float(prevalence[s]),
                         float(level.prevalent[s] * snaps.step_s),
                         float(longest[s] * snaps.step_s), bool(kept[s])))  # fmt: skip
    return pd.DataFrame(rows, columns=SWEEP_COLUMNS)


def _longest_runs(level, min_participation: float) -> np.ndarray:

    is_prev = level.pi >= min_participation - RATIO_EPS
    longest, _ = longest_runs(level.set_id[is_prev], level.snap[is_prev], level.roles.shape[0])
    return longest


@dataclass
class SweepResult:
    """Role sets over a grid of radii and thresholds.

    Attributes
    ----------
    table : DataFrame
        One row per (radius, min_participation, role set with a prevalent
        snapshot): ``time_prevalence``, ``prevalent_s``,
        ``longest_run_s`` and ``kept`` (meets the persistence
        thresholds there).
    quality, run : dict
        As for ``comove mine``.
    """

    table: pd.DataFrame
    quality: dict
    run: dict

    def plot(self) -> Any:
        """Return a matplotlib Figure of time prevalence against radius, one panel per threshold.

        Drawn as the report draws it (:func:`comove.present.figures.sweep_curves`).
        """
        from comove.present.figures import sweep_curves

        return sweep_curves(self.table, flat_settings(self.run).get("min_prevalence"))[0]

    def write(self, out_dir: str | os.PathLike[str], force: bool = False) -> Path:
        """Write ``sweep.csv``, ``sweep.png``, ``quality.json`` and ``run.json`` atomically."""

        def write_png(path: Path) -> None:
            from comove.present.figures import to_png

            path.write_bytes(to_png(self.plot()).data)

        return write_folder(
            out_dir,
            {
                "sweep.csv": csv_writer(self.table),
                "sweep.png": write_png,
                "quality.json": json_writer(self.quality),
                "run.json": json_writer(self.run),
            },
            force=force,
        )


def sweep(source: Any, *, progress: bool = False, **options: Any) -> SweepResult:
    """Return the role sets mined at every point of a grid of radii and thresholds.

    Parameters
    ----------
    source : path, glob, list, DataFrame, GeoDataFrame or TrajectoryCollection
        The tracks, as for :func:`comove.pipeline.core.mine`.
    progress : bool, default False
        Show a progress bar.
    **options
        Fields of :class:`SweepParams` (the grid: ``radius`` is required),
        ColumnSpec, CleanParams, AlignParams, PersistenceParams and
        :class:`~comove.stats.engine.RunParams`.

    Returns
    -------
    SweepResult
        At each radius the results equal those of a separate ``mine`` run.
    """
    from comove.io.provenance import run_record, settings_record
    from comove.pipeline.core import CAUTION, _aligned, _effective, _Progress, split_options

    columns, cleaning, alignment, persistence, params, run_params = split_options(
        SWEEP_STAGES, options
    )
    bar = _Progress(progress, total=4)
    try:
        snaps, quality, _ = _aligned(source, columns, cleaning, alignment, bar, run_params.threads)
        with bar.stage("neighbour search"):
            pairs = neighbour_pairs(snaps, max(params.radius), workers=run_params.threads)
            dx, dy = snaps.x[pairs.i] - snaps.x[pairs.j], snaps.y[pairs.i] - snaps.y[pairs.j]
            distance = np.sqrt(dx * dx + dy * dy)
    finally:
        bar.close()
    grid = [(r, m) for m in params.min_participation for r in params.radius]
    shared = _SweepInputs(snaps, pairs, distance, persistence, params.max_size)
    parts = run_params.make_engine().map(
        _grid_point, grid, shared=shared, work_size=snaps.n_entries * len(grid),
        progress=progress, label="sweep",
    )  # fmt: skip
    table = pd.concat(parts, ignore_index=True) if parts else pd.DataFrame(columns=SWEEP_COLUMNS)
    run = run_record(
        "sweep", source,
        settings_record(columns, cleaning, _effective(snaps), persistence,
                        params, run_params),
        extra={"caution": CAUTION},
    )  # fmt: skip
    return SweepResult(table, quality, run)

"""The main job end to end: raw tracks in, durable role co-location patterns out.

Stages run forward, each a plain function of the previous stage's output::

    read_tracks -> clean_fixes -> align -> neighbour_pairs -> mine_levels
                -> durable_patterns

:func:`mine` runs them all and returns a :class:`MiningResult`;
:meth:`MiningResult.write` stores it as a results folder.
"""

from __future__ import annotations

import os
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import Any

import pandas as pd
from tqdm.auto import tqdm

from comove.alignment import AlignParams, Snapshots, align, alignment_summary
from comove.cleaning import CleanParams, clean_fixes
from comove.colocation import ColocationParams, RolePresence, mine_levels
from comove.neighbours import neighbour_pairs
from comove.persistence import PersistenceParams, durable_patterns
from comove.provenance import run_record, settings_record
from comove.reading import ColumnSpec, read_tracks
from comove.results import csv_writer, json_writer, parquet_writer, write_folder

#: The stage settings of ``mine``, in pipeline order.
MINE_STAGES: tuple[type, ...] = (
    ColumnSpec, CleanParams, AlignParams, ColocationParams, PersistenceParams,
)  # fmt: skip

CAUTION = (
    "Positions of tracked people are personal data; co-location is association, "
    "not interaction or cause; results are for analysis, not for real-time safety decisions."
)


def split_options(stages: tuple[type, ...], options: dict[str, Any]) -> list[Any]:
    """Return one settings object per stage built from flat keyword ``options``.

    Raises
    ------
    TypeError
        When an option belongs to no stage.
    """
    known: dict[str, type] = {}
    for stage in stages:
        for f in fields(stage):
            known.setdefault(f.name, stage)
    unknown = sorted(set(options) - set(known))
    if unknown:
        raise TypeError(f"unknown option(s): {', '.join(unknown)}")
    return [
        stage(**{k: v for k, v in options.items() if known[k] is stage and v is not None})
        for stage in stages
    ]


class _Progress:
    """A stage progress bar that can be switched off."""

    def __init__(self, enabled: bool, total: int) -> None:
        # disable=None: shown on a terminal only, so logs and pipes get no bar debris
        self.bar = tqdm(total=total, disable=None if enabled else True, unit="stage", leave=False)

    @contextmanager
    def stage(self, name: str) -> Iterator[None]:
        self.bar.set_description(name)
        yield
        self.bar.update(1)

    def close(self) -> None:
        self.bar.close()


@dataclass
class MiningResult:
    """Durable role co-location patterns and everything needed to trust them.

    Attributes
    ----------
    patterns : DataFrame
        One row per kept role set; see :func:`comove.persistence.durable_patterns`.
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
        The aligned tracks, for further analysis.
    """

    patterns: pd.DataFrame
    participation: pd.DataFrame
    series: pd.DataFrame
    quality: dict
    run: dict
    snapshots: Snapshots = field(repr=False)

    def write(self, out_dir: str | os.PathLike[str], force: bool = False) -> Path:
        """Write the results folder atomically and return its path.

        Files: ``patterns.csv``, ``participation.csv``, ``pi_series.parquet``,
        ``quality.json`` and ``run.json``.
        """
        return write_folder(
            out_dir,
            {
                "patterns.csv": csv_writer(self.patterns),
                "participation.csv": csv_writer(self.participation),
                "pi_series.parquet": parquet_writer(self.series),
                "quality.json": json_writer(self.quality),
                "run.json": json_writer(self.run),
            },
            force=force,
        )


def mine(source: Any, *, progress: bool = False, **options: Any) -> MiningResult:
    """Return the durable role co-location patterns of the tracks in ``source``.

    Parameters
    ----------
    source : path, glob, list of paths, DataFrame, GeoDataFrame or TrajectoryCollection
        The tracks; see :func:`comove.reading.read_tracks`.
    progress : bool, default False
        Show a progress bar over the stages.
    **options
        Any field of :class:`~comove.reading.ColumnSpec`,
        :class:`~comove.cleaning.CleanParams`,
        :class:`~comove.alignment.AlignParams`,
        :class:`~comove.colocation.ColocationParams` (``radius`` is required)
        or :class:`~comove.persistence.PersistenceParams`.

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
    columns, cleaning, alignment, colocation, persistence = split_options(MINE_STAGES, options)
    bar = _Progress(progress, total=6)
    try:
        with bar.stage("reading"):
            raw = read_tracks(source, columns)
        with bar.stage("cleaning"):
            fixes, quality = clean_fixes(raw, cleaning)
        with bar.stage("aligning"):
            snaps = align(fixes, alignment)
            quality["alignment"] = alignment_summary(snaps)
        with bar.stage("neighbour search"):
            pairs = neighbour_pairs(snaps, colocation.radius)
        with bar.stage("co-location"):
            presence = RolePresence(snaps)
            levels = mine_levels(
                snaps,
                pairs,
                colocation,
                min_prevalent_snapshots=persistence.min_prevalent_snapshots(snaps.step_s),
                presence=presence,
            )
        with bar.stage("persistence"):
            tables = durable_patterns(
                levels, snaps, persistence, colocation.min_participation, presence
            )
    finally:
        bar.close()
    effective_alignment = AlignParams(step=snaps.step_s, max_gap=snaps.max_gap_ns / 1e9)
    run = run_record(
        "mine",
        source,
        settings_record(columns, cleaning, effective_alignment, colocation, persistence),
        extra={"caution": CAUTION},
    )
    return MiningResult(tables.patterns, tables.participation, tables.series, quality, run, snaps)

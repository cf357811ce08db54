"""``mine`` and ``groups`` over time windows: each window in memory in turn, the tallies joined.

The tracks are read once into buckets of time, cleaned and aligned window by
window (:mod:`comove.tracks.streaming`); the role chain, and the group chain's
two passes, run on each window with the context they need, and their tallies
join exactly (DEVELOPERS.md, "The chains"). Results equal those of the whole
period held in memory, whatever the windows; the tests compare them table by
table.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
import pandas as pd

from comove.groups.chain import (
    chunk_dyads,
    chunk_episode_rows,
    chunk_timeline_and_keys,
)
from comove.groups.dyads import DyadParams, DyadTally, TrackSamples, dyad_rows, expected_distances
from comove.groups.episodes import EpisodeParams, Episodes, find_episodes
from comove.groups.grouping import GroupParams, GroupTimeline
from comove.groups.summary import EpisodeRows, episode_table
from comove.io.projection import working_to_input
from comove.io.reading import ColumnSpec
from comove.roles.chain import RoleTally, combine_role_tallies, prune_levels, role_chain
from comove.roles.colocation import ColocationParams
from comove.tracks.alignment import NS_PER_S, AlignParams, Snapshots, sample_every, track_sample
from comove.tracks.cleaning import CleanParams
from comove.tracks.motion import half_window_snapshots
from comove.tracks.streaming import Cleaned, release_memory, spill_tracks


@dataclass
class Windowed:
    """A run's tracks, cleaned in a scratch folder, to be aligned window by window.

    Attributes
    ----------
    cleaned : Cleaned
        The cleaned fixes and the quality report.
    windows : list of (int, int)
        Runs of buckets, in time order.
    span : (int, int)
        Grid indices of the run's first and last snapshot.
    shell : Snapshots
        The whole run's names, step, CRSs and snapshot span, without entries.
    sample_every : int
        Stride of the track sample (:func:`~comove.tracks.alignment.sample_every`).
    """

    cleaned: Cleaned
    windows: list[tuple[int, int]]
    span: tuple[int, int]
    shell: Snapshots
    sample_every: int
    counts: np.ndarray = field(init=False)
    samples: list[pd.DataFrame] = field(init=False, default_factory=list)

    def __post_init__(self) -> None:
        self.counts = np.zeros(len(self.cleaned.objects), dtype=np.int64)

    def each(
        self, context: int = 0, label: str | None = None, keep: bool = False
    ) -> Iterator[tuple[Snapshots, int, int]]:
        """Yield each window's snapshots with ``context`` more on each side, and its own range.

        The range ``start, stop`` indexes the window's own snapshots within the
        yielded ones, as the chunk functions of the chains take it. With a
        ``label``, a progress bar follows the windows. With ``keep``, the
        aligned windows are kept in the scratch folder, and a later pass with
        the same context reads them instead of aligning again.
        """
        for i, window in enumerate(_bar(self.windows, label)):
            g0, g1 = self.cleaned.bucket_grid(window, self.span)
            path = self.cleaned.spill.folder / f"aligned-{context}-{i}.npz"
            if path.exists():
                outer = self._load(path)
            else:
                outer = self.cleaned.window(window, context, self.span)
                if keep:
                    np.savez(path, first_index=outer.first_index, n_snapshots=outer.n_snapshots,
                             snap=outer.snap, obj=outer.obj, role=outer.role, x=outer.x,
                             y=outer.y)  # fmt: skip
            start = g0 - outer.first_index
            yield outer, start, start + (g1 - g0)
            del outer
            release_memory()

    def _load(self, path) -> Snapshots:
        with np.load(path) as data:
            return replace(
                self.shell, first_index=int(data["first_index"]),
                n_snapshots=int(data["n_snapshots"]), snap=data["snap"], obj=data["obj"],
                role=data["role"], x=data["x"], y=data["y"],
            )  # fmt: skip

    def count(self, chunk: Snapshots) -> None:
        """Count a window's entries per object and take its part of the track sample."""
        self.counts += np.bincount(chunk.obj, minlength=self.counts.size)
        to_input = lambda x, y: working_to_input(chunk, x, y)  # noqa: E731
        self.samples.append(track_sample(chunk, to_input, every=self.sample_every))

    def sample(self) -> pd.DataFrame:
        """Return the track sample of every window counted."""
        frame = pd.concat(self.samples, ignore_index=True)
        frame.attrs["every"] = self.sample_every
        return frame

    def quality(self) -> dict:
        """Return the quality report, with the alignment's facts (once every window is counted)."""
        snaps, entries = self.shell, int(self.counts.sum())
        alignment = {
            "step_s": snaps.step_s,
            "max_gap_s": snaps.max_gap_ns / NS_PER_S,
            "snapshots": snaps.n_snapshots,
            "entries": entries,
            "mean_objects_per_snapshot": float(entries / max(snaps.n_snapshots, 1)),
            "objects_never_present": int((self.counts == 0).sum()),
        }
        return dict(self.cleaned.quality, alignment=alignment)


@contextmanager
def windowed_tracks(
    source: Any,
    columns: ColumnSpec,
    cleaning: CleanParams,
    alignment: AlignParams,
    plan: tuple[int, int | None],
    scratch: str | None = None,
    workers: int = 1,
    progress: bool = False,
) -> Iterator[Windowed]:
    """Read and clean the tracks into a scratch folder; remove it when the run ends.

    ``plan`` is the bucket length (ns) and the most rows per window
    (:func:`comove.tracks.streaming.plan_windows`); ``workers`` the threads of
    the stages that use threads (-1: one per core); ``progress`` shows a bar
    over the windows while they are cleaned.
    """
    bucket_ns, max_rows = plan
    spill = spill_tracks(source, columns, int(bucket_ns), scratch)
    try:
        windows = spill.windows(max_rows)
        cleaned = spill.clean(cleaning, alignment, windows, workers, progress)
        span = cleaned.grid_span()
        empty = cleaned.window((windows[0][0], windows[0][0]))
        shell = replace(empty, first_index=span[0], n_snapshots=span[1] - span[0] + 1)
        every = sample_every(cleaned.first_ns, cleaned.last_ns, cleaned.step_ns)
        yield Windowed(cleaned, windows, span, shell, every)
    finally:
        spill.remove()


def _bar(items: list, label: str | None) -> Iterable:
    if not label:
        return items
    from tqdm.auto import tqdm

    return tqdm(items, disable=None, unit="window", leave=False, desc=label)


def mine_windows(
    run: Windowed,
    colocation: ColocationParams,
    min_prevalent_snapshots: int,
    workers: int = 1,
    label: str | None = None,
) -> RoleTally:
    """Return the role chain's tally of the whole run, mined window by window.

    Each window is mined without pruning; the tallies joined are pruned with
    the whole period's bound, as :func:`comove.roles.chain.role_chain` mines it in one piece.
    """
    tallies = []
    for outer, start, stop in run.each(0, label):
        chunk = outer.window(start, stop)
        run.count(chunk)
        tallies.append(role_chain(chunk, colocation, workers=workers))
    return prune_levels(combine_role_tallies(tallies), min_prevalent_snapshots)


@dataclass
class WindowedGroups:
    """The episodes, episode table and centroid paths, and dyads of a run over windows."""

    episodes: Episodes
    table: pd.DataFrame
    centroids: list
    dyads: pd.DataFrame


def group_windows(
    run: Windowed,
    grouping: GroupParams,
    episode_params: EpisodeParams,
    dyad_params: DyadParams,
    workers: int = 1,
    label: str | None = None,
) -> WindowedGroups:
    """Return the episodes, episode table and dyads of the whole run, window by window.

    Pass one: each window's group timeline (with the velocity window's context
    on each side), the pairs ever together, and each object's entries; the
    timelines joined give the episodes. Pass two: each window's episode rows,
    the dyad counts of those pairs and the positions De reads. With
    ``dyad_pairs="co-present"`` the pairs are known only after pass two, and
    a third pass reads De's positions.
    """
    reach = half_window_snapshots(grouping.velocity_window, run.shell.step_s)
    together = dyad_params.dyad_pairs == "together"
    timelines, keys = [], []
    for outer, start, stop in run.each(reach, label and f"{label} (1/2)", keep=True):
        run.count(outer.window(start, stop))
        timeline, found = chunk_timeline_and_keys(outer, start, stop, grouping, workers, together)
        timelines.append(timeline)
        keys.append(found)
    episodes = find_episodes(GroupTimeline.joined(timelines), episode_params)
    del timelines
    pair_keys = np.unique(np.concatenate(keys)) if together else None
    cap, n = dyad_params.max_expected_pairs, run.counts.size
    needed = (
        TrackSamples.needed(pair_keys // n, pair_keys % n, run.counts, cap)
        if pair_keys is not None
        else None
    )
    rows: EpisodeRows | None = None
    tally: DyadTally | None = None
    gathered = []
    before = np.zeros_like(run.counts)

    def gather(chunk: Snapshots, needed: np.ndarray) -> None:
        """Take a window's positions De reads; windows come in time order."""
        gathered.append(TrackSamples.gather(chunk, before, needed))
        before[:] += np.bincount(chunk.obj, minlength=n)

    for outer, start, stop in run.each(reach, label and f"{label} (2/2)"):
        offset = outer.first_index + start - run.span[0]
        part = chunk_episode_rows(outer, start, stop, episodes, grouping, workers, offset)
        rows = part if rows is None else rows.then(part)
        counted = chunk_dyads(outer, start, stop, grouping.radius, pair_keys, workers)
        tally = counted if tally is None else tally.then(counted)
        if needed is not None:
            gather(outer.window(start, stop), needed)
    assert rows is not None and tally is not None
    if needed is None:  # co-present pairs: known only now
        needed = TrackSamples.needed(*tally.pairs(), run.counts, cap)
        for outer, start, stop in run.each(0, label and f"{label} (De)"):
            gather(outer.window(start, stop), needed)
    expected = expected_distances(TrackSamples.joined(run.counts, gathered), tally, cap)
    table, centroids = episode_table(run.shell, episodes, None, grouping.min_speed, rows=rows)
    return WindowedGroups(episodes, table, centroids, dyad_rows(tally, run.shell, expected, cap))

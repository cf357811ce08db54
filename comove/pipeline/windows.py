"""``mine``, ``groups`` and ``focal`` over time windows: each window in turn, tallies joined.

The tracks are read once into buckets of time, cleaned and aligned window by
window (:mod:`comove.tracks.streaming`); the role chain, and the group chain's
two passes, run on each window with the context they need, and their tallies
join exactly (DEVELOPERS.md, "The chains"). Results equal those of the whole
period held in memory, whatever the windows; the tests compare them table by
table.
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from contextlib import AbstractContextManager, ExitStack, contextmanager, nullcontext
from dataclasses import dataclass, field, replace
from functools import reduce
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from comove.errors import bad_setting
from comove.groups.chain import (
    chunk_dyads,
    chunk_episode_rows,
    chunk_lead_tally,
    chunk_timeline_and_keys,
    link_reach,
)
from comove.groups.dyads import (
    DyadParams,
    DyadTally,
    TrackSamples,
    dyad_rows,
    expected_distances,
    object_rows,
)
from comove.groups.episodes import EpisodeParams, Episodes, find_episodes
from comove.groups.grouping import GroupParams, GroupTimeline
from comove.groups.leadership import LeadershipParams, LeadTally, leadership_tables
from comove.groups.summary import EpisodeRows, episode_table
from comove.io.projection import working_to_input
from comove.io.reading import ColumnSpec
from comove.roles.chain import RoleTally, combine_role_tallies, prune_levels, role_chain
from comove.roles.colocation import ColocationParams
from comove.roles.focal import FocalParams, FocalTally, focal_chain
from comove.stats.engine import LocalEngine, RunParams, resolve_jobs
from comove.tracks.alignment import NS_PER_S, AlignParams, Snapshots, sample_every, track_sample
from comove.tracks.cleaning import CleanParams
from comove.tracks.motion import half_window_snapshots
from comove.tracks.neighbours import NeighbourPairs
from comove.tracks.streaming import Cleaned, release_memory, spill_tracks
from comove.tracks.zones import Zone


@dataclass
class Windowed:
    """A run's tracks, cleaned in a scratch folder, to be aligned window by window.

    The windows are the tasks of an engine (:class:`comove.stats.engine.Engine`):
    each task aligns its window from the scratch folder where the engine runs
    it, and returns what the chains tallied there; the tallies join in time
    order. A ``Windowed`` travels to the engine's workers as the tasks' shared
    input (without its engine).

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
    engine : Engine
        What runs the windows.
    threads : int
        Threads of each window's threaded stages (-1: one per core).
    progress : bool
        Show a progress bar over the windows.
    """

    cleaned: Cleaned
    windows: list[tuple[int, int]]
    span: tuple[int, int]
    shell: Snapshots
    sample_every: int
    engine: Any = None
    threads: int = 1
    progress: bool = False
    zone: Zone | None = None
    zone_index: int = 0
    counts: np.ndarray = field(init=False)
    samples: list[pd.DataFrame] = field(init=False, default_factory=list)

    def __post_init__(self) -> None:
        self.counts = np.zeros(len(self.cleaned.objects), dtype=np.int64)

    def __getstate__(self) -> dict:
        # what a task needs: not the engine, nor what the windows counted
        return {**self.__dict__, "engine": None, "samples": []}

    def zoned(self, zone: Zone, index: int) -> Windowed:
        """Return the run seen through ``zone`` (``index``: its place among the run's zones).

        Each window keeps only the zone's entries; the aligned windows the
        scratch folder keeps are shared, the neighbour pairs are the zone's own.
        ``all``/``all`` returns the run itself.
        """
        if zone.everything:
            return self
        return replace(self, zone=zone, zone_index=index)

    def map(self, work: Any, shared: Any, label: str, tasks: list | None = None) -> list:
        """Return ``[work((self, shared), task)]`` for each window, run by the engine.

        The tasks are the windows' indices unless ``tasks`` are given (one per window).
        """
        with self.started(work, shared, label, tasks) as results:
            return results()

    def started(
        self, work: Any, shared: Any, label: str, tasks: list | None = None
    ) -> AbstractContextManager[Callable[[], list]]:
        """Start :meth:`map`'s tasks; the context gives a function that waits for their results.

        This process can go on with work that needs none of them meanwhile
        (:meth:`comove.stats.engine.LocalEngine.started`).
        """
        todo = list(range(len(self.windows))) if tasks is None else tasks
        if self.engine is None:
            return nullcontext(lambda: [work((self, shared), task) for task in todo])
        return self.engine.started(work, todo, shared=(self, shared), progress=self.progress,
                                   label=label)  # fmt: skip

    def outer(self, i: int, context: int = 0, keep: bool = False) -> tuple[Snapshots, int, int]:
        """Return window ``i``'s snapshots with ``context`` more on each side, and its own range.

        The range ``start, stop`` indexes the window's own snapshots within the
        returned ones, as the chunk functions of the chains take it. With
        ``keep``, the aligned window is kept in the scratch folder, and a later
        call with the same context reads it instead of aligning again.
        """
        folder = self.cleaned.spill.folder
        if not folder.is_dir():
            raise bad_setting("scratch", f"folder {folder} is not visible where this window "
                              "runs; give --scratch a folder every worker shares")  # fmt: skip
        window = self.windows[i]
        g0, g1 = self.cleaned.bucket_grid(window, self.span)
        path = folder / f"aligned-{context}-{i}.npz"
        if path.exists():
            outer = self._load(path)
        else:
            outer = self.cleaned.window(window, context, self.span)
            if keep:
                np.savez(path, first_index=outer.first_index, n_snapshots=outer.n_snapshots,
                         snap=outer.snap, obj=outer.obj, role=outer.role, x=outer.x,
                         y=outer.y)  # fmt: skip
        if self.zone is not None:
            outer = self.zone.apply(outer)
        start = g0 - outer.first_index
        return outer, start, start + (g1 - g0)

    def keep_pairs(self, i: int, pairs: NeighbourPairs) -> None:
        """Keep window ``i``'s own neighbour pairs in the scratch folder, for a later pass."""
        small = np.int32 if pairs.j.size == 0 or pairs.j[-1] < 2**31 else np.int64
        np.savez(self._pairs_path(i), i=pairs.i.astype(small),
                 j=pairs.j.astype(small), radius=pairs.radius)  # fmt: skip

    def kept_pairs(self, i: int, radius: float) -> NeighbourPairs | None:
        """Return window ``i``'s neighbour pairs within ``radius`` if a pass kept them."""
        path = self._pairs_path(i)
        if not path.exists():
            return None
        with np.load(path) as data:
            if float(data["radius"]) != radius:
                return None
            return NeighbourPairs(data["i"].astype(np.int64), data["j"].astype(np.int64), radius)

    def _pairs_path(self, i: int) -> Path:
        """Return where window ``i``'s neighbour pairs (of this zone's entries) are kept."""
        return self.cleaned.spill.folder / f"pairs-{self.zone_index}-{i}.npz"

    def _load(self, path) -> Snapshots:
        with np.load(path) as data:
            return replace(
                self.shell, first_index=int(data["first_index"]),
                n_snapshots=int(data["n_snapshots"]), snap=data["snap"], obj=data["obj"],
                role=data["role"], x=data["x"], y=data["y"],
            )  # fmt: skip

    def counted(self, chunk: Snapshots) -> tuple[np.ndarray, pd.DataFrame]:
        """Return a window's entries per object and its part of the track sample."""
        counts = np.bincount(chunk.obj, minlength=len(self.cleaned.objects))
        to_input = lambda x, y: working_to_input(chunk, x, y)  # noqa: E731
        return counts, track_sample(chunk, to_input, every=self.sample_every)

    def count(self, parts: list[tuple[np.ndarray, pd.DataFrame]]) -> None:
        """Keep every window's entries per object and part of the track sample, in time order."""
        for counts, sample in parts:
            self.counts += counts
            self.samples.append(sample)

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


def window_engine(run_params: RunParams, n_windows: int) -> tuple[Any, int]:
    """Return the engine that runs a run's windows, and the threads of each window's stages.

    Windows run side by side in the engine's workers, each with one thread
    (the local engine's ``jobs`` processes, or a dask cluster); with one
    worker, or one window, they run in this process with the run's threads.
    """
    if run_params.engine == "dask":
        return run_params.make_engine(), 1
    jobs = min(resolve_jobs(run_params.jobs), n_windows)
    if jobs <= 1:
        return LocalEngine(1), run_params.threads
    return LocalEngine(jobs), 1


def windows_at_once(run_params: RunParams) -> int:
    """Return how many windows a run plans to hold in this machine's memory at once."""
    if run_params.engine == "dask" and run_params.scheduler is not None:
        return 1  # the cluster's workers hold theirs in their own machines' memory
    return resolve_jobs(run_params.jobs)


@contextmanager
def windowed_tracks(
    source: Any,
    columns: ColumnSpec,
    cleaning: CleanParams,
    alignment: AlignParams,
    plan: tuple[int, int | None],
    scratch: str | None = None,
    run_params: RunParams | None = None,
    progress: bool = False,
) -> Iterator[Windowed]:
    """Read and clean the tracks into a scratch folder; remove it when the run ends.

    ``plan`` is the bucket length (ns) and the most rows per window
    (:func:`comove.tracks.streaming.plan_windows`); ``run_params`` says what
    runs the windows (:func:`window_engine`; default: this process, one
    thread); ``progress`` shows bars over the windows.
    """
    bucket_ns, max_rows = plan
    spill = spill_tracks(source, columns, int(bucket_ns), scratch)
    release_memory()  # before the engine's workers start (forked, they would share it)
    with ExitStack() as stack:
        stack.callback(spill.remove)
        windows = spill.windows(max_rows)
        engine, threads = window_engine(run_params or RunParams(jobs=1), len(windows))
        if hasattr(engine, "session"):  # one cluster for every pass
            stack.enter_context(engine.session())
        cleaned = spill.clean(cleaning, alignment, windows, threads, progress, engine)
        span = cleaned.grid_span()
        empty = cleaned.window((windows[0][0], windows[0][0]))
        shell = replace(empty, first_index=span[0], n_snapshots=span[1] - span[0] + 1)
        every = sample_every(cleaned.first_ns, cleaned.last_ns, cleaned.step_ns)
        yield Windowed(cleaned, windows, span, shell, every, engine, threads, progress)


def mine_windows(
    run: Windowed, colocation: ColocationParams, min_prevalent_snapshots: int
) -> RoleTally:
    """Return the role chain's tally of the whole run, mined window by window.

    Each window is mined without pruning; the tallies joined are pruned with
    the whole period's bound, as :func:`comove.roles.chain.role_chain` mines it in one piece.
    """
    found = run.map(_chain_window, (role_chain, colocation), "co-location")
    run.count([part for _, part in found])
    return prune_levels(combine_role_tallies([tally for tally, _ in found]),
                        min_prevalent_snapshots)  # fmt: skip


def _chain_window(shared: tuple[Windowed, tuple[Callable, Any]], i: int) -> tuple:
    """Run a chain on window ``i`` (a task): its tally, entries per object and track sample.

    The chain is :func:`~comove.roles.chain.role_chain` or
    :func:`~comove.roles.focal.focal_chain`, with its settings.
    """
    run, (chain, params) = shared
    outer, start, stop = run.outer(i)
    chunk = outer.window(start, stop)
    del outer
    tally = chain(chunk, params, workers=run.threads)
    counted = run.counted(chunk)
    del chunk
    release_memory()
    return tally, counted


def focal_windows(run: Windowed, params: FocalParams) -> FocalTally:
    """Return the focal role's neighbourhoods over the whole run, window by window."""
    found = run.map(_chain_window, (focal_chain, params), "surroundings")
    run.count([part for _, part in found])
    return FocalTally.joined([tally for tally, _ in found])


@dataclass
class WindowedGroups:
    """The episodes, episode table and centroid paths, dyads and objects of a run over windows."""

    episodes: Episodes
    table: pd.DataFrame
    centroids: list
    dyads: pd.DataFrame
    objects: pd.DataFrame
    leaders: tuple[pd.DataFrame, pd.DataFrame]


def group_windows(
    run: Windowed,
    grouping: GroupParams,
    episode_params: EpisodeParams,
    dyad_params: DyadParams,
    lead_params: LeadershipParams,
) -> WindowedGroups:
    """Return the episodes, episode table and dyads of the whole run, window by window.

    Pass one: each window's group timeline (with the velocity and evidence
    windows' context on each side), the pairs ever together, and each object's entries; the
    timelines joined give the episodes. Pass two, while this process searches
    the episodes: each window's dyad counts of those pairs and the positions
    De reads. Pass three: each window's episode rows. With
    ``dyad_pairs="co-present"`` the pairs are known only after pass two, and
    a fourth pass reads De's positions. Pass three also counts each window's
    heading correlations for the leadership table.
    """
    # context each side: the velocity window's, and the evidence window's around it
    velocity_reach = half_window_snapshots(grouping.velocity_window, run.shell.step_s)
    lags = lead_params.lags(run.shell.step_s)
    # one context serves every pass, so each window is aligned once: the links' and
    # the leaders' (headings read up to ``lags`` snapshots beyond the window)
    reach = velocity_reach + max(link_reach(grouping, run.shell.step_s), lags)
    together = dyad_params.dyad_pairs == "together"
    found = run.map(_timeline_window, (grouping, reach, together), "groups (1/3)")
    run.count([counted for _, _, counted in found])
    timelines = [t for t, _, _ in found]
    keys = [k for _, k, _ in found]
    # each window's entries per object before it: where its entries rank in each track
    before = np.cumsum([np.zeros_like(run.counts)] + [c for _, _, (c, _) in found[:-1]], axis=0)
    del found
    pair_keys = np.unique(np.concatenate(keys)) if together else None
    cap, n = dyad_params.max_expected_pairs, run.counts.size
    needed = (
        TrackSamples.needed(pair_keys // n, pair_keys % n, run.counts, cap)
        if pair_keys is not None
        else None
    )
    # the dyads need the pairs, not the episodes: the workers count them while
    # this process searches the episodes
    with run.started(_dyads_window, (grouping, reach, pair_keys, needed), "groups (2/3)",
                     tasks=list(enumerate(before))) as dyad_parts:  # fmt: skip
        joined = GroupTimeline.joined(timelines)
        del timelines  # the windows' parts: the joined timeline holds them all
        episodes = find_episodes(joined, episode_params)
        del joined
        parts = dyad_parts()
    tally = reduce(DyadTally.then, [t for t, _ in parts])
    gathered = [g for _, g in parts if g is not None]
    del parts
    third = run.map(_rows_window, (episodes, grouping, reach, lags), "groups (3/3)")
    rows = reduce(EpisodeRows.then, [r for r, _ in third])
    leads = reduce(LeadTally.then, [lead for _, lead in third])
    del third
    if needed is None:  # co-present pairs: known only now
        needed = TrackSamples.needed(*tally.pairs(), run.counts, cap)
        gathered = run.map(_gather_window, needed, "groups (De)", tasks=list(enumerate(before)))
    expected = expected_distances(TrackSamples.joined(run.counts, gathered), tally, cap)
    table, centroids = episode_table(run.shell, episodes, None, grouping.min_speed, rows=rows)
    leaders = leadership_tables(leads, run.shell, lead_params)
    return WindowedGroups(episodes, table, centroids, dyad_rows(tally, run.shell, expected, cap),
                          object_rows(tally, run.shell), leaders)  # fmt: skip


def _timeline_window(shared: tuple, i: int) -> tuple:
    """Pass one of ``groups`` on window ``i`` (a task).

    Returns its group timeline, the keys of its pairs ever together (or None),
    and its entries per object and part of the track sample. The aligned
    window and its neighbour pairs are kept for the later passes.
    """
    run, (grouping, reach, together) = shared
    outer, start, stop = run.outer(i, reach, keep=True)
    timeline, keys, pairs = chunk_timeline_and_keys(outer, start, stop, grouping, run.threads,
                                                    together)  # fmt: skip
    run.keep_pairs(i, pairs)
    counted = run.counted(outer.window(start, stop))
    del outer
    release_memory()
    return timeline, keys, counted


def _dyads_window(shared: tuple, task: tuple[int, np.ndarray]) -> tuple:
    """Count a window's dyads and take De's positions there (a task of ``groups``).

    ``task`` is the window's index and each object's entries in the windows
    before it. The window's aligned snapshots and neighbour pairs are those
    the first pass kept.
    """
    run, (grouping, reach, pair_keys, needed) = shared
    i, before = task
    outer, start, stop = run.outer(i, reach, keep=True)
    tally = chunk_dyads(outer, start, stop, grouping.radius, pair_keys, run.threads,
                        run.kept_pairs(i, grouping.radius))  # fmt: skip
    gathered = None
    if needed is not None:
        gathered = TrackSamples.gather(outer.window(start, stop), before, needed)
    del outer
    release_memory()
    return tally, gathered


def _rows_window(shared: tuple, i: int) -> tuple[EpisodeRows, LeadTally]:
    """Return the episode-table rows and the heading correlations of window ``i``.

    A task of ``groups``, after the search. The leaders' correlations reuse
    the window's aligned snapshots and the neighbour pairs of the first pass.
    """
    run, (episodes, grouping, reach, lags) = shared
    outer, start, stop = run.outer(i, reach, keep=True)
    offset = outer.first_index + start - run.span[0]
    rows = chunk_episode_rows(outer, start, stop, episodes, grouping, run.threads, offset)
    lead = chunk_lead_tally(outer, start, stop, grouping, lags, run.threads,
                            run.kept_pairs(i, grouping.radius))  # fmt: skip
    del outer
    release_memory()
    return rows, lead


def _gather_window(shared: tuple, task: tuple[int, np.ndarray]) -> tuple:
    """Take window ``i``'s positions De reads (a task); ``task`` as for :func:`_rows_window`."""
    run, needed = shared
    i, before = task
    outer, start, stop = run.outer(i)
    return TrackSamples.gather(outer.window(start, stop), before, needed)

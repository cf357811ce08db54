"""Tracks longer than memory: read once into buckets of time, cleaned and aligned window by window.

A run over time windows makes three passes, each holding about one window in memory:

1. :func:`spill_tracks` reads the input in blocks of rows
   (:func:`comove.io.reading.read_blocks`), drops and counts the rows that are
   unusable on their own (no id, role, coordinates or readable time), and
   writes the others to a scratch folder, sorted into buckets of time
   (``chunk`` long, counted from the epoch). It gathers what must be decided
   once for the whole input: the object and role names, how the times are
   written, and the extent of the data, which fixes the working plane.
2. :meth:`Spill.clean` cleans each window as :func:`~comove.tracks.cleaning.clean_fixes`
   cleans the whole input (:func:`~comove.tracks.cleaning.clean_window`): duplicates
   share a time and so a bucket; the speed-spike rule reads neighbouring
   fixes, so a window is cleaned with margins of neighbouring buckets, widened
   until no decision on the window's own fixes depends on what lies beyond.
   Each window's kept fixes go back to the scratch folder; what cleaning
   counted joins into the quality report, and the gaps between fixes give
   the default step, exactly as for the whole input.
3. :meth:`Cleaned.windows` aligns each window with ``max_gap`` (and the
   caller's context) of fixes on each side (:func:`~comove.tracks.alignment.align_window`):
   every window's snapshots equal the same window of the whole run's.

The per-snapshot chains then run on each window and their tallies join
exactly (DEVELOPERS.md, "The chains"). The scratch folder is comove's own, in
the system's temporary folder (or ``scratch``), and is removed when the run
ends, however it ends.
"""

from __future__ import annotations

import shutil
import tempfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pyarrow as pa
import pyarrow.ipc as ipc

from comove.errors import InputError, bad_setting
from comove.io.projection import LonLatExtent, metric_crs_of
from comove.io.reading import BLOCK_ROWS, ColumnSpec, read_blocks
from comove.io.times import human_seconds
from comove.tracks.alignment import (
    NS_PER_S,
    AlignParams,
    Snapshots,
    align_window,
    available_memory,
    check_grid,
    grid_ns,
    no_grid_point,
    outlying_times,
)
from comove.tracks.cleaning import (
    DROP_REASONS,
    MAX_EXAMPLES,
    MAX_SPIKE_PASSES,
    CleanParams,
    Fixes,
    WindowPlan,
    WindowRows,
    check_names,
    clean_window,
    note_drops,
    nothing_kept,
    row_checks,
)
from comove.tracks.quality import (
    INTERVAL_PERCENTILES,
    GapTally,
    gap_bins,
    gaps_in_bins,
    percentile_ranks,
    percentiles,
    quality_report,
)

__all__ = ["CleanCounts", "Cleaned", "Spill", "WindowParams", "clean_stored", "plan_windows",
           "spill_tracks"]  # fmt: skip

#: Prefix of the scratch folders of runs over time windows.
SCRATCH_PREFIX = "comove-scratch-"

_SPILL_SCHEMA = {"t": pa.int64(), "a": pa.float64(), "b": pa.float64(), "zone_less": pa.bool_(),
                 "seq": pa.int64()}  # fmt: skip


@dataclass
class Spill:
    """The input read once and sorted into buckets of time in a scratch folder.

    Attributes
    ----------
    folder : Path
        The scratch folder (comove's own; :meth:`remove` deletes it).
    bucket_ns : int
        Bucket length, ns; bucket ``k`` holds times ``k * bucket_ns <= t < (k + 1) * bucket_ns``.
    batches : dict of int to list of (str, int)
        Per bucket, the files and record batches holding its rows.
    plan : WindowPlan
        Names, coordinates, working plane and time format of the whole input.
    sources, source_names : list of str
        The sources (as :class:`~comove.io.reading.RawTracks` lists them), and
        the names examples give them.
    source_starts : ndarray of int64
        Reading-order number of each source's first row.
    rows_read : int
        Every row read.
    dropped : ndarray of int64
        Rows dropped while reading, per reason of ``DROP_REASONS``.
    examples : list of ndarray
        Per reason, reading-order numbers of the first rows dropped for it.
    span : (int, int)
        First and last time of the rows written, ns.
    """

    folder: Path
    bucket_ns: int
    batches: dict[int, list[tuple[str, int]]]
    plan: WindowPlan
    sources: list[str]
    source_names: list[str]
    source_starts: np.ndarray
    rows_read: int
    dropped: np.ndarray
    examples: list[np.ndarray]
    span: tuple[int, int]
    counts: dict[int, int] = field(default_factory=dict)
    _open: dict[str, Any] = field(default_factory=dict, repr=False)
    _codes: dict[tuple[str, str], np.ndarray] = field(default_factory=dict, repr=False)

    def __getstate__(self) -> dict:
        # open files and the codes mapped from them stay with each process
        return {**self.__dict__, "_open": {}, "_codes": {}}

    @property
    def buckets(self) -> range:
        """Return every bucket from the first with rows to the last."""
        keys = sorted(self.batches)
        return range(keys[0], keys[-1] + 1)

    def rows(self, buckets: range) -> WindowRows:
        """Return the rows of ``buckets``, with the whole input's codes."""
        parts = []
        for k in buckets:
            for name, index in self.batches.get(k, []):
                parts.append((name, self._batch(name, index)))
        return _window_rows(parts, self.plan, self._codes)

    def _batch(self, name: str, index: int) -> pa.RecordBatch:
        reader = self._open.get(name)
        if reader is None:
            # read, not memory-mapped: mapped pages would stay in the process's memory
            # until the run ends, so memory would grow with the input
            reader = ipc.open_file(pa.OSFile(str(self.folder / name)))
            self._open[name] = reader
        return reader.get_batch(index)

    def example_rows(self, seq: np.ndarray) -> list[dict]:
        """Return ``{"source", "row"}`` of rows given by their reading-order numbers."""
        return _example_rows(self.source_starts, self.source_names, seq)

    def windows(self, max_rows: int | None = None) -> list[tuple[int, int]]:
        """Return the windows: runs ``k0 <= k < k1`` of consecutive buckets, in time order.

        Each bucket is a window of its own, or with ``max_rows``, consecutive
        buckets are joined while their rows stay within it (a bucket holding more
        is a window of its own).
        """
        out: list[tuple[int, int]] = []
        held = 0
        for k in self.buckets:
            n = self.counts.get(k, 0)
            if out and max_rows is not None and held + n <= max_rows:
                out[-1] = (out[-1][0], k + 1)
                held += n
            else:
                out.append((k, k + 1))
                held = n
        return out

    def clean(
        self,
        params: CleanParams,
        alignment: AlignParams,
        windows: list[tuple[int, int]] | None = None,
        workers: int = 1,
        progress: bool = False,
        engine: Any = None,
    ) -> Cleaned:
        """Clean every window; return the kept fixes (in the scratch folder) and the quality report.

        ``windows`` defaults to one bucket each (:meth:`windows`); ``workers``
        are the threads of the projection (-1: one per core); ``progress``
        shows a bar over the windows (on a terminal). With an ``engine``
        (:class:`comove.stats.engine.Engine`), the windows are its tasks: each
        is cleaned where the engine runs it, which must see the scratch folder.
        """
        todo = windows if windows is not None else self.windows()
        if engine is None:
            counted = [clean_stored((self, params, workers), w) for w in todo]
        else:
            counted = engine.map(clean_stored, todo, shared=(self, params, workers),
                                 progress=progress, label="cleaning")  # fmt: skip
        out = _CleanPass(self, params)
        for part in counted:
            out.add(part)
        return out.finish(alignment)

    def remove(self) -> None:
        """Delete the scratch folder."""
        self._open.clear()
        self._codes.clear()
        shutil.rmtree(self.folder, ignore_errors=True)


def _example_rows(starts: np.ndarray, names: list[str], seq: np.ndarray) -> list[dict]:
    """Return ``{"source", "row"}`` (1-based row within its source) of reading-order numbers."""
    src = np.searchsorted(starts, seq, side="right") - 1
    return [
        {"source": names[s], "row": int(q - starts[s] + 1)}
        for s, q in zip(src.tolist(), seq.tolist(), strict=True)
    ]


def release_memory() -> None:
    """Give memory freed by a finished window back to the system.

    A run over windows frees each window's arrays before the next; the C
    allocator keeps freed pages in its heap (and Arrow's allocator keeps them
    for a while), so without this the process's memory would creep up with
    every window. Arrow's pool is asked to release what it holds unused;
    ``malloc_trim`` is glibc's, and elsewhere does nothing.
    """
    pa.default_memory_pool().release_unused()
    try:
        import ctypes

        ctypes.CDLL("libc.so.6").malloc_trim(0)
    except (OSError, AttributeError):
        pass


def _window_rows(
    parts: list[tuple[str, pa.RecordBatch]],
    plan: WindowPlan,
    known: dict[tuple[str, str], np.ndarray],
) -> WindowRows:
    """Return record batches of the spill as rows with the whole input's codes.

    A file of the spill has one dictionary per text column (the IPC file format
    does not replace dictionaries), so its codes are mapped once and kept in ``known``.
    """

    def codes(column: str, names: np.ndarray) -> np.ndarray:
        out = []
        for name, part in parts:
            d = part.column(column)
            at = known.get((name, column))
            if at is None:
                words = np.asarray(d.dictionary.to_pylist(), dtype=object)
                at = known[(name, column)] = np.searchsorted(names, words).astype(np.int32)
            out.append(at[d.indices.to_numpy()])
        return np.concatenate(out) if out else np.zeros(0, dtype=np.int32)

    def plain(column: str, dtype: Any) -> np.ndarray:
        out = [part.column(column).to_numpy(zero_copy_only=False) for _, part in parts]
        return np.concatenate(out).astype(dtype, copy=False) if out else np.zeros(0, dtype)

    has_lonlat = bool(parts) and "lon" in parts[0][1].schema.names
    lonlat = plan.coords != "planar"
    a, b = plain("a", np.float64), plain("b", np.float64)
    lon = plain("lon", np.float64) if has_lonlat else (a if lonlat else None)
    lat = plain("lat", np.float64) if has_lonlat else (b if lonlat else None)
    return WindowRows(
        obj=codes("obj", plan.objects), role=codes("role", plan.roles),
        t=plain("t", np.int64), a=a, b=b, lon=lon, lat=lat,
        zone_less=plain("zone_less", bool), seq=plain("seq", np.int64),
    )  # fmt: skip


def spill_tracks(
    source: Any,
    columns: ColumnSpec,
    bucket_ns: int,
    scratch: str | Path | None = None,
    block_rows: int = BLOCK_ROWS,
) -> Spill:
    """Read the input in blocks and write its usable rows to buckets of time in a scratch folder.

    Parameters
    ----------
    source : any input :func:`~comove.io.reading.read_tracks` accepts
        The tracks.
    columns : ColumnSpec
        Column names and options.
    bucket_ns : int
        Bucket (window) length, ns.
    scratch : path, optional
        Where to make the scratch folder (default: the system's temporary folder).
    block_rows : int
        Rows read at a time.

    Returns
    -------
    Spill

    Raises
    ------
    InputError
        As :func:`~comove.io.reading.read_tracks`; when blocks of the time
        column are written in different ways (e.g. epoch seconds in one part,
        text in another); when no row is usable.
    """
    folder = Path(tempfile.mkdtemp(prefix=SCRATCH_PREFIX, dir=scratch))
    try:
        return _SpillPass(folder, bucket_ns).run(source, columns, block_rows)
    except BaseException:
        shutil.rmtree(folder, ignore_errors=True)
        raise


#: Windows from the first to the last that hold rows, above which a run over windows is
#: refused when fewer than one in ``EMPTY_WINDOWS_RATIO`` of them holds any (a stray time
#: stamp years away would otherwise make millions of empty windows).
MANY_WINDOWS = 10_000
EMPTY_WINDOWS_RATIO = 100


def _check_buckets(bucket_ns: int, counts: dict[int, int]) -> None:
    """Refuse a period whose windows are nearly all empty, naming the fixes far from the rest."""
    full = np.array(sorted(k for k, n in counts.items() if n), dtype=np.int64)
    if full.size == 0:
        return
    n_range = int(full[-1] - full[0] + 1)
    if n_range <= MANY_WINDOWS or n_range <= EMPTY_WINDOWS_RATIO * full.size:
        return
    rows = np.array([counts[int(k)] for k in full], dtype=np.int64)
    advice = outlying_times(full * bucket_ns, rows)
    raise InputError(
        f"the input's times span {n_range:,} windows of {human_seconds(bucket_ns / NS_PER_S)}, "
        f"of which {full.size:,} hold fixes; "
        + (advice + " (times rounded down to the window)" if advice else "check the time column")
    )


class _SpillPass:
    """Pass 1: blocks in, buckets out, and what must be known of the whole input."""

    def __init__(self, folder: Path, bucket_ns: int) -> None:
        self.folder, self.bucket_ns = folder, int(bucket_ns)
        self.batches: dict[int, list[tuple[str, int]]] = {}
        self.counts: dict[int, int] = {}
        self.objects: list[np.ndarray] = []
        self.roles: list[np.ndarray] = []
        self.kind: str | None = None
        self.kind_source = ""
        self.extent: LonLatExtent | None = None
        self.dropped = np.zeros(len(DROP_REASONS), dtype=np.int64)
        self.examples: list[list[np.ndarray]] = [[] for _ in DROP_REASONS]
        self.source_names: dict[int, str] = {}
        self.source_starts: dict[int, int] = {}
        self.seq = 0
        self.span = (np.iinfo(np.int64).max, np.iinfo(np.int64).min)
        self.first = None

    def run(self, source: Any, columns: ColumnSpec, block_rows: int) -> Spill:
        for i, raw in enumerate(read_blocks(source, columns, block_rows)):
            if self.first is None:
                self.first = raw
            self.source_names.setdefault(raw.source_index, str(raw.frame["source"].iloc[0]))
            self.source_starts.setdefault(raw.source_index, self.seq - raw.first_row)
            self._block(i, raw)
        return self._finish()

    def _block(self, i: int, raw: Any) -> None:
        frame = raw.frame.reset_index(drop=True)
        rows = row_checks(raw, frame)
        kind = rows.times.kind
        if self.kind is None:
            self.kind, self.kind_source = kind, str(frame["source"].iloc[0])
        elif kind != self.kind and rows.times.ok.any():
            raise InputError(
                f"{frame['source'].iloc[0]}: times near row {raw.first_row + 1} are "
                f"{kind}, but earlier ones ({self.kind_source}) are {self.kind}; write the "
                "time column one way throughout (or give --time-unit for epoch numbers)"
            )
        seq = self.seq + np.arange(len(frame), dtype=np.int64)
        self.seq += len(frame)
        gone = rows.reason >= 0
        why = rows.reason[gone].astype(np.intp)
        self.dropped += np.bincount(why, minlength=len(DROP_REASONS))
        for r in np.unique(why):
            self.examples[r].append(seq[gone][why == r][:MAX_EXAMPLES])
        valid = np.flatnonzero(~gone)
        if valid.size == 0:
            return
        t = rows.times.ns[valid]
        self.span = (min(self.span[0], int(t.min())), max(self.span[1], int(t.max())))
        if rows.lon is not None:
            part = LonLatExtent.of(rows.lon[valid], rows.lat[valid])
            self.extent = part if self.extent is None else self.extent.then(part)
        obj, objects = _used(rows.obj[valid], rows.objects)
        role, roles = _used(rows.role[valid], rows.roles)
        self.objects.append(objects)
        self.roles.append(roles)
        columns = {
            "obj": pa.DictionaryArray.from_arrays(pa.array(obj), pa.array(objects, pa.string())),
            "role": pa.DictionaryArray.from_arrays(pa.array(role), pa.array(roles, pa.string())),
            "t": t, "a": rows.a[valid], "b": rows.b[valid],
            "zone_less": rows.times.zone_less[valid], "seq": seq[valid],
        }  # fmt: skip
        if raw.coords == "crs":
            columns["lon"], columns["lat"] = rows.lon[valid], rows.lat[valid]
        self._write(i, pa.table(columns), t // self.bucket_ns)

    def _write(self, i: int, table: pa.Table, bucket: np.ndarray) -> None:
        if not np.all(bucket[1:] >= bucket[:-1]):  # a block in time order needs no sort
            order = np.argsort(bucket, kind="stable")
            bucket = bucket[order]
            table = table.take(pa.array(order))
        cuts = np.flatnonzero(np.r_[True, bucket[1:] != bucket[:-1]])
        name = f"block-{i:06d}.arrow"
        with ipc.new_file(str(self.folder / name), table.schema) as writer:
            for j, (lo, hi) in enumerate(zip(cuts, np.r_[cuts[1:], bucket.size], strict=True)):
                for batch in table.slice(lo, hi - lo).combine_chunks().to_batches():
                    writer.write_batch(batch)
                self.batches.setdefault(int(bucket[lo]), []).append((name, j))
                self.counts[int(bucket[lo])] = self.counts.get(int(bucket[lo]), 0) + int(hi - lo)

    def _finish(self) -> Spill:
        raw = self.first
        starts = np.asarray([self.source_starts[k] for k in sorted(self.source_starts)],
                            dtype=np.int64)  # fmt: skip
        names = [self.source_names[k] for k in sorted(self.source_names)]
        examples = [np.concatenate(e)[:MAX_EXAMPLES] if e else np.zeros(0, np.int64)
                    for e in self.examples]  # fmt: skip
        if not self.batches:
            dropped = {name: int(self.dropped[i]) for i, name in enumerate(DROP_REASONS)}
            shown = {name: _example_rows(starts, names, examples[i])
                     for i, name in enumerate(DROP_REASONS)}  # fmt: skip
            raise nothing_kept(list(raw.sources) if raw is not None else [], dropped, shown)
        metric_crs = None
        if self.extent is not None:
            if self.extent.needs_bins:
                self.extent = self._binned()
            metric_crs = metric_crs_of(self.extent)
        elif raw.crs:
            import pyproj

            metric_crs = pyproj.CRS.from_user_input(raw.crs)
        check_names(_union(self.objects), _union(self.roles), list(raw.sources))
        plan = WindowPlan(
            objects=_union(self.objects), roles=_union(self.roles), coords=raw.coords,
            input_crs="EPSG:4326" if raw.coords == "lonlat" else raw.crs,
            metric_crs=metric_crs, time_kind=str(self.kind),
        )  # fmt: skip
        _check_buckets(self.bucket_ns, self.counts)
        return Spill(self.folder, self.bucket_ns, self.batches, plan, list(raw.sources), names,
                     starts, self.seq, self.dropped, examples, self.span, self.counts)  # fmt: skip

    def _binned(self) -> LonLatExtent:
        """Return the extent with longitude bins, from the rows written (a spread over 180°)."""
        extent = None
        for files in self.batches.values():
            for name, index in files:
                batch = ipc.open_file(pa.OSFile(str(self.folder / name))).get_batch(index)
                lon_col, lat_col = ("lon", "lat") if "lon" in batch.schema.names else ("a", "b")
                part = LonLatExtent.of(batch.column(lon_col).to_numpy(),
                                       batch.column(lat_col).to_numpy(), bins=True)  # fmt: skip
                extent = part if extent is None else extent.then(part)
        assert extent is not None
        return extent


def _used(codes: np.ndarray, names: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Return codes renumbered over the names in use, and those names."""
    used = np.bincount(codes, minlength=len(names)) > 0
    remap = np.cumsum(used) - 1
    return remap[codes].astype(np.int32), np.asarray(names, dtype=object)[used].astype(str)


def _union(parts: list[np.ndarray]) -> np.ndarray:
    """Return the sorted distinct names of several blocks."""
    if not parts:
        return np.zeros(0, dtype=str)
    return np.unique(np.concatenate(parts).astype(str))


@dataclass
class Cleaned:
    """Every window's cleaned fixes (in the scratch folder) and the whole input's quality.

    Attributes
    ----------
    spill : Spill
        The buckets read.
    objects, roles : ndarray of str
        The names of the objects and roles with kept fixes (the whole input's codes).
    remap_obj, remap_role : ndarray of int32
        From the spill's codes to these (-1: no kept fix).
    quality : dict
        The report :func:`~comove.tracks.cleaning.clean_fixes` gives for the whole input.
    step_ns, max_gap_ns : int
        Step and bridged gap (defaults resolved as :func:`~comove.tracks.alignment.align` does).
    first_ns, last_ns : ndarray of int64
        Each object's first and last kept fix.
    """

    spill: Spill
    objects: np.ndarray
    roles: np.ndarray
    remap_obj: np.ndarray
    remap_role: np.ndarray
    quality: dict
    step_ns: int
    max_gap_ns: int
    first_ns: np.ndarray
    last_ns: np.ndarray
    _cache: dict[int, Fixes] = field(default_factory=dict, repr=False)

    def __getstate__(self) -> dict:
        return {**self.__dict__, "_cache": {}}

    def fixes(self, k: int) -> Fixes:
        """Return the cleaned fixes of bucket ``k``, in the final codes."""
        held = self._cache.get(k)
        if held is not None:
            return held
        path = self.spill.folder / f"clean-{k}.npz"
        plan = self.spill.plan
        if path.exists():
            with np.load(path) as data:
                obj, role = self.remap_obj[data["obj"]], self.remap_role[data["role"]]
                t, x, y = data["t"], data["x"], data["y"]
        else:
            obj = role = np.zeros(0, dtype=np.int32)
            t, x, y = np.zeros(0, dtype=np.int64), np.zeros(0), np.zeros(0)
        fixes = Fixes(obj=obj, time=t, x=x, y=y, role=role, objects=self.objects,
                      roles=self.roles, metric_crs=plan.metric_crs,
                      input_crs=plan.input_crs)  # fmt: skip
        if len(self._cache) >= 8:
            self._cache.pop(next(iter(self._cache)))
        self._cache[k] = fixes
        return fixes

    def around(self, lo_ns: int, hi_ns: int) -> Fixes:
        """Return the cleaned fixes with times ``lo_ns <= t <= hi_ns``, sorted by (object, time)."""
        b = self.spill.bucket_ns
        parts = [self.fixes(k) for k in range(lo_ns // b, hi_ns // b + 1)]
        obj = np.concatenate([p.obj for p in parts])
        t = np.concatenate([p.time for p in parts])
        keep = (t >= lo_ns) & (t <= hi_ns)
        # buckets follow one another in time and each is in (object, time) order:
        # a stable sort by object gives (object, time) order (a radix sort on 16 bits)
        codes = obj[keep].astype(np.int16) if len(self.objects) < 2**15 else obj[keep]
        order = np.flatnonzero(keep)[np.argsort(codes, kind="stable")]
        first = parts[0]
        return Fixes(
            obj=obj[order], time=t[order],
            x=np.concatenate([p.x for p in parts])[order],
            y=np.concatenate([p.y for p in parts])[order],
            role=np.concatenate([p.role for p in parts])[order],
            objects=first.objects, roles=first.roles, metric_crs=first.metric_crs,
            input_crs=first.input_crs,
        )  # fmt: skip

    def grid_span(self) -> tuple[int, int]:
        """Return the grid indices of the whole run's first and last snapshot with an entry."""
        buckets = list(self.spill.buckets)
        first = last = None
        for k in buckets:
            snaps = self.window((k, k + 1))
            if snaps.n_entries:
                first = snaps.first_index + int(snaps.snap[0])
                break
        for k in reversed(buckets):
            snaps = self.window((k, k + 1))
            if snaps.n_entries:
                last = snaps.first_index + int(snaps.snap[-1])
                break
        if first is None or last is None:
            raise no_grid_point(self.step_ns)
        return first, last

    def bucket_grid(
        self, window: tuple[int, int], span: tuple[int, int] | None = None
    ) -> tuple[int, int]:
        """Return the grid indices ``g0 <= g < g1`` of buckets ``k0 <= k < k1`` (within ``span``).

        ``span`` is the whole run's first and last snapshot (:meth:`grid_span`).
        """
        b, step = self.spill.bucket_ns, self.step_ns
        g0, g1 = -(-(window[0] * b) // step), -(-(window[1] * b) // step)
        if span is not None:
            g0, g1 = max(g0, span[0]), min(g1, span[1] + 1)
        return g0, max(g0, g1)

    def window(
        self, window: tuple[int, int], context: int = 0, span: tuple[int, int] | None = None
    ) -> Snapshots:
        """Return the snapshots of buckets ``k0 <= k < k1``, with ``context`` more on each side.

        With ``span`` (the whole run's first and last snapshot, :meth:`grid_span`)
        the window and its context stay within the run's snapshots: the result
        equals :meth:`Snapshots.window` of the whole run over the same snapshots.
        """
        g0, g1 = self.bucket_grid(window, span)
        g0, g1 = g0 - context, g1 + context
        if span is not None:
            g0, g1 = max(g0, span[0]), min(g1, span[1] + 1)
        g1 = max(g0, g1)
        step, reach = self.step_ns, self.max_gap_ns + self.step_ns
        fixes = self.around(g0 * step - reach, g1 * step + reach)
        return align_window(fixes, step, self.max_gap_ns, (g0, g1))

    def remove(self) -> None:
        """Delete the scratch folder."""
        self._cache.clear()
        self.spill.remove()


@dataclass
class CleanCounts:
    """What cleaning one window counted (its kept fixes are in the scratch folder).

    The fields are those of :class:`~comove.tracks.cleaning.CleanedWindow`
    without the fixes, and the roles the window's kept fixes carry.
    """

    dropped: np.ndarray
    examples: list[np.ndarray]
    zone_less: int
    last_spike_pass: int
    gaps: GapTally
    roles_used: np.ndarray


def clean_stored(shared: tuple[Spill, CleanParams, int], window: tuple[int, int]) -> CleanCounts:
    """Clean the window of buckets ``k0 <= k < k1``; write its kept fixes, one file per bucket.

    A task of :meth:`Spill.clean`: ``shared`` is the spill, the cleaning
    settings and the threads of the projection. The window is cleaned with
    margins of neighbouring buckets, widened while a speed-spike decision on
    its own fixes could depend on what lies beyond them.
    """
    spill, params, workers = shared
    (k0, k1), b = window, spill.bucket_ns
    first, last = spill.buckets[0], spill.buckets[-1]
    owned = (k0 * b, k1 * b)
    reach = 0 if params.max_speed is None else 1
    while True:
        lo, hi = max(k0 - reach, first), min(k1 - 1 + reach, last)
        part = spill.rows(range(lo, hi + 1))
        done = clean_window(part, spill.plan, params, owned, (lo > first, hi < last), workers)
        if done is not None:
            break
        # a spike decision reached beyond the margins: widen them (once they hold
        # every bucket nothing is cut, so this ends)
        reach = max(1, 2 * reach)
    del part
    bucket = done.t // b
    for k in np.unique(bucket).tolist():  # one file per bucket, each in (object, time) order
        at = bucket == k
        np.savez(spill.folder / f"clean-{k}.npz", obj=done.obj[at], t=done.t[at],
                 x=done.x[at], y=done.y[at], role=done.role[at])  # fmt: skip
    counts = CleanCounts(done.dropped, done.examples, done.zone_less, done.last_spike_pass,
                         done.gaps, np.unique(done.role))  # fmt: skip
    del done
    release_memory()
    return counts


class _CleanPass:
    """Pass 2: what cleaning counted in each window, joined in time order."""

    def __init__(self, spill: Spill, params: CleanParams) -> None:
        self.spill, self.params = spill, params
        self.dropped = spill.dropped.copy()
        self.examples = [[e] if e.size else [] for e in spill.examples]
        self.zone_less = 0
        self.last_pass = 0
        self.gaps: GapTally | None = None
        self.used_role = np.zeros(len(spill.plan.roles), dtype=bool)

    def add(self, done: CleanCounts) -> None:
        """Join the counts of the next window."""
        self.dropped += done.dropped
        for r, seq in enumerate(done.examples):
            if seq.size:
                self.examples[r].append(seq)
        self.zone_less += done.zone_less
        self.last_pass = max(self.last_pass, done.last_spike_pass)
        self.used_role[done.roles_used] = True
        self.gaps = done.gaps if self.gaps is None else self.gaps.then(done.gaps)

    def finish(self, alignment: AlignParams) -> Cleaned:
        spill, plan, gaps = self.spill, self.spill.plan, self.gaps
        assert gaps is not None
        used_obj = gaps.first != np.iinfo(np.int64).max
        remap_obj = (np.cumsum(used_obj) - 1).astype(np.int32)
        remap_role = (np.cumsum(self.used_role) - 1).astype(np.int32)
        objects, roles = plan.objects[used_obj], plan.roles[self.used_role]
        values = self._bin_values(gaps)
        interval = percentiles(gaps.n, lambda r: gaps.order_stat(r, values), NS_PER_S)
        dropped = {name: int(self.dropped[i]) for i, name in enumerate(DROP_REASONS)}
        examples = {
            name: spill.example_rows(np.sort(np.concatenate(self.examples[i]))[:MAX_EXAMPLES])
            if self.examples[i] else []
            for i, name in enumerate(DROP_REASONS)
        }  # fmt: skip
        if not used_obj.any():  # every row dropped: the message of a run in one piece
            raise nothing_kept(spill.sources, dropped, examples)
        passes = 0
        if self.params.max_speed is not None:
            passes = min(self.last_pass + 1, MAX_SPIKE_PASSES)
        quality = quality_report(
            rows_read=spill.rows_read, dropped=dropped, examples=examples, objects=objects,
            roles=roles, span=(int(gaps.first[used_obj].min()), int(gaps.last[used_obj].max())),
            interval=interval, zone_less=self.zone_less, time_input=plan.time_kind,
            coords=plan.coords, crs=(plan.input_crs, plan.metric_crs),
            max_speed=self.params.max_speed, passes=passes, sources=spill.sources,
        )  # fmt: skip
        note_drops(quality)
        step_ns, max_gap_ns = grid_ns(alignment, lambda: interval["median"])
        first_fix, last_fix = gaps.first[used_obj], gaps.last[used_obj]
        n_fixes = gaps.n + int(used_obj.sum())  # each object's gaps are its fixes less one
        check_grid(int(first_fix.min()), int(last_fix.max()), step_ns, int(roles.size),
                   np.concatenate([first_fix, last_fix]), n_fixes=n_fixes,
                   owners=np.concatenate([objects, objects]))  # fmt: skip
        return Cleaned(spill, objects, roles, remap_obj, remap_role, quality, step_ns,
                       max_gap_ns, gaps.first[used_obj], gaps.last[used_obj])  # fmt: skip

    def _bin_values(self, gaps: GapTally) -> dict[int, np.ndarray]:
        """Return the sorted gaps of the bins the percentiles need (a pass over the windows)."""
        ranks = sorted({r for p in INTERVAL_PERCENTILES
                        for r in percentile_ranks(gaps.n, p)[:2]}) if gaps.n else []  # fmt: skip
        bins = gaps.bins_needed(ranks) if ranks else np.zeros(0, dtype=np.int64)
        if bins.size == 0:
            return {}
        found = []
        none = -np.iinfo(np.int64).max
        last_t = np.full(gaps.first.size, none, dtype=np.int64)
        for k in self.spill.buckets:
            path = self.spill.folder / f"clean-{k}.npz"
            if not path.exists():
                continue
            with np.load(path) as data:
                obj, t = data["obj"], data["t"]
            found.append(gaps_in_bins(obj, t, bins))
            # the gaps across the window's start, from each object's last earlier fix
            starts = np.flatnonzero(np.r_[True, obj[1:] != obj[:-1]])
            ends = np.r_[starts[1:], obj.size] - 1
            before = last_t[obj[starts]]
            cross = t[starts][before != none] - before[before != none]
            found.append(cross[np.isin(gap_bins(cross), bins)])
            last_t[obj[ends]] = t[ends]
        values = np.sort(np.concatenate(found))
        keys = gap_bins(values)
        return {int(key): values[keys == key] for key in bins}


# --------------------------------------------------------------------------- settings

#: Share of the available memory a run may plan to use, and the most it plans for.
MEMORY_SHARE = 0.25
MEMORY_CAP = 2 * 2**30
#: Memory a run plans per fix of a window (read, cleaned, aligned and chained), bytes. On the
#: fleet-day benchmark a window of 5.4 M fixes peaked at about 250 bytes a fix above the
#: process's start (docs/performance.md); 400 leaves room for denser scenes (more
#: neighbour pairs per fix).
BYTES_PER_FIX = 400
#: Bytes per row of compressed text, as a multiple of the compressed size (common practice
#: for CSV under gzip: ratios of 4-10).
TEXT_EXPANSION = 6
#: Round bucket lengths (seconds) an automatic window is built from.
ROUND_BUCKETS_S = (1, 5, 15, 60, 300, 900, 3600, 6 * 3600, 86400)


@dataclass(frozen=True)
class WindowParams:
    """How much of the period a run holds in memory at once.

    Parameters
    ----------
    chunk : str, default "auto"
        ``"auto"``: the whole period when the input fits comfortably in
        memory, else time windows sized to the available memory
        (:func:`plan_windows`); ``"whole"``: the whole period at once; or a
        duration (``"2h"``, ``"30min"``, ``"1 day"``, or seconds as a number):
        windows of that length. Results are the same whatever the windows.
    scratch : str or None, default None
        Folder for the scratch files of a run over windows (default: the
        system's temporary folder); comove makes its own folder in it and
        removes it when the run ends.
    """

    chunk: str = field(
        default="auto",
        metadata={"help": "time held in memory at once: auto (by the available memory), whole, "
                  "or a duration such as 2h, 30min, 1 day or 900 (seconds); results are "
                  "the same whatever the windows"},
    )  # fmt: skip
    scratch: str | None = field(
        default=None,
        metadata={"help": "folder for scratch files of a run over time windows (default: the "
                  "system's temporary folder)"},
    )  # fmt: skip

    def __post_init__(self) -> None:
        self.chunk_ns()
        if self.scratch is not None and not Path(self.scratch).is_dir():
            raise bad_setting("scratch", f"{self.scratch!r} is not a folder; give an existing one")

    def chunk_ns(self) -> int | None:
        """Return the window length in ns, or None for ``auto`` and ``whole``."""
        text = str(self.chunk).strip().lower()
        if text in ("auto", "whole"):
            return None
        try:
            seconds = float(text)
        except ValueError:
            import pandas as pd

            try:
                seconds = pd.Timedelta(text).total_seconds()
            except ValueError:
                seconds = float("nan")
        if not np.isfinite(seconds) or seconds <= 0:
            raise bad_setting("chunk", f"must be auto, whole or a positive duration such as 2h, "
                              f"30min or 900 (seconds), not {self.chunk!r}")  # fmt: skip
        return int(round(seconds * NS_PER_S))


def memory_budget() -> int:
    """Return the bytes a run plans to hold: ``MEMORY_SHARE`` of the available, at most the cap."""
    return int(min(MEMORY_SHARE * available_memory(), MEMORY_CAP))


def plan_windows(
    source: Any,
    columns: ColumnSpec,
    params: WindowParams,
    budget: int | None = None,
    at_once: int = 1,
) -> tuple[int | None, int | None]:
    """Return the bucket length (ns) and most rows per window, or (None, None) for one piece.

    With a duration, every bucket is a window of that length. With ``auto``,
    the rows of the input are estimated (Parquet: from its metadata; text:
    from its size and the length of its first lines); when they need more than
    ``budget`` (default :func:`memory_budget`) at ``BYTES_PER_FIX``, the
    period is cut into buckets of a round length, estimated from the rows and
    the time span of the first block read (a file in time order gives a short
    span, hence small buckets; one in object order, the whole span), and
    consecutive buckets are joined into windows of at most the budget's rows,
    shared among the ``at_once`` windows held side by side (one per worker).
    In-memory tables and geo files run in one piece.
    """
    chunk = params.chunk_ns()
    if chunk is not None:
        return chunk, None
    if str(params.chunk).strip().lower() == "whole":
        return None, None
    budget = memory_budget() if budget is None else int(budget)
    rows = estimated_rows(source)
    if rows is None or rows * BYTES_PER_FIX <= budget:
        return None, None
    max_rows = max(1, budget // max(1, at_once) // BYTES_PER_FIX)
    first = next(read_blocks(source, columns, rows=100_000))
    times = row_checks(first).times
    ns = times.ns[times.ok]
    span = int(ns.max() - ns.min()) if ns.size > 1 else NS_PER_S
    span = max(span, _parquet_time_span(first.sources, first.columns.get("time")))
    wanted_s = max_rows / 4 / (rows / max(span, 1)) / NS_PER_S
    fits = [b for b in ROUND_BUCKETS_S if b <= wanted_s]
    return (fits[-1] if fits else ROUND_BUCKETS_S[0]) * NS_PER_S, max_rows


def _parquet_time_span(paths: list[str], column: str | None) -> int:
    """Return the time span (ns) Parquet files' statistics give for a timestamp column (0: none)."""
    import pyarrow.parquet as pq

    from comove.io import storage

    low, high = None, None
    for path in paths:
        if column is None or Path(storage.base_name(path)).suffix.lower() not in (
            ".parquet",
            ".pq",
        ):
            return 0
        where, fs = storage.arrow_location(path)
        meta = pq.read_metadata(where, filesystem=fs)
        names = [meta.schema.column(i).name for i in range(meta.num_columns)]
        if column not in names:
            return 0
        at = names.index(column)
        for g in range(meta.num_row_groups):
            stats = meta.row_group(g).column(at).statistics
            if stats is None or not stats.has_min_max or not hasattr(stats.min, "timestamp"):
                return 0
            lo, hi = stats.min.timestamp(), stats.max.timestamp()
            low = lo if low is None else min(low, lo)
            high = hi if high is None else max(high, hi)
    return 0 if low is None else int((high - low) * NS_PER_S)


def estimated_rows(source: Any) -> int | None:
    """Return about how many rows the files of ``source`` hold (None: in memory or geo files).

    A file that cannot be read here (damaged, truncated, not what its name says) gives
    None too: the reader then names what is wrong with it, in one line.
    """
    try:
        return _estimated_rows(source)
    except InputError:
        raise
    except Exception:  # noqa: BLE001 - a damaged file: left for the reader to name
        return None


def _estimated_rows(source: Any) -> int | None:
    import pyarrow.parquet as pq

    from comove.io import storage
    from comove.io.reading import COMPRESSION_SUFFIXES, PARQUET_SUFFIXES, TEXT_SUFFIXES, _tables

    total = 0
    for table in _tables(source):
        if not table.is_file:
            return None
        name = table.name
        suffixes = [s.lower() for s in Path(storage.base_name(name)).suffixes[-2:]]
        if suffixes and suffixes[-1] in PARQUET_SUFFIXES:
            where, fs = storage.arrow_location(name)
            total += pq.read_metadata(where, filesystem=fs).num_rows
        elif any(s in TEXT_SUFFIXES for s in suffixes):
            size = storage.size(name)
            if suffixes[-1] in COMPRESSION_SUFFIXES:
                size *= TEXT_EXPANSION
            total += size // max(_line_length(name), 1)
        else:
            return None
    return total


def _line_length(path: str) -> int:
    """Return the mean length in bytes of the first lines of a (possibly compressed) text file."""
    from comove.io.reading import _open_text

    with _open_text(path) as handle:
        sample = handle.read(65536)
    lines = sample.splitlines()[1:-1] or sample.splitlines()
    return max(1, int(np.mean([len(line.encode()) + 1 for line in lines]))) if lines else 1

"""Tracks read in buckets of time, cleaned and aligned window by window, equal the whole run's."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from scenes import SCENARIOS_DIR

from comove.errors import InputError
from comove.io.reading import ColumnSpec, read_tracks
from comove.tracks.alignment import AlignParams, align
from comove.tracks.cleaning import clean_fixes
from comove.tracks.quality import GapTally, percentiles
from comove.tracks.streaming import SCRATCH_PREFIX, spill_tracks

S = 1_000_000_000


def _whole(source, columns, cleaning, alignment):
    fixes, quality = clean_fixes(read_tracks(source, columns), cleaning)
    return align(fixes, alignment), quality


def _windowed(source, columns, cleaning, alignment, chunk_s, block_rows=997, max_rows=None):
    spill = spill_tracks(source, columns, int(chunk_s * S), block_rows=block_rows)
    cleaned = spill.clean(cleaning, alignment, spill.windows(max_rows))
    return cleaned


def assert_same_run(source, columns, cleaning, alignment, chunk_s, block_rows=997, max_rows=None):
    """Quality and every window's snapshots equal those of the whole run."""
    whole, quality = _whole(source, columns, cleaning, alignment)
    cleaned = _windowed(source, columns, cleaning, alignment, chunk_s, block_rows, max_rows)
    try:
        assert json.dumps(cleaned.quality, sort_keys=True) == json.dumps(quality, sort_keys=True)
        assert (cleaned.step_ns, cleaned.max_gap_ns) == (whole.step_ns, whole.max_gap_ns)
        span = cleaned.grid_span()
        assert span == (whole.first_index, whole.first_index + whole.n_snapshots - 1)
        seen = 0
        for window in cleaned.spill.windows(max_rows):
            for context in (0, 3):
                part = cleaned.window(window, context, span)
                start = part.first_index - whole.first_index
                same = whole.window(start, start + part.n_snapshots)
                assert (part.first_index, part.n_snapshots) == (same.first_index, same.n_snapshots)
                for name in ("snap", "obj", "role", "x", "y"):
                    np.testing.assert_array_equal(getattr(part, name), getattr(same, name))
                np.testing.assert_array_equal(part.objects, whole.objects)
                np.testing.assert_array_equal(part.roles, whole.roles)
                if context == 0:
                    seen += part.n_entries
        assert seen == whole.n_entries
        assert str(cleaned.spill.plan.metric_crs) == str(whole.metric_crs)
    finally:
        cleaned.remove()
    assert not cleaned.spill.folder.exists()
    return cleaned


def _scenario(name):
    truth = json.loads((SCENARIOS_DIR / name / "truth.json").read_text())
    columns = ColumnSpec(**{k: v for k, v in truth["columns"].items()
                            if k in ColumnSpec.__dataclass_fields__})  # fmt: skip
    params = truth["parameters"]
    return str(SCENARIOS_DIR / name / truth["input"]), columns, params


@pytest.mark.parametrize(("name", "chunk_s"), [("fleet", 1800.0), ("herd", 3 * 86400.0),
                                              ("small_sided_game", 7.0)])  # fmt: skip
def test_windows_of_each_scenario_equal_the_whole_run(name, chunk_s):
    source, columns, params = _scenario(name)
    alignment = AlignParams(step=params["step"], max_gap=params["max_gap"])
    from comove.tracks.cleaning import CleanParams

    assert_same_run(source, columns, CleanParams(), alignment, chunk_s, block_rows=20_011)


def _messy(seed: int, n_obj: int = 12, n_t: int = 300) -> pd.DataFrame:
    """Random tracks with jittered times, holes, duplicates and speed spikes near every edge."""
    rng = np.random.default_rng(seed)
    rows = []
    for o in range(n_obj):
        t = np.sort(rng.choice(np.arange(n_t * 10), n_t, replace=False)) / 10.0
        x = np.cumsum(rng.normal(0, 1, n_t))
        y = np.cumsum(rng.normal(0, 1, n_t))
        spikes = rng.random(n_t) < 0.05
        x[spikes] += rng.choice([-400, 400], spikes.sum())
        role = np.where(rng.random(n_t) < 0.9, f"r{o % 3}", f"r{(o + 1) % 3}")
        rows.append(pd.DataFrame({"id": f"o{o:02d}", "time": t, "x": x, "y": y, "role": role}))
    frame = pd.concat(rows, ignore_index=True)
    dup = frame.sample(40, random_state=seed)
    conflict = frame.sample(15, random_state=seed + 1).assign(x=lambda d: d["x"] + 1.0)
    frame = pd.concat([frame, dup, conflict], ignore_index=True)
    frame.loc[frame.sample(10, random_state=seed + 2).index, "x"] = np.nan
    return frame.sample(frac=1.0, random_state=seed + 3).reset_index(drop=True)


@pytest.mark.parametrize("seed", range(3))
@pytest.mark.parametrize("chunk_s", [9.7, 25.0, 400.0])
def test_duplicates_spikes_and_default_step_are_decided_as_in_the_whole_run(seed, chunk_s):
    from comove.tracks.cleaning import CleanParams

    frame = _messy(seed)
    for max_speed, max_rows in ((None, None), (30.0, None), (30.0, 500)):
        cleaned = assert_same_run(frame, ColumnSpec(), CleanParams(max_speed=max_speed),
                                  AlignParams(), chunk_s, 331, max_rows)  # fmt: skip
        if max_speed is not None:
            assert cleaned.quality["dropped"]["speed_spike"] > 0
        assert cleaned.quality["dropped"]["conflicting_duplicate"] > 0


def test_lonlat_across_the_antimeridian_gets_the_whole_run_plane():
    from comove.tracks.cleaning import CleanParams

    frame = _messy(7).rename(columns={"x": "lon", "y": "lat"})
    frame["lon"] = np.mod(frame["lon"] * 0.001 + 180.0 + 180.0, 360.0) - 180.0
    frame["lat"] = frame["lat"] * 0.001 + 60.0
    assert_same_run(frame, ColumnSpec(), CleanParams(), AlignParams(step=1.0), 50.0, 500)


def test_an_object_whose_rows_all_conflict_leaves_the_codes_as_in_the_whole_run():
    from comove.tracks.cleaning import CleanParams

    frame = _messy(3)
    bad = pd.DataFrame({"id": "aaa", "time": [5.0, 5.0], "x": [0.0, 1.0], "y": 0.0,
                        "role": "lonely"})  # fmt: skip
    frame = pd.concat([bad, frame], ignore_index=True)
    cleaned = assert_same_run(frame, ColumnSpec(), CleanParams(), AlignParams(), 40.0, 200)
    assert "aaa" not in cleaned.objects and "lonely" not in cleaned.roles


def test_time_columns_written_two_ways_are_refused_in_one_line(tmp_path):
    a = pd.DataFrame({"id": "a", "time": ["2026-01-01T00:00:00Z"] * 3, "x": 0.0, "y": 0.0})
    b = pd.DataFrame({"id": "b", "time": ["1767225600"] * 3, "x": 0.0, "y": 0.0})
    a.to_csv(tmp_path / "a.csv", index=False)
    b.to_csv(tmp_path / "b.csv", index=False)
    before = set(_scratch_folders())
    with pytest.raises(InputError, match="write the time column one way"):
        spill_tracks(str(tmp_path / "*.csv"), ColumnSpec(require_role=False), 60 * S)
    assert set(_scratch_folders()) == before  # nothing left behind


def _scratch_folders():
    import tempfile
    from pathlib import Path

    return [p for p in Path(tempfile.gettempdir()).glob(SCRATCH_PREFIX + "*")]


def test_percentiles_follow_numpy_and_gap_tallies_join_exactly():
    # reference: numpy.percentile (linear rule) on the values at once
    rng = np.random.default_rng(0)
    for n in (1, 2, 5, 50, 2001):
        v = rng.integers(1, 10**12, n)
        ordered = np.sort(v)
        q = percentiles(n, ordered.__getitem__)
        ref = np.percentile(v, [10, 25, 50, 75, 90])
        assert q["median"] == pytest.approx(ref[2], rel=1e-12)
        assert q["p10"] == pytest.approx(ref[0], rel=1e-12)
        assert q["iqr"] == pytest.approx(ref[3] - ref[1], rel=1e-9)
    # tallies of windows joined in time order hold every gap, across edges too
    obj = np.repeat(np.arange(4), 50).astype(np.int32)
    t = np.concatenate([np.sort(rng.choice(10**6, 50, replace=False)) for _ in range(4)])
    whole = GapTally.of(obj, t, 4)
    order = np.argsort(t, kind="stable")
    cuts = [0, 2 * 10**5, 5 * 10**5, 10**6 + 1]
    parts = []
    for lo, hi in zip(cuts[:-1], cuts[1:], strict=True):
        sel = order[(t[order] >= lo) & (t[order] < hi)]
        sel = sel[np.argsort(obj[sel], kind="stable")]
        parts.append(GapTally.of(obj[sel], t[sel], 4))
    joined = parts[0].then(parts[1]).then(parts[2])
    assert joined.n == whole.n == 196
    for name in ("key", "count", "low", "high", "first", "last"):
        np.testing.assert_array_equal(getattr(joined, name), getattr(whole, name))
    tree = parts[0].then(parts[1].then(parts[2]))
    np.testing.assert_array_equal(tree.count, whole.count)


def test_chunk_settings_read_durations_and_refuse_nonsense():
    from comove.tracks.streaming import WindowParams

    assert WindowParams("2h").chunk_ns() == 2 * 3600 * S
    assert WindowParams("30min").chunk_ns() == 1800 * S
    assert WindowParams("1 day").chunk_ns() == 86400 * S
    assert WindowParams("900").chunk_ns() == 900 * S
    assert WindowParams("auto").chunk_ns() is None and WindowParams("whole").chunk_ns() is None
    for bad in ("0", "-1h", "soon", "inf", "nan"):
        with pytest.raises(InputError, match="chunk must be"):
            WindowParams(bad)
    with pytest.raises(InputError, match="scratch"):
        WindowParams(scratch="/no/such/folder")


def test_auto_windows_follow_the_memory_budget(tmp_path):
    from comove.tracks.streaming import (
        BYTES_PER_FIX,
        WindowParams,
        estimated_rows,
        plan_windows,
    )

    frame = _messy(1, n_obj=20, n_t=500)
    frame["time"] = pd.Timestamp("2026-05-01", tz="UTC") + pd.to_timedelta(frame["time"], "s")
    frame = frame.sort_values("time", kind="stable")
    frame.to_parquet(tmp_path / "t.parquet", row_group_size=1000)
    frame.to_csv(tmp_path / "t.csv", index=False)
    frame.to_csv(tmp_path / "t.csv.gz", index=False)
    n = len(frame)
    assert estimated_rows(str(tmp_path / "t.parquet")) == n  # from the metadata, exactly
    assert abs(estimated_rows(str(tmp_path / "t.csv")) - n) < 0.1 * n  # from size and lines
    assert estimated_rows(str(tmp_path / "t.csv.gz")) > 0
    assert estimated_rows(frame) is None  # in memory already
    auto = WindowParams()
    for name in ("t.parquet", "t.csv"):
        src = str(tmp_path / name)
        assert plan_windows(src, ColumnSpec(), auto, budget=n * BYTES_PER_FIX * 2) == (None, None)
        bucket, max_rows = plan_windows(src, ColumnSpec(), auto, budget=n * BYTES_PER_FIX // 5)
        assert max_rows == n // 5 and bucket >= S
        # the run over those windows equals the whole run
        from comove.tracks.cleaning import CleanParams

        spill = spill_tracks(src, ColumnSpec(), bucket)
        try:
            windows = spill.windows(max_rows)
            assert len(windows) >= 5
            assert all(sum(spill.counts.get(k, 0) for k in range(*w)) <= max_rows
                       or w[1] - w[0] == 1 for w in windows)  # fmt: skip
        finally:
            spill.remove()
        assert_same_run(src, ColumnSpec(), CleanParams(), AlignParams(), bucket / S, 400, max_rows)
    assert plan_windows(frame, ColumnSpec(), auto, budget=1) == (None, None)
    assert plan_windows(frame, ColumnSpec(), WindowParams("5min")) == (300 * S, None)


def test_windows_shorter_than_a_spike_decision_widen_their_margins(monkeypatch):
    # a speed-spike decision reads neighbours of neighbours over up to ten passes: with
    # windows holding one or two fixes of an object, the margins must widen
    import comove.tracks.streaming as streaming
    from comove.tracks.cleaning import CleanParams, clean_window

    widened = []

    def counting(*args, **kwargs):
        done = clean_window(*args, **kwargs)
        widened.append(done is None)
        return done

    monkeypatch.setattr(streaming, "clean_window", counting)
    frame = _messy(5, n_obj=3, n_t=60)
    cleaned = assert_same_run(frame, ColumnSpec(), CleanParams(max_speed=30.0), AlignParams(),
                              1.1, 97)  # fmt: skip
    assert any(widened) and cleaned.quality["dropped"]["speed_spike"] > 0


def test_input_with_no_usable_row_gets_the_whole_run_message():
    from comove.tracks.cleaning import CleanParams

    frame = pd.DataFrame({"id": ["a", "b", None], "time": ["x", "y", "z"], "x": 1.0, "y": 2.0,
                          "role": "r"})  # fmt: skip
    with pytest.raises(InputError) as whole:
        clean_fixes(read_tracks(frame))
    with pytest.raises(InputError) as windowed:  # every row unusable on its own
        spill_tracks(frame, ColumnSpec(), 60 * S, block_rows=2)
    assert str(windowed.value) == str(whole.value)
    assert "unparseable time" in str(whole.value)
    # every row well-formed, but every one a conflicting duplicate: dropped in cleaning
    clash = pd.DataFrame({"id": "a", "time": [5.0, 5.0, 9.0, 9.0], "x": [0.0, 1.0, 2.0, 3.0],
                          "y": 0.0, "role": "r"})  # fmt: skip
    with pytest.raises(InputError) as whole:
        clean_fixes(read_tracks(clash))
    spill = spill_tracks(clash, ColumnSpec(), 4 * S, block_rows=3)
    try:
        with pytest.raises(InputError) as windowed:
            spill.clean(CleanParams(), AlignParams())
    finally:
        spill.remove()
    assert str(windowed.value) == str(whole.value)
    assert "conflicting duplicate" in str(whole.value)

"""Results by period and area, end to end: periods cut episodes, areas hold objects inside."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest
from test_windows import assert_same_folders

from comove.io.results import overall
from comove.io.scenarios import mine_options
from comove.pipeline.core import groups, mine

T0 = 1_800_000_000  # epoch seconds of the scene's start


def walkers(n: int = 200) -> pd.DataFrame:
    """Two pairs walking east side by side at 1 m/s, 1 m apart; the pairs 40 m apart."""
    t = np.arange(n, dtype=float)
    rows = []
    for name, role, y in (("a1", "a", 0.0), ("b1", "b", 1.0), ("a2", "a", 40.0), ("b2", "b", 41.0)):
        rows.append(pd.DataFrame({"id": name, "time": T0 + t, "x": t, "y": y, "role": role}))
    return pd.concat(rows, ignore_index=True)


GROUPS = {"radius": 3.0, "step": 1.0, "links": "snapshot", "min_together_time": 10.0,
          "replicates": 0}  # fmt: skip


def test_a_period_boundary_cuts_an_episode_and_the_overall_rows_stay(tmp_path):
    periods = tmp_path / "periods.csv"
    periods.write_text(f"name,start,end\nearly,{T0},{T0 + 100}\nlate,{T0 + 100},{T0 + 200}\n")
    split = groups(walkers(), periods=str(periods), **GROUPS)
    plain = groups(walkers(), **GROUPS)
    pd.testing.assert_frame_equal(overall(split.episodes), plain.episodes)
    by = split.episodes.groupby("period")
    assert set(by.groups) == {"all", "early", "late"}
    for name, (first, last) in {"early": (0, 99), "late": (100, 199)}.items():
        part = by.get_group(name)
        assert len(part) == 2  # each pair, within the period only
        assert (part["start"] == pd.Timestamp((T0 + first) * 10**9, tz="UTC")).all()
        assert (part["end"] == pd.Timestamp((T0 + last) * 10**9, tz="UTC")).all()
    assert (split.episodes["area"] == "all").all()
    # the report describes the run over everything, and compares the parts in a section
    from comove.present.report import build_report

    page = build_report(split.write(tmp_path / "res")).read_text()
    assert "By period and area" in page and "early / all" in page and "late / all" in page
    assert page.count("<h2>Episodes") <= 1


def test_an_object_counts_in_an_area_only_while_inside(tmp_path):
    # the west area holds x <= 100 of the first pair's lane only: the second pair is never
    # in it, and the first pair leaves it halfway
    areas = tmp_path / "areas.geojson"
    square = [[[-5, -5], [100, -5], [100, 5], [-5, 5], [-5, -5]]]
    areas.write_text(json.dumps({"type": "FeatureCollection", "features": [
        {"type": "Feature", "properties": {"zone": "west lane"},
         "geometry": {"type": "Polygon", "coordinates": square}}]}))  # fmt: skip
    with pytest.warns(UserWarning, match="read as the tracks' x/y"):
        found = groups(walkers(), areas=str(areas), area_name="zone", **GROUPS)
    inside = found.episodes[found.episodes["area"] == "west lane"]
    assert inside["members"].tolist() == ["a1;b1"]
    assert inside["duration_s"].tolist() == [101.0]  # x = 0 .. 100: 101 snapshots, edge in
    with pytest.warns(UserWarning):
        mined = mine(walkers(), radius=3.0, step=1.0, areas=str(areas), area_name="zone")
    rows = mined.patterns.set_index(["period", "area"])
    assert rows.loc[("all", "west lane"), "present_snapshots"] == 101
    assert rows.loc[("all", "all"), "present_snapshots"] == 200
    dyads = found.dyads[found.dyads["area"] == "west lane"]
    assert dyads[["object_a", "object_b"]].values.tolist() == [["a1", "b1"]]


@pytest.mark.parametrize("command", ["mine", "groups"])
def test_zones_over_windows_write_the_whole_run_files(command, tmp_path):
    source, options = mine_options("herd")
    run = {"periods": "day-night", "replicates": 0, "seed": 1}
    if command == "mine":
        results = [mine(source, chunk=chunk, **options, **run) for chunk in ("whole", "5 days")]
    else:
        kept = {k: options[k] for k in ("id", "time", "lon", "lat", "role", "radius")}
        results = [groups(source, preset="collars", chunk=chunk, **kept, **run)
                   for chunk in ("whole", "5 days")]  # fmt: skip
    for result, name in zip(results, ("whole", "windowed"), strict=True):
        result.write(tmp_path / name)
    table = results[0].patterns if command == "mine" else results[0].episodes
    assert {"day", "night", "all"} == set(table["period"])
    assert_same_folders(tmp_path / "whole", tmp_path / "windowed")

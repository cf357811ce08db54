from __future__ import annotations

import calendar
import json
from datetime import datetime, timedelta, timezone
from decimal import Decimal
from pathlib import Path

import numpy as np
import pandas as pd
import pyproj
import pytest

from comove.errors import InputError
from comove.io.reading import ColumnSpec, RawTracks, read_tracks
from comove.tracks.cleaning import DROP_REASONS, CleanParams, Fixes, clean_fixes
from comove.tracks.quality import format_quality_summary

T0 = 1_772_366_400  # 2026-03-01T12:00:00Z in epoch seconds (checked against calendar below)
NS = 1_000_000_000


def _planar(rows: list[tuple], **spec: object) -> tuple[Fixes, dict]:
    frame = pd.DataFrame(rows, columns=["id", "t", "x", "y", "role"])
    params = spec.pop("params", None)
    return clean_fixes(read_tracks(frame, ColumnSpec(**spec)), params)  # type: ignore[arg-type]


def _check_invariants(fixes: Fixes, quality: dict) -> None:
    assert quality["rows_read"] == quality["rows_kept"] + sum(quality["dropped"].values())
    assert set(quality["dropped"]) == set(DROP_REASONS)
    assert fixes.n_fixes == quality["rows_kept"]
    assert fixes.obj.dtype == np.int32 and fixes.role.dtype == np.int32
    assert fixes.time.dtype == np.int64
    assert fixes.x.dtype == np.float64 and fixes.y.dtype == np.float64
    order = np.lexsort((fixes.time, fixes.obj))
    assert np.array_equal(order, np.arange(fixes.n_fixes))
    same = fixes.obj[1:] == fixes.obj[:-1]
    assert np.all(np.diff(fixes.time)[same] > 0)
    assert list(fixes.objects) == sorted(fixes.objects)
    assert list(fixes.roles) == sorted(fixes.roles)
    assert set(np.unique(fixes.obj)) == set(range(len(fixes.objects)))
    assert set(np.unique(fixes.role)) == set(range(len(fixes.roles)))
    json.dumps(quality)


# --------------------------------------------------------------------------- drop reasons


def test_each_drop_reason_is_counted() -> None:
    rows = [
        ("a", T0 + 0, 0.0, 0.0, "r"),  # kept
        ("a", T0 + 1, 1.0, 0.0, "r"),  # kept
        (None, T0 + 2, 2.0, 0.0, "r"),  # missing_id
        ("a", T0 + 3, 3.0, 0.0, None),  # missing_role
        ("a", T0 + 4, np.nan, 0.0, "r"),  # missing_coordinates
        ("a", T0 + 5, 5.0, np.inf, "r"),  # missing_coordinates
        ("a", "whenever", 6.0, 0.0, "r"),  # unparseable_time
        ("a", T0 + 1, 1.0, 0.0, "r"),  # exact_duplicate of row 2
        ("b", T0 + 0, 0.0, 0.0, "s"),  # conflicting_duplicate
        ("b", T0 + 0, 0.0, 9.0, "s"),  # conflicting_duplicate
        ("b", T0 + 1, 0.0, 9.0, "s"),  # kept
        ("b", T0 + 2, 0.0, 9.0, "t"),  # kept
    ]
    fixes, quality = _planar(rows)
    _check_invariants(fixes, quality)
    assert quality["dropped"] == {
        "missing_id": 1,
        "missing_role": 1,
        "missing_coordinates": 2,
        "coordinates_out_of_range": 0,
        "time_out_of_range": 0,
        "unparseable_time": 1,
        "exact_duplicate": 1,
        "conflicting_duplicate": 2,
        "speed_spike": 0,
    }
    assert quality["merged"] == {"exact_duplicate": 1}
    assert quality["rows_read"] == 12 and quality["rows_kept"] == 4
    examples = quality["examples"]
    assert examples["missing_coordinates"] == [
        {"source": "<DataFrame>", "row": 5},
        {"source": "<DataFrame>", "row": 6},
    ]
    assert examples["exact_duplicate"] == [{"source": "<DataFrame>", "row": 8}]
    assert [e["row"] for e in examples["conflicting_duplicate"]] == [9, 10]
    assert examples["speed_spike"] == []
    assert list(fixes.objects) == ["a", "b"]
    assert list(fixes.roles) == ["r", "s", "t"]
    assert quality["objects"] == 2 and quality["roles"] == 3
    assert quality["role_names"] == ["r", "s", "t"]


def test_missing_role_is_not_a_reason_when_roles_are_optional() -> None:
    rows = [("a", T0, 0.0, 0.0, None), ("a", T0 + 1, 1.0, 0.0, "r")]
    fixes, quality = _planar(rows, require_role=False)
    assert quality["dropped"]["missing_role"] == 0
    assert list(fixes.roles) == ["", "r"]


def test_coordinates_out_of_range_for_lonlat() -> None:
    frame = pd.DataFrame(
        {
            "id": ["a"] * 5,
            "t": [T0 + i for i in range(5)],
            "lon": [10.0, 10.001, 181.0, 10.0, -180.0],
            "lat": [50.0, 50.0, 50.0, -90.5, 50.0],
            "role": ["r"] * 5,
        }
    )
    fixes, quality = clean_fixes(read_tracks(frame))
    _check_invariants(fixes, quality)
    assert quality["dropped"]["coordinates_out_of_range"] == 2
    assert [e["row"] for e in quality["examples"]["coordinates_out_of_range"]] == [3, 4]


def test_planar_coordinates_beyond_any_place_on_earth_are_out_of_range() -> None:
    # 1e300 m once reached the k-d tree and broke its arithmetic; 2e7 m (half the equator)
    # is a real projected coordinate and stays
    frame = pd.DataFrame(
        {
            "id": ["a"] * 4,
            "t": [T0 + i for i in range(4)],
            "x": [0.0, 1e300, 2.0e7, -3e8],
            "y": [0.0, 0.0, 1.0, 0.0],
            "role": ["r"] * 4,
        }
    )
    fixes, quality = clean_fixes(read_tracks(frame))
    _check_invariants(fixes, quality)
    assert quality["dropped"]["coordinates_out_of_range"] == 2
    assert [e["row"] for e in quality["examples"]["coordinates_out_of_range"]] == [2, 4]
    assert fixes.x.tolist() == [0.0, 2.0e7]


def test_conflicting_duplicate_also_removes_a_merged_copy() -> None:
    rows = [
        ("a", T0, 0.0, 0.0, "r"),
        ("a", T0, 0.0, 0.0, "r"),
        ("a", T0, 5.0, 0.0, "r"),
        ("a", T0, 0.0, 0.0, "q"),  # same place, other role: also a conflict
        ("a", T0 + 1, 0.0, 0.0, "r"),
    ]
    fixes, quality = _planar(rows)
    _check_invariants(fixes, quality)
    assert quality["dropped"]["exact_duplicate"] == 1
    assert quality["dropped"]["conflicting_duplicate"] == 3
    assert fixes.time.tolist() == [(T0 + 1) * NS]


def test_no_surviving_rows_names_source_and_main_reason(tmp_path: Path) -> None:
    path = tmp_path / "bad_times.csv"
    path.write_text("id,t,x,y,role\na,01/03/2026 12:00,0,0,r\nb,yesterday,1,1,r\nc,,1,1,\n")
    with pytest.raises(InputError) as err:
        clean_fixes(read_tracks(path))
    message = str(err.value)
    assert str(path.resolve()) in message
    assert "unparseable time" in message and "ISO 8601" in message and "--time" in message
    assert "row 1" in message
    assert "\n" not in message


def test_clean_params_validation() -> None:
    assert CleanParams(max_speed=3).max_speed == 3
    for bad in (0.0, -1.0, float("inf"), float("nan"), True):
        with pytest.raises(InputError, match="--max-speed"):
            CleanParams(max_speed=bad)


# --------------------------------------------------------------------------- times


def test_known_timestamp_end_to_end(tmp_path: Path) -> None:
    # Independent check of the constant with the standard library.
    assert calendar.timegm((2026, 3, 1, 12, 0, 0)) == T0
    path = tmp_path / "one.csv"
    path.write_text("id,time,x,y,role\nw1,2026-03-01T12:00:00Z,0,0,walker\n")
    fixes, quality = clean_fixes(read_tracks(path))
    assert fixes.time.tolist() == [T0 * NS]
    assert quality["time_start"] == quality["time_end"] == "2026-03-01T12:00:00Z"
    assert quality["zone_less_times"] == 0 and quality["time_note"] is None


def test_iso_strings_with_offsets_and_zone_less(tmp_path: Path) -> None:
    path = tmp_path / "zones.csv"
    path.write_text(
        "id,time,x,y,role\n"
        "w1,2026-03-01T12:00:00Z,0,0,r\n"
        "w1,2026-03-01T14:00:01+02:00,0,0,r\n"
        "w1,2026-03-01T12:00:02,0,0,r\n"
        "w1,2026-03-01 12:00:03.5,0,0,r\n"
        "w1,2026-03-01T08:00:04-0400,0,0,r\n"
        "w1,2026-03-01 12:00:05 UTC,0,0,r\n"
    )
    fixes, quality = clean_fixes(read_tracks(path))
    expected = np.array([0, 1, 2, 3.5, 4, 5]) * NS + T0 * NS
    assert fixes.time.tolist() == expected.astype(np.int64).tolist()
    assert quality["zone_less_times"] == 2
    assert "2 kept rows" in quality["time_note"] and "UTC" in quality["time_note"]
    assert quality["time_input"] == "ISO 8601 text"
    assert quality["time_end"] == "2026-03-01T12:00:05Z"


@pytest.mark.parametrize(
    ("values", "unit", "kind"),
    [
        ([T0, T0 + 1], None, "epoch seconds"),
        ([T0 * 1000, T0 * 1000 + 1500], None, "epoch milliseconds"),
        ([float(T0), T0 + 0.25], None, "epoch seconds"),
        (["1772366400", "1772366401"], None, "epoch seconds"),
        (["1772366400123", "1772366400124.5"], None, "epoch milliseconds"),
        ([1.5e11, 1.5e11 + 1], None, "epoch milliseconds"),
        ([1000, 2000], "ms", "epoch milliseconds"),
    ],
)
def test_epoch_numbers(values: list, unit: str | None, kind: str) -> None:
    rows = [("a", v, float(i), 0.0, "r") for i, v in enumerate(values)]
    fixes, quality = _planar(rows, time_unit=unit)
    assert quality["time_input"] == kind
    factor = {"epoch seconds": NS, "epoch milliseconds": NS // 1000}[kind]
    # Decimal arithmetic gives the exact expected nanoseconds.
    assert fixes.time.tolist() == [int(Decimal(str(v)) * factor) for v in values]
    assert quality["zone_less_times"] == 0


def test_epoch_too_large_is_out_of_range() -> None:
    rows = [("a", T0, 0.0, 0.0, "r"), ("a", 1e30, 1.0, 0.0, "r")]
    _, quality = _planar(rows)
    assert quality["dropped"]["time_out_of_range"] == 1
    assert quality["dropped"]["unparseable_time"] == 0


def test_valid_iso_years_beyond_nanoseconds_are_named_as_such() -> None:
    # years 0001 and 9999 are valid ISO 8601 but beyond int64 nanoseconds: once called
    # "unparseable"; a text that is no date stays unparseable
    frame = pd.DataFrame({
        "id": ["a"] * 5, "role": "r", "x": [0.0, 1.0, 2.0, 3.0, 4.0], "y": 0.0,
        "t": ["2026-03-01T12:00:00Z", "0001-01-01T00:00:00Z", "9999-12-31",
              "2026-03-01T12:00:01Z", "soon"],
    })  # fmt: skip
    _, quality = clean_fixes(read_tracks(frame))
    assert quality["dropped"]["time_out_of_range"] == 2
    assert quality["dropped"]["unparseable_time"] == 1
    assert [e["row"] for e in quality["examples"]["time_out_of_range"]] == [2, 3]


def test_naive_datetime64_is_utc_and_counted_as_zone_less() -> None:
    frame = pd.DataFrame(
        {
            "id": ["a", "a"],
            "t": pd.to_datetime(["2026-03-01T12:00:00", "2026-03-01T12:00:01"]),
            "x": [0.0, 1.0],
            "y": [0.0, 0.0],
            "role": ["r", "r"],
        }
    )
    assert frame["t"].dtype != "datetime64[ns]"  # pandas 3 parses strings to microseconds
    fixes, quality = clean_fixes(read_tracks(frame))
    assert fixes.time.tolist() == [T0 * NS, (T0 + 1) * NS]
    assert quality["time_input"] == "datetimes"
    assert quality["zone_less_times"] == 2


def test_tz_aware_datetimes_are_converted() -> None:
    berlin = pd.Series(
        pd.to_datetime(["2026-03-01T13:00:00", "2026-03-01T13:00:01"]).tz_localize("Europe/Berlin")
    )
    frame = pd.DataFrame(
        {"id": ["a", "a"], "t": berlin, "x": [0.0, 1.0], "y": [0.0, 0.0], "role": ["r", "r"]}
    )
    fixes, quality = clean_fixes(read_tracks(frame))
    assert fixes.time.tolist() == [T0 * NS, (T0 + 1) * NS]
    assert quality["zone_less_times"] == 0


def test_python_datetime_objects() -> None:
    plus2 = timezone(timedelta(hours=2))
    times = [datetime(2026, 3, 1, 14, 0, 0, tzinfo=plus2), datetime(2026, 3, 1, 12, 0, 1)]
    rows = [("a", t, float(i), 0.0, "r") for i, t in enumerate(times)]
    frame = pd.DataFrame(rows, columns=["id", "t", "x", "y", "role"]).astype({"t": object})
    fixes, _ = clean_fixes(read_tracks(frame))
    assert fixes.time.tolist() == [T0 * NS, (T0 + 1) * NS]


# --------------------------------------------------------------------------- speed spikes


def _track(n: int, speed: float, dt: float = 1.0) -> list[tuple]:
    return [("f", T0 + i * dt, speed * i * dt, 0.0, "r") for i in range(n)]


def test_fast_but_smooth_track_is_kept() -> None:
    fixes, quality = _planar(_track(20, speed=30.0), params=CleanParams(max_speed=40.0))
    assert quality["rows_kept"] == 20
    assert quality["dropped"]["speed_spike"] == 0
    assert quality["speed_spike_passes"] == 1


def test_spike_in_the_middle_and_at_the_ends_are_removed() -> None:
    rows = _track(10, speed=5.0)
    rows[4] = ("f", rows[4][1], rows[4][2], 5_000.0, "r")  # a jump 5 km sideways and back
    rows[0] = ("f", rows[0][1], -3_000.0, 0.0, "r")  # a wild first fix
    rows[9] = ("f", rows[9][1], 45.0, 4_000.0, "r")  # a wild last fix
    fixes, quality = _planar(rows, params=CleanParams(max_speed=20.0))
    _check_invariants(fixes, quality)
    assert quality["dropped"]["speed_spike"] == 3
    assert sorted(e["row"] for e in quality["examples"]["speed_spike"]) == [1, 5, 10]
    assert fixes.time.tolist() == [(T0 + i) * NS for i in (1, 2, 3, 5, 6, 7, 8)]


def test_end_fix_next_to_a_spike_survives_a_second_pass() -> None:
    rows = _track(5, speed=2.0)
    rows[1] = ("f", rows[1][1], 2.0, 900.0, "r")  # spike right after the first fix
    fixes, quality = _planar(rows, params=CleanParams(max_speed=10.0))
    assert quality["dropped"]["speed_spike"] == 1
    assert quality["examples"]["speed_spike"] == [{"source": "<DataFrame>", "row": 2}]
    assert quality["speed_spike_passes"] == 2
    assert fixes.n_fixes == 4


def test_spikes_are_judged_per_object() -> None:
    # Two objects far apart: the jump between one's last fix and the other's first is no spike.
    rows = _track(3, speed=1.0) + [("g", T0 + i, 1e5 + i, 0.0, "r") for i in range(3)]
    _, quality = _planar(rows, params=CleanParams(max_speed=5.0))
    assert quality["dropped"]["speed_spike"] == 0


def test_without_max_speed_nothing_is_filtered() -> None:
    rows = _track(5, speed=1.0)
    rows[2] = ("f", rows[2][1], 0.0, 1e6, "r")
    _, quality = _planar(rows)
    assert quality["rows_kept"] == 5 and quality["speed_spike_passes"] == 0


# --------------------------------------------------------------------------- output


def test_output_sorted_and_codes_contiguous() -> None:
    rng = np.random.default_rng(11)
    rows = [
        (obj, T0 + t, float(t), float(k), role)
        for k, (obj, role) in enumerate([("z9", "b"), ("a1", "a"), ("m5", "b")])
        for t in range(6)
    ]
    shuffled = [rows[i] for i in rng.permutation(len(rows))]
    fixes, quality = _planar(shuffled)
    _check_invariants(fixes, quality)
    assert list(fixes.objects) == ["a1", "m5", "z9"]
    assert fixes.obj.tolist() == [0] * 6 + [1] * 6 + [2] * 6
    assert fixes.role.tolist() == [0] * 6 + [1] * 12
    assert fixes.y.tolist() == [1.0] * 6 + [2.0] * 6 + [0.0] * 6


def test_codes_skip_objects_that_lost_every_fix() -> None:
    rows = [("a", T0, 0.0, 0.0, "r"), ("b", T0, np.nan, 0.0, "q"), ("c", T0, 1.0, 1.0, "r")]
    fixes, quality = _planar(rows)
    assert list(fixes.objects) == ["a", "c"] and list(fixes.roles) == ["r"]
    assert fixes.obj.tolist() == [0, 1]
    assert quality["objects"] == 2


def test_planar_passes_through() -> None:
    fixes, quality = _planar([("a", T0, 3.5, -2.0, "r"), ("a", T0 + 2, 4.5, -2.0, "r")])
    assert fixes.x.tolist() == [3.5, 4.5] and fixes.y.tolist() == [-2.0, -2.0]
    assert fixes.metric_crs is None and fixes.input_crs is None
    assert quality["coordinates"] == {
        "input": "planar",
        "input_crs": None,
        "working_crs": "planar metres",
    }


def test_lonlat_is_projected_to_true_metres() -> None:
    # Reference distance: pyproj's WGS84 geodesic.
    geod = pyproj.Geod(ellps="WGS84")
    lon1, lat1, _ = geod.fwd(-70.0, -33.0, 60.0, 250.0)
    frame = pd.DataFrame(
        {
            "id": ["a", "a"],
            "t": [T0, T0 + 60],
            "lon": [-70.0, lon1],
            "lat": [-33.0, lat1],
            "role": ["r", "r"],
        }
    )
    fixes, quality = clean_fixes(read_tracks(frame))
    assert np.hypot(np.diff(fixes.x), np.diff(fixes.y))[0] == pytest.approx(250.0, rel=1e-6)
    assert fixes.input_crs == "EPSG:4326"
    assert "+proj=laea" in quality["coordinates"]["working_crs"]
    assert quality["sampling_interval_s"] == {"median": 60.0, "p10": 60.0, "p90": 60.0, "iqr": 0}


def test_planar_geo_file_keeps_its_crs() -> None:
    import geopandas as gpd

    gdf = gpd.GeoDataFrame(
        {"id": ["a", "a"], "t": [T0, T0 + 1], "role": ["r", "r"]},
        geometry=gpd.points_from_xy([500_000.0, 500_010.0], [5_540_000.0, 5_540_000.0]),
        crs=32632,
    )
    fixes, quality = clean_fixes(read_tracks(gdf))
    assert fixes.x.tolist() == [500_000.0, 500_010.0]
    assert fixes.metric_crs == pyproj.CRS.from_epsg(32632)
    assert fixes.input_crs == "EPSG:32632"
    assert quality["coordinates"]["working_crs"] == "EPSG:32632"


def test_quality_report_and_summary() -> None:
    rows = [("a", T0 + 10 * i, float(i), 0.0, "r") for i in range(5)]
    rows += [("b", T0 + 2 * i, float(i), 1.0, "s") for i in range(5)]
    rows += [("b", T0, float(0), 1.0, "s"), ("c", T0, np.nan, 0.0, "s")]
    fixes, quality = _planar(rows)
    _check_invariants(fixes, quality)
    assert quality["time_span_s"] == 40.0
    interval = quality["sampling_interval_s"]
    gaps = np.array([10.0] * 4 + [2.0] * 4)
    assert interval["median"] == float(np.median(gaps))
    assert interval["p10"] == 2.0 and interval["p90"] == 10.0
    assert interval["iqr"] == 8.0
    assert quality["sources"] == ["<DataFrame>"]
    text = format_quality_summary(quality)
    assert "12 read, 10 kept, 2 dropped" in text
    assert "exact duplicate (merged) 1" in text and "missing coordinates 1" in text
    assert "missing id" not in text  # reasons that did not occur are left out
    assert "objects: 2; roles: 2 (r, s)" in text
    assert "2026-03-01T12:00:00Z to 2026-03-01T12:00:40Z" in text
    assert "median 6 s" in text


def test_float_epoch_seconds_keep_microseconds_and_land_on_a_regular_grid() -> None:
    # 25 Hz samples as float seconds: each must be an exact multiple of 40 ms after parsing
    t = 1_790_000_000 + np.arange(500) * 0.04
    frame = pd.DataFrame({"id": "a", "time": t, "x": np.arange(500.0), "y": 0.0, "role": "r"})
    fixes, _ = clean_fixes(read_tracks(frame))
    assert np.all(fixes.time % 40_000_000 == 0)
    one = pd.DataFrame(
        {"id": ["a"], "time": [1772366400.123456], "x": [0.0], "y": [0.0], "role": ["r"]}
    )
    assert clean_fixes(read_tracks(one))[0].time[0] == 1_772_366_400_123_456_000


# --------------------------------------------------------------------------- fast paths
# Inputs that take a shortcut (see docs/performance.md) and inputs that do not give alike results.


def test_categorical_and_parquet_text_times_parse_as_plain_text(tmp_path: Path) -> None:
    # Parquet text columns arrive as categoricals, whose distinct values are parsed once.
    times = [
        "2026-03-01T12:00:00Z",
        "2026-03-01T12:00:01",  # zone-less: UTC
        "not a time",
        None,
        "2026-03-01T12:00:00Z",
        "2026-03-01 13:00:02+01:00",
    ]
    frame = pd.DataFrame(
        {"id": list("aaaabb"), "t": times, "x": np.arange(6.0), "y": 0.0, "role": "r"}
    )
    frame.to_parquet(tmp_path / "t.parquet", index=False)
    from_parquet = read_tracks(tmp_path / "t.parquet")
    assert isinstance(from_parquet.frame["time"].dtype, pd.CategoricalDtype)
    for raw in (read_tracks(frame), read_tracks(frame.astype({"t": "category"})), from_parquet):
        fixes, quality = clean_fixes(raw)
        assert fixes.time.tolist() == [T0 * NS, (T0 + 1) * NS, T0 * NS, (T0 + 2) * NS]
        assert fixes.x.tolist() == [0.0, 1.0, 4.0, 5.0]
        assert quality["dropped"]["unparseable_time"] == 2
        assert quality["zone_less_times"] == 1
        assert quality["time_input"] == "ISO 8601 text"


def test_unsorted_categorical_ids_and_roles_get_sorted_codes() -> None:
    # The reader hands over sorted categories, whose codes are kept; other orders are ranked.
    frame = pd.DataFrame(
        {
            "object": pd.Categorical(["b", "a", "b", None], categories=["b", "a"]),
            "time": [T0, T0, T0 + 1, T0],
            "x": [0.0, 1.0, 2.0, 3.0],
            "y": 0.0,
            "role": pd.Categorical(["s", "r", "s", "r"], categories=["s", "r"]),
        }
    )
    raw = RawTracks(frame, coords="planar", crs=None, sources=["<hand-made>"], columns={})
    fixes, quality = clean_fixes(raw)
    _check_invariants(fixes, quality)
    assert fixes.objects.tolist() == ["a", "b"] and fixes.roles.tolist() == ["r", "s"]
    assert fixes.obj.tolist() == [0, 1, 1] and fixes.role.tolist() == [0, 1, 1]
    assert fixes.x.tolist() == [1.0, 0.0, 2.0]
    assert quality["dropped"]["missing_id"] == 1


def test_coordinates_that_are_not_floats_are_converted() -> None:
    # The reader hands over float64 coordinates, used as they are; others are converted.
    frame = pd.DataFrame(
        {
            "object": ["a", "a", "a"],
            "time": [T0, T0 + 1, T0 + 2],
            "x": ["1.5", "abc", "2"],
            "y": [3, 4, 5],
            "role": ["r", "r", "r"],
        }
    )
    raw = RawTracks(frame, coords="planar", crs=None, sources=["<hand-made>"], columns={})
    fixes, quality = clean_fixes(raw)
    assert fixes.x.tolist() == [1.5, 2.0] and fixes.y.tolist() == [3.0, 5.0]
    assert quality["dropped"]["missing_coordinates"] == 1


@pytest.mark.parametrize("n_objects", [50, 2**15 + 3])
@pytest.mark.parametrize("layout", ["object-major", "time-major", "shuffled"])
def test_rows_in_any_order_are_sorted_by_object_and_time(n_objects: int, layout: str) -> None:
    # Rows already in (object, time) or in time order skip a sort; below 2**15 objects
    # the object codes are sorted as 16-bit integers.
    obj = np.repeat(np.arange(n_objects), 3)
    step = np.tile(np.arange(3), n_objects)
    if layout == "time-major":
        order = np.lexsort((obj, step))
    elif layout == "shuffled":
        order = np.random.default_rng(n_objects).permutation(obj.size)
    else:
        order = np.arange(obj.size)
    frame = pd.DataFrame(
        {
            "id": np.char.add("o", np.char.zfill(obj[order].astype(str), 5)),
            "t": T0 + step[order],
            "x": (obj * 3 + step)[order].astype(float),
            "y": 0.0,
            "role": "r",
        }
    )
    fixes, quality = clean_fixes(read_tracks(frame))
    _check_invariants(fixes, quality)
    assert len(fixes.objects) == n_objects
    assert np.array_equal(fixes.x, np.arange(3.0 * n_objects))


def test_a_stray_bad_row_gets_no_note_but_a_share_does() -> None:
    import warnings

    from comove.errors import ComoveNote

    def frame(n_bad: int) -> pd.DataFrame:
        x = [float(i) for i in range(200)]
        x[:n_bad] = [np.nan] * n_bad
        return pd.DataFrame({"id": ["a"] * 200, "t": [T0 + i for i in range(200)], "x": x,
                             "y": 0.0, "role": "r"})  # fmt: skip

    with warnings.catch_warnings():
        warnings.simplefilter("error", ComoveNote)
        clean_fixes(read_tracks(frame(2)))  # 1 %: within the share, no note
    with pytest.warns(ComoveNote, match=r"3 of 200 rows \(1.5%\) were dropped for missing coord"):
        clean_fixes(read_tracks(frame(3)))

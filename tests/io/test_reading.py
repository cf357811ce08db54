from __future__ import annotations

import warnings
from pathlib import Path

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest

from comove.errors import InputError
from comove.io.reading import ColumnSpec, RawTracks, read_tracks

with warnings.catch_warnings():
    # movingpandas warns about optional extras it does not need here.
    warnings.simplefilter("ignore")
    import movingpandas as mpd


def _table() -> pd.DataFrame:
    """Two invented walkers, three fixes each, in planar metres."""
    return pd.DataFrame(
        {
            "player": ["p7", "p7", "p7", "q2", "q2", "q2"],
            "t": [
                "2026-03-01T12:00:00Z",
                "2026-03-01T12:00:01Z",
                "2026-03-01T12:00:02Z",
                "2026-03-01T12:00:00Z",
                "2026-03-01T12:00:01Z",
                "2026-03-01T12:00:02Z",
            ],
            "x": [0.0, 1.0, 2.0, 10.0, 11.0, 12.0],
            "y": [0.0, 0.5, 1.0, 5.0, 5.0, 5.0],
            "role": ["keeper", "keeper", "keeper", "runner", "runner", "runner"],
        }
    )


def _lonlat_gdf(crs: str | int = 4326) -> gpd.GeoDataFrame:
    df = pd.DataFrame(
        {
            "animal": ["a1", "a1", "b9", "b9"],
            "time": pd.date_range("2026-03-01", periods=4, freq="min", tz="UTC"),
            "species": ["heron", "heron", "crane", "crane"],
        }
    )
    lon = np.array([10.0, 10.001, 10.002, 10.003])
    lat = np.array([60.0, 60.0, 60.001, 60.001])
    gdf = gpd.GeoDataFrame(df, geometry=gpd.points_from_xy(lon, lat), crs=4326)
    return gdf if crs == 4326 else gdf.to_crs(crs)


def _check_standard(raw: RawTracks, coords: str) -> None:
    pair = ["lon", "lat"] if coords == "lonlat" else ["x", "y"]
    assert raw.coords == coords
    assert list(raw.frame.columns) == ["object", "time", *pair, "role", "source"]
    assert raw.frame[pair[0]].dtype == np.float64


# --------------------------------------------------------------------------- formats


def test_csv_reads_standard_columns(tmp_path: Path) -> None:
    path = tmp_path / "walk.csv"
    _table().to_csv(path, index=False)
    raw = read_tracks(path)
    _check_standard(raw, "planar")
    assert raw.frame["object"].tolist() == ["p7"] * 3 + ["q2"] * 3
    # Times stay text so cleaning can see whether each carried a zone.
    assert raw.frame["time"].iloc[0] == "2026-03-01T12:00:00Z"
    assert raw.frame["x"].tolist() == [0.0, 1.0, 2.0, 10.0, 11.0, 12.0]
    assert raw.frame["source"].astype(str).unique().tolist() == [str(path)]
    assert raw.source_rows(np.arange(6)).tolist() == [1, 2, 3, 4, 5, 6]
    assert raw.sources == [str(path.resolve())]
    assert raw.columns == {"id": "player", "time": "t", "x": "x", "y": "y", "role": "role"}
    assert raw.crs is None


@pytest.mark.parametrize("suffix", [".tsv", ".tab"])
def test_tab_separated(tmp_path: Path, suffix: str) -> None:
    path = tmp_path / f"walk{suffix}"
    _table().to_csv(path, index=False, sep="\t")
    raw = read_tracks(path)
    assert raw.frame["role"].tolist()[-1] == "runner"
    assert len(raw.frame) == 6


@pytest.mark.parametrize(("suffix", "sep"), [(".txt", ";"), (".csv", ";"), (".txt", "\t")])
def test_delimiter_is_sniffed(tmp_path: Path, suffix: str, sep: str) -> None:
    path = tmp_path / f"walk{suffix}"
    _table().to_csv(path, index=False, sep=sep)
    raw = read_tracks(path)
    assert raw.frame["y"].tolist() == [0.0, 0.5, 1.0, 5.0, 5.0, 5.0]


def test_csv_ids_keep_leading_zeros_and_bad_coordinates_become_nan(tmp_path: Path) -> None:
    path = tmp_path / "odd.csv"
    path.write_text(
        "id,time,x,y,role\n007,1772366400,1.5,2,a\n,1772366401,n/a,3,a\n 8 ,1772366402,4,5,\n"
    )
    raw = read_tracks(path)
    assert raw.frame["object"].iloc[0] == "007"
    assert pd.isna(raw.frame["object"].iloc[1])
    assert raw.frame["object"].iloc[2] == "8"
    assert np.isnan(raw.frame["x"].iloc[1])
    assert pd.isna(raw.frame["role"].iloc[2])
    assert raw.frame["time"].iloc[0] == "1772366400"


def test_a_text_cell_in_a_coordinate_column_becomes_nan(tmp_path: Path) -> None:
    # Coordinates are read as floats; a column that cannot be is read as text and converted.
    path = tmp_path / "odd.csv"
    path.write_text("id,time,x,y,role\na,0,1.5,2,r\na,1,oops,3,r\na,2,-4e1,4,r\n")
    raw = read_tracks(path)
    assert raw.frame["x"].dtype == np.float64 and raw.frame["y"].dtype == np.float64
    assert raw.frame["x"].tolist()[::2] == [1.5, -40.0] and np.isnan(raw.frame["x"].iloc[1])
    assert raw.frame["y"].tolist() == [2.0, 3.0, 4.0]
    assert raw.frame["time"].tolist() == ["0", "1", "2"]  # times stay text


def test_parquet(tmp_path: Path) -> None:
    path = tmp_path / "walk.parquet"
    df = _table()
    df["t"] = np.arange(6, dtype=np.int64) + 1_772_366_400
    df.to_parquet(path)
    raw = read_tracks(path)
    _check_standard(raw, "planar")
    assert raw.frame["time"].tolist()[:2] == [1_772_366_400, 1_772_366_401]


def test_pq_suffix(tmp_path: Path) -> None:
    path = tmp_path / "walk.pq"
    _table().to_parquet(path)
    assert len(read_tracks(path).frame) == 6


def test_geoparquet_lonlat(tmp_path: Path) -> None:
    path = tmp_path / "birds.parquet"
    _lonlat_gdf().to_parquet(path)
    raw = read_tracks(path)
    _check_standard(raw, "lonlat")
    assert raw.frame["lon"].tolist() == [10.0, 10.001, 10.002, 10.003]
    assert raw.frame["role"].tolist() == ["heron", "heron", "crane", "crane"]
    assert raw.columns["lon"] == "geometry"
    assert raw.columns["role"] == "species"


@pytest.mark.parametrize("suffix", [".gpkg", ".geojson", ".json"])
def test_geo_files(tmp_path: Path, suffix: str) -> None:
    path = tmp_path / f"birds{suffix}"
    _lonlat_gdf().to_file(path, driver="GPKG" if suffix == ".gpkg" else "GeoJSON")
    raw = read_tracks(path)
    _check_standard(raw, "lonlat")
    assert raw.frame["object"].tolist() == ["a1", "a1", "b9", "b9"]
    np.testing.assert_allclose(raw.frame["lat"], [60.0, 60.0, 60.001, 60.001])


def test_geopackage_in_utm_is_planar_with_its_crs(tmp_path: Path) -> None:
    path = tmp_path / "birds_utm.gpkg"
    _lonlat_gdf(32632).to_file(path, driver="GPKG")
    raw = read_tracks(path)
    _check_standard(raw, "planar")
    assert raw.crs == "EPSG:32632"


def test_dataframe() -> None:
    raw = read_tracks(_table())
    _check_standard(raw, "planar")
    assert raw.sources == ["<DataFrame>"]
    assert raw.frame["source"].astype(str).unique().tolist() == ["<DataFrame>"]
    assert raw.source_rows(np.arange(6)).tolist() == [1, 2, 3, 4, 5, 6]


def test_dataframe_with_odd_index_and_time_index() -> None:
    df = _table().set_index(pd.Index([10, 3, 99, 4, 5, 6]))
    raw = read_tracks(df)
    assert raw.frame["object"].tolist()[:3] == ["p7"] * 3
    timed = _table().drop(columns="t")
    timed.index = pd.DatetimeIndex(pd.date_range("2026-03-01", periods=6, freq="s"), name="when")
    raw = read_tracks(timed)
    assert raw.columns["time"] == "when"
    assert raw.frame["time"].iloc[1] == pd.Timestamp("2026-03-01 00:00:01")


def test_geodataframe_crs_kinds() -> None:
    raw = read_tracks(_lonlat_gdf())
    _check_standard(raw, "lonlat")
    assert raw.crs is None
    # Time zones survive reading.
    assert str(raw.frame["time"].dtype).endswith("UTC]")

    utm = read_tracks(_lonlat_gdf(32632))
    assert (utm.coords, utm.crs) == ("planar", "EPSG:32632")

    # Web Mercator is in metres but twice too long at 60°N, so it is re-projected later.
    mercator = read_tracks(_lonlat_gdf(3857))
    assert (mercator.coords, mercator.crs) == ("crs", "EPSG:3857")

    feet = read_tracks(_lonlat_gdf(2263))  # a projected CRS in US survey feet
    assert (feet.coords, feet.crs) == ("crs", "EPSG:2263")

    nad27 = read_tracks(_lonlat_gdf(4267))  # geographic but not WGS84: converted to WGS84
    assert nad27.coords == "lonlat"
    assert abs(nad27.frame["lon"].iloc[0] - 10.0) < 0.01

    bare = _lonlat_gdf().set_crs(None, allow_override=True)
    assert read_tracks(bare).coords == "planar"


def test_geodataframe_named_coordinate_columns_override_geometry() -> None:
    gdf = _lonlat_gdf(32632)
    gdf["e"] = 1.0
    gdf["n"] = 2.0
    raw = read_tracks(gdf, ColumnSpec(x="e", y="n"))
    assert raw.frame["x"].tolist() == [1.0] * 4
    assert raw.coords == "planar"


def test_geodataframe_with_missing_geometry_gives_nan() -> None:
    gdf = _lonlat_gdf()
    gdf.loc[1, "geometry"] = None
    raw = read_tracks(gdf)
    assert np.isnan(raw.frame["lon"].iloc[1])
    assert len(raw.frame) == 4


def test_trajectory_collection() -> None:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        tc = mpd.TrajectoryCollection(_lonlat_gdf(), "animal", t="time")
    raw = read_tracks(tc)
    _check_standard(raw, "lonlat")
    assert sorted(raw.frame["object"].unique()) == ["a1", "b9"]
    assert raw.frame["role"].tolist().count("heron") == 2
    assert raw.columns["id"] == "<trajectory id>"
    assert raw.columns["time"] == "time"
    assert raw.sources == ["<TrajectoryCollection>"]
    single = read_tracks(tc.trajectories[0])
    assert single.frame["object"].unique().tolist() == [str(tc.trajectories[0].id)]


def test_trajectory_collection_integer_ids_and_no_role() -> None:
    gdf = _lonlat_gdf().drop(columns="species")
    gdf["animal"] = [5, 5, 6, 6]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        tc = mpd.TrajectoryCollection(gdf, "animal", t="time")
    with pytest.raises(InputError, match="--role"):
        read_tracks(tc)
    raw = read_tracks(tc, ColumnSpec(require_role=False))
    assert sorted(raw.frame["object"].unique()) == ["5", "6"]
    assert raw.frame["role"].tolist() == [""] * 4


def test_several_files_and_glob(tmp_path: Path) -> None:
    folder = tmp_path / "collars"
    folder.mkdir()
    df = _table()
    df.iloc[:3].to_csv(folder / "p7.csv", index=False)
    df.iloc[3:].to_csv(folder / "q2.csv", index=False)
    listed = read_tracks([folder / "p7.csv", folder / "q2.csv"])
    assert listed.frame["object"].tolist() == ["p7"] * 3 + ["q2"] * 3
    assert listed.source_rows(np.arange(6)).tolist() == [1, 2, 3, 1, 2, 3]
    assert listed.frame["source"].astype(str).tolist()[-1] == str(folder / "q2.csv")
    assert len(listed.sources) == 2

    globbed = read_tracks(str(folder / "*.csv"))
    pd.testing.assert_frame_equal(globbed.frame, listed.frame)
    # A file named twice is read once.
    assert len(read_tracks([str(folder / "*.csv"), folder / "p7.csv"]).frame) == 6


def test_files_of_different_formats_concatenate(tmp_path: Path) -> None:
    df = _table()
    df.iloc[:3].to_csv(tmp_path / "a.csv", index=False)
    df.iloc[3:].to_parquet(tmp_path / "b.parquet")
    raw = read_tracks([tmp_path / "a.csv", tmp_path / "b.parquet"])
    assert raw.frame["object"].tolist()[-1] == "q2"


# --------------------------------------------------------------------------- detection and flags


def test_auto_detection_is_case_insensitive_and_ordered() -> None:
    df = pd.DataFrame(
        {
            "Name": ["n1"],
            "Animal_ID": ["a1"],
            "Timestamp": ["2026-03-01T00:00:00Z"],
            "Longitude": [10.0],
            "LAT": [50.0],
            "Sex": ["f"],
            "Species": ["wren"],
        }
    )
    raw = read_tracks(df)
    # animal_id comes before name, species before sex in the preference lists.
    assert raw.columns == {
        "id": "Animal_ID",
        "time": "Timestamp",
        "lon": "Longitude",
        "lat": "LAT",
        "role": "Species",
    }
    assert raw.coords == "lonlat"
    assert raw.frame["lat"].tolist() == [50.0]


def test_flags_name_columns() -> None:
    df = pd.DataFrame(
        {
            "who": [1, 2],
            "when": [0, 1],
            "e": [0.0, 1.0],
            "n": [2.0, 3.0],
            "team": ["red", "blue"],
            "x": [9.0, 9.0],
            "lat": [1.0, 1.0],
            "lon": [1.0, 1.0],
        }
    )
    spec = ColumnSpec(id="who", time="WHEN", x="e", y="n", role="team")
    raw = read_tracks(df, spec)
    assert raw.columns == {"id": "who", "time": "when", "x": "e", "y": "n", "role": "team"}
    assert raw.frame["object"].tolist() == ["1", "2"]
    assert raw.frame["y"].tolist() == [2.0, 3.0]
    # --lon/--lat choose the other pair.
    spec = ColumnSpec(id="who", time="when", lon="lon", lat="lat", role="team")
    assert read_tracks(df, spec).coords == "lonlat"


def test_crs_flag_marks_xy_for_reprojection() -> None:
    raw = read_tracks(_table(), ColumnSpec(crs="EPSG:3857"))
    assert (raw.coords, raw.crs) == ("crs", "EPSG:3857")
    assert read_tracks(_table(), ColumnSpec(crs="EPSG:4326")).coords == "crs"


def test_time_unit_and_role_requirement_are_passed_on() -> None:
    raw = read_tracks(_table().drop(columns="role"), ColumnSpec(require_role=False, time_unit="ms"))
    assert raw.role_required is False
    assert raw.time_unit == "ms"
    assert raw.frame["role"].tolist() == [""] * 6
    assert "role" not in raw.columns


def test_integer_valued_float_ids_print_as_integers() -> None:
    df = _table()
    df["player"] = [7.0, 7.0, np.nan, 12.0, 12.0, 12.0]
    df["role"] = pd.Categorical([1, 1, 1, 2, 2, 2])
    raw = read_tracks(df)
    assert raw.frame["object"].tolist()[:2] == ["7", "7"]
    assert pd.isna(raw.frame["object"].iloc[2])
    assert raw.frame["role"].tolist() == ["1", "1", "1", "2", "2", "2"]
    df["player"] = [7.5, 7.5, 7.5, 1.0, 1.0, 1.0]
    assert read_tracks(df).frame["object"].tolist()[0] == "7.5"


@pytest.mark.parametrize(
    "values",
    [
        ["a", "a", "b", "b", "c", "c"],  # sorted categories: codes kept as they are
        ["c", "c", "a", "a", "b", "b"],  # unsorted: renumbered
        [" b", "b", "", None, "a", "a"],  # blanks, padding and missing values
    ],
)
def test_text_ids_read_the_same_from_plain_and_categorical_columns(tmp_path, values) -> None:
    # Parquet text columns arrive dictionary-encoded (categorical); plain strings too
    df = _table()
    df["player"] = values
    expected = read_tracks(df).frame["object"].astype(object).tolist()
    cleaned = [None if v is None or not v.strip() else v.strip() for v in values]
    assert [None if pd.isna(v) else v for v in expected] == cleaned
    for frame in (df.assign(player=pd.Categorical(values)), df):
        frame.to_parquet(tmp_path / "t.parquet", index=False)
        for source in (frame, tmp_path / "t.parquet"):
            got = read_tracks(source).frame["object"]
            assert list(got.cat.categories) == sorted(set(filter(None, cleaned)))
            assert [None if pd.isna(v) else v for v in got.astype(object)] == cleaned


# --------------------------------------------------------------------------- bad input


def test_missing_latitude_names_file_columns_and_flag(tmp_path: Path) -> None:
    path = tmp_path / "tracks.csv"
    path.write_text("id,t,lon,role\n1,0,10,a\n")
    with pytest.raises(InputError) as err:
        read_tracks(path)
    message = str(err.value)
    assert str(path) in message
    assert "--lat" in message
    assert "id, t, lon, role" in message
    assert "\n" not in message


@pytest.mark.parametrize(
    ("drop", "flag"), [("player", "--id"), ("t", "--time"), ("role", "--role")]
)
def test_missing_required_column(tmp_path: Path, drop: str, flag: str) -> None:
    path = tmp_path / "tracks.csv"
    _table().drop(columns=drop).to_csv(path, index=False)
    with pytest.raises(InputError, match=flag) as err:
        read_tracks(path)
    assert str(path) in str(err.value)


def test_no_coordinates_at_all() -> None:
    with pytest.raises(InputError, match="--x/--y") as err:
        read_tracks(_table().drop(columns=["x", "y"]))
    assert "<DataFrame>" in str(err.value)
    assert "--lon/--lat" in str(err.value)


def test_named_column_that_does_not_exist(tmp_path: Path) -> None:
    path = tmp_path / "tracks.csv"
    _table().to_csv(path, index=False)
    with pytest.raises(InputError) as err:
        read_tracks(path, ColumnSpec(role="team"))
    message = str(err.value)
    assert str(path) in message and "'team'" in message and "--role" in message


def test_both_coordinate_pairs_is_ambiguous() -> None:
    df = _table()
    df["lon"], df["lat"] = 1.0, 2.0
    with pytest.raises(InputError, match="--x/--y or --lon/--lat"):
        read_tracks(df)


def test_long_column_lists_are_cut_short() -> None:
    df = pd.DataFrame({f"c{i}": [1] for i in range(30)})
    with pytest.raises(InputError) as err:
        read_tracks(df)
    assert "c11" in str(err.value) and "c12" not in str(err.value)
    assert "18 more" in str(err.value)


def test_missing_file_glob_and_folder(tmp_path: Path) -> None:
    with pytest.raises(InputError, match="no such file") as err:
        read_tracks(tmp_path / "absent.csv")
    assert "absent.csv" in str(err.value)
    with pytest.raises(InputError, match="no files match"):
        read_tracks(str(tmp_path / "*.csv"))
    with pytest.raises(InputError, match="folder"):
        read_tracks(tmp_path)
    with pytest.raises(InputError, match="no input files"):
        read_tracks([])


def test_unknown_extension(tmp_path: Path) -> None:
    path = tmp_path / "tracks.xlsx"
    path.write_bytes(b"PK\x03\x04")
    with pytest.raises(InputError, match=r"unknown file type '\.xlsx'") as err:
        read_tracks(path)
    assert ".csv" in str(err.value)


@pytest.mark.parametrize("name", ["broken.parquet", "broken.gpkg", "broken.geojson"])
def test_corrupt_files(tmp_path: Path, name: str) -> None:
    path = tmp_path / name
    path.write_bytes(b"\x00\x01 this is not what the suffix promises \xff" * 10)
    with pytest.raises(InputError, match="cannot be read") as err:
        read_tracks(path)
    assert name in str(err.value)
    assert "\n" not in str(err.value)


def test_corrupt_csv(tmp_path: Path) -> None:
    path = tmp_path / "ragged.csv"
    path.write_text("id,t,x,y,role\n1,0,1,2,a\n2,1,3\n")
    with pytest.raises(InputError, match="cannot be read as CSV") as err:
        read_tracks(path)
    assert "ragged.csv" in str(err.value)


def test_empty_and_header_only_files(tmp_path: Path) -> None:
    empty = tmp_path / "empty.csv"
    empty.write_text("")
    with pytest.raises(InputError, match="empty") as err:
        read_tracks(empty)
    assert "empty.csv" in str(err.value)
    header = tmp_path / "header.csv"
    header.write_text("id,t,x,y,role\n")
    with pytest.raises(InputError, match="no data rows"):
        read_tracks(header)
    with pytest.raises(InputError, match="no data rows"):
        read_tracks(_table().iloc[:0])


def test_files_with_different_columns(tmp_path: Path) -> None:
    df = _table()
    df.iloc[:3].to_csv(tmp_path / "a.csv", index=False)
    df.iloc[3:].rename(columns={"role": "kind"}).to_csv(tmp_path / "b.csv", index=False)
    with pytest.raises(InputError) as err:
        read_tracks([tmp_path / "a.csv", tmp_path / "b.csv"])
    message = str(err.value)
    assert message.startswith(str(tmp_path / "b.csv"))
    assert "'role'" in message and "a.csv" in message


def test_files_with_different_coordinate_systems(tmp_path: Path) -> None:
    _lonlat_gdf().to_file(tmp_path / "a.gpkg", driver="GPKG")
    _lonlat_gdf(3857).to_file(tmp_path / "b.gpkg", driver="GPKG")
    with pytest.raises(InputError, match="one coordinate system") as err:
        read_tracks([tmp_path / "a.gpkg", tmp_path / "b.gpkg"])
    assert str(err.value).startswith(str(tmp_path / "b.gpkg"))


def test_non_point_geometry() -> None:
    gdf = _lonlat_gdf()
    gdf.loc[2, "geometry"] = gdf.geometry.iloc[2].buffer(0.01)
    with pytest.raises(InputError, match="row 3 has a Polygon geometry"):
        read_tracks(gdf)


@pytest.mark.parametrize(
    ("kwargs", "flag"),
    [
        ({"x": "e"}, "--x and --y"),
        ({"lat": "n"}, "--lon and --lat"),
        ({"x": "e", "y": "n", "lon": "a", "lat": "b"}, "not both"),
        ({"time_unit": "h"}, "--time-unit"),
        ({"crs": "EPSG:99999999"}, "--crs"),
    ],
)
def test_column_spec_validation(kwargs: dict, flag: str) -> None:
    with pytest.raises(InputError, match=flag):
        ColumnSpec(**kwargs)


def test_projected_crs_with_lonlat_columns_is_refused() -> None:
    df = _table().rename(columns={"x": "lon", "y": "lat"})
    with pytest.raises(InputError, match="--x/--y"):
        read_tracks(df, ColumnSpec(crs="EPSG:32632"))


@pytest.mark.parametrize("suffix", [".csv.gz", ".csv.bz2", ".tsv.xz"])
def test_compressed_text_files_are_read(tmp_path, suffix) -> None:
    frame = pd.DataFrame(
        {"id": ["a", "b"], "time": [0, 1], "x": [1.0, 2.0], "y": [0.0, 0.5], "role": ["r", "s"]}
    )
    path = tmp_path / f"tracks{suffix}"
    frame.to_csv(path, index=False, sep="\t" if ".tsv" in suffix else ",")
    raw = read_tracks(path)
    assert raw.frame["object"].astype(str).tolist() == ["a", "b"]
    assert raw.frame["x"].tolist() == [1.0, 2.0]


@pytest.mark.parametrize("chunked", [False, True])
def test_a_column_of_structs_is_refused_in_one_line(chunked, tmp_path: Path) -> None:
    # a Parquet role column of structs once reached the labelling as unhashable dicts
    import pyarrow as pa
    import pyarrow.parquet as pq

    from comove.io.reading import read_blocks

    table = pa.table({
        "id": ["a", "a", "b"], "t": [1.0, 2.0, 1.0], "x": [0.0, 1.0, 2.0], "y": [0.0] * 3,
        "role": pa.array([{"k": 1}, {"k": 2}, {"k": 1}]),
    })  # fmt: skip
    path = tmp_path / "nested.parquet"
    pq.write_table(table, path)
    with pytest.raises(InputError, match="column 'role' holds lists or structs") as caught:
        list(read_blocks(str(path), rows=2)) if chunked else read_tracks(str(path))
    assert "--role" in str(caught.value) and "\n" not in str(caught.value)


def test_a_geopackage_of_several_layers_needs_one_named(tmp_path: Path) -> None:
    # once the first layer was read silently (and a library warning leaked)
    frame = pd.DataFrame({"id": ["a", "a", "b"], "t": [1.0, 2.0, 1.0], "role": "r"})
    geo = gpd.GeoDataFrame(frame, geometry=gpd.points_from_xy([0, 1, 2], [0, 0, 0]),
                           crs="EPSG:3857")  # fmt: skip
    path = tmp_path / "many.gpkg"
    geo.to_file(path, layer="tracks", driver="GPKG")
    geo.head(1).to_file(path, layer="stops", driver="GPKG")
    with pytest.raises(InputError, match=r"holds 2 layers \(tracks, stops\); choose one with"):
        read_tracks(str(path))
    with pytest.raises(InputError, match="has no layer 'nope'; its layers: tracks, stops"):
        read_tracks(str(path), ColumnSpec(layer="nope"))
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert len(read_tracks(str(path), ColumnSpec(layer="stops")).frame) == 1
        assert len(read_tracks(str(path), ColumnSpec(layer="tracks")).frame) == 3


def test_a_time_column_named_with_timestamp_inside_is_found() -> None:
    # vessel and collar exports spell it so (ais_pos_timestamp, acquisition_datetime)
    df = pd.DataFrame({"ID": ["s1", "s1"], "ais_pos_timestamp": ["2021-03-20T00:22:00Z",
                       "2021-03-20T00:23:00Z"], "longitude": [10.0, 10.01],
                       "latitude": [50.0, 50.0]})  # fmt: skip
    assert read_tracks(df, ColumnSpec(require_role=False)).columns["time"] == "ais_pos_timestamp"
    # two such columns: neither is taken; the message asks to name one
    both = df.assign(received_timestamp=df["ais_pos_timestamp"])
    with pytest.raises(InputError, match="no time column found.*--time"):
        read_tracks(both, ColumnSpec(require_role=False))


def _ais_like(times: list[str]) -> pd.DataFrame:
    n = len(times)
    lon = 10.0 + 0.001 * np.arange(n)
    return pd.DataFrame({"ID": ["s1"] * n, "ais_pos_timestamp": times, "longitude": lon,
                         "latitude": [50.0] * n})  # fmt: skip


def test_local_day_first_dates_are_read_when_the_dates_tell_and_noted():
    from comove.errors import ComoveNote
    from comove.tracks.cleaning import CleanParams, clean_fixes

    raw = read_tracks(_ais_like(["20/03/2021 00:22", "20/03/2021 00:23", "20/03/2021 00:24"]),
                      ColumnSpec(require_role=False))  # fmt: skip
    with pytest.warns(ComoveNote, match="day-first"):
        fixes, quality = clean_fixes(raw, CleanParams())
    assert quality["dropped"].get("unparseable_time", 0) == 0
    assert fixes.time[0] == pd.Timestamp("2021-03-20T00:22:00Z").value
    # the same dates given their format, as local times of a zone (CET, UTC+1 in March)
    zoned = read_tracks(_ais_like(["20/03/2021 00:22", "20/03/2021 00:23"]),
                        ColumnSpec(require_role=False, time_format="%d/%m/%Y %H:%M",
                                   time_zone="Europe/Berlin"))  # fmt: skip
    fixes, _ = clean_fixes(zoned, CleanParams())
    assert fixes.time[0] == pd.Timestamp("2021-03-19T23:22:00Z").value


def test_dates_that_cannot_tell_day_from_month_ask_for_the_format():
    from comove.tracks.cleaning import CleanParams, clean_fixes

    raw = read_tracks(_ais_like(["01/02/2021 00:22", "03/04/2021 00:23"]),
                      ColumnSpec(require_role=False))  # fmt: skip
    with pytest.raises(InputError, match="time column 'ais_pos_timestamp': dates such as "
                       "'01/02/2021 00:22' may be day-first or month-first; give their "
                       "format with --time-format"):  # fmt: skip
        clean_fixes(raw, CleanParams())
    with pytest.raises(InputError, match="--time-zone 'Mars/Olympus' is not a time zone"):
        ColumnSpec(time_zone="Mars/Olympus")

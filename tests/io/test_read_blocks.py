from __future__ import annotations

import warnings
from pathlib import Path
from typing import Any

import geopandas as gpd
import numpy as np
import pandas as pd
import pytest

from comove.errors import InputError
from comove.io.reading import ColumnSpec, RawTracks, read_blocks, read_tracks

with warnings.catch_warnings():
    # movingpandas warns about optional extras it does not need here.
    warnings.simplefilter("ignore")
    import movingpandas as mpd

ROWS = 7


def _fixes(n: int = 20, start: int = 0, seed: int = 1) -> pd.DataFrame:
    """Three invented objects taking turns, one fix each per second, in planar metres."""
    rng = np.random.default_rng(seed)
    ids = np.array(["007", "12", "b3"])[np.arange(n) % 3]
    times = pd.Timestamp("2026-03-01T12:00:00Z") + pd.to_timedelta(
        np.arange(n) // 3 + start, unit="s"
    )
    return pd.DataFrame(
        {
            "id": ids,
            "time": times.strftime("%Y-%m-%dT%H:%M:%SZ"),
            "x": rng.uniform(0.0, 100.0, n),
            "y": rng.uniform(-50.0, 50.0, n),
            "role": np.where(ids == "b3", "ball", "player"),
        }
    )


def _birds(n: int = 20, crs: int = 4326) -> gpd.GeoDataFrame:
    """Point fixes near 10°E 60°N with real datetimes, in ``crs``."""
    rng = np.random.default_rng(3)
    frame = pd.DataFrame(
        {
            "animal": np.array(["a1", "b9"])[np.arange(n) % 2],
            "time": pd.date_range("2026-03-01", periods=n, freq="min", tz="UTC"),
            "species": np.array(["heron", "crane"])[np.arange(n) % 2],
        }
    )
    points = gpd.points_from_xy(10.0 + rng.uniform(0, 0.01, n), 60.0 + rng.uniform(0, 0.01, n))
    gdf = gpd.GeoDataFrame(frame, geometry=points, crs=4326)
    return gdf if crs == 4326 else gdf.to_crs(crs)


def _values(series: pd.Series) -> list[Any]:
    """Values as plain Python objects, missing values as None, whatever the dtype."""
    return [None if pd.isna(v) else v for v in series.astype(object)]


def _same_frames(got: pd.DataFrame, want: pd.DataFrame) -> None:
    assert list(got.columns) == list(want.columns)
    assert len(got) == len(want)
    for column in want.columns:
        if pd.api.types.is_float_dtype(want[column].dtype):
            assert got[column].dtype == np.float64
            np.testing.assert_array_equal(got[column].to_numpy(), want[column].to_numpy())
        elif column in ("object", "role", "source"):
            assert _values(got[column].astype(str).where(got[column].notna())) == _values(
                want[column].astype(str).where(want[column].notna())
            )
        else:
            assert _values(got[column]) == _values(want[column])


def _check_blocks(
    source: Any, columns: ColumnSpec | None = None, rows: int = ROWS
) -> tuple[list[RawTracks], RawTracks]:
    """Read ``source`` whole and in blocks and check the blocks against the whole."""
    whole = read_tracks(source, columns)
    blocks = list(read_blocks(source, columns, rows=rows))
    names = list(whole.frame["source"].cat.categories)
    for block in blocks:
        assert 0 < len(block.frame) <= rows
        assert list(block.frame["source"].cat.categories) == [names[block.source_index]]
        assert (block.coords, block.crs, block.columns) == (whole.coords, whole.crs, whole.columns)
        assert block.sources == whole.sources
        assert (block.role_required, block.time_unit) == (whole.role_required, whole.time_unit)
    _same_frames(pd.concat([b.frame for b in blocks], ignore_index=True), whole.frame)
    positions = [np.arange(len(b.frame)) for b in blocks]
    in_source = np.concatenate([b.source_rows(p) for b, p in zip(blocks, positions, strict=True)])
    assert in_source.tolist() == whole.source_rows(np.arange(len(whole.frame))).tolist()
    sources = np.concatenate([np.full(len(b.frame), b.source_index) for b in blocks])
    assert sources.tolist() == whole.frame["source"].cat.codes.tolist()
    first_rows = np.concatenate([b.first_row + p for b, p in zip(blocks, positions, strict=True)])
    assert (first_rows + 1).tolist() == in_source.tolist()
    return blocks, whole


# --------------------------------------------------------------------------- input kinds


@pytest.mark.parametrize(
    ("name", "sep"),
    [("walk.csv", ","), ("walk_semicolons.csv", ";"), ("walk.tsv", "\t"), ("walk.txt", "|")],
)
def test_delimited_text(tmp_path: Path, name: str, sep: str) -> None:
    path = tmp_path / name
    _fixes().to_csv(path, index=False, sep=sep)
    blocks, whole = _check_blocks(path)
    assert [len(b.frame) for b in blocks] == [7, 7, 6]
    assert [b.first_row for b in blocks] == [0, 7, 14]
    assert whole.coords == "planar"
    # ids keep their zeros and times stay text
    assert blocks[0].frame["object"].iloc[0] == "007"
    assert blocks[0].frame["time"].iloc[0] == "2026-03-01T12:00:00Z"


@pytest.mark.parametrize("suffix", [".csv.gz", ".csv.bz2", ".tsv.xz"])
def test_compressed_text(tmp_path: Path, suffix: str) -> None:
    path = tmp_path / f"walk{suffix}"
    _fixes().to_csv(path, index=False, sep="\t" if ".tsv" in suffix else ",")
    blocks, _ = _check_blocks(path)
    assert len(blocks) == 3


def test_lonlat_columns(tmp_path: Path) -> None:
    path = tmp_path / "walk.csv"
    frame = _fixes().rename(columns={"x": "Longitude", "y": "lat"})
    frame.to_csv(path, index=False)
    blocks, whole = _check_blocks(path)
    assert whole.coords == "lonlat"
    assert list(blocks[0].frame.columns) == ["object", "time", "lon", "lat", "role", "source"]


def test_named_columns_and_optional_role(tmp_path: Path) -> None:
    path = tmp_path / "walk.csv"
    _fixes().drop(columns="role").rename(columns={"id": "who", "x": "e", "y": "n"}).to_csv(
        path, index=False
    )
    spec = ColumnSpec(id="who", x="e", y="n", crs="EPSG:3857", require_role=False, time_unit="s")
    _, whole = _check_blocks(path, spec)
    assert (whole.coords, whole.crs) == ("crs", "EPSG:3857")


def test_parquet(tmp_path: Path) -> None:
    path = tmp_path / "walk.parquet"
    frame = _fixes()
    frame["time"] = np.arange(20, dtype=np.int64) + 1_772_366_400
    frame["unused"] = "not read"
    frame.to_parquet(path, row_group_size=5)
    blocks, _ = _check_blocks(path)
    assert [len(b.frame) for b in blocks] == [7, 7, 6]
    assert blocks[1].frame["time"].iloc[0] == 1_772_366_407


def test_parquet_with_times_in_the_index(tmp_path: Path) -> None:
    path = tmp_path / "walk.parquet"
    frame = _fixes().drop(columns="time")
    frame.index = pd.date_range("2026-03-01", periods=20, freq="s", tz="UTC", name="when")
    frame.to_parquet(path)
    blocks, whole = _check_blocks(path)
    assert whole.columns["time"] == "when"
    assert blocks[2].frame["time"].iloc[0] == pd.Timestamp("2026-03-01 00:00:14", tz="UTC")


@pytest.mark.parametrize("crs", [4326, 32632, 3857])
def test_geoparquet(tmp_path: Path, crs: int) -> None:
    path = tmp_path / "birds.parquet"
    _birds(crs=crs).to_parquet(path)
    _, whole = _check_blocks(path)
    expected = {4326: ("lonlat", None), 32632: ("planar", "EPSG:32632")}
    assert (whole.coords, whole.crs) == expected.get(crs, ("crs", "EPSG:3857"))


def test_geoparquet_with_named_coordinate_columns(tmp_path: Path) -> None:
    path = tmp_path / "birds.parquet"
    birds = _birds(crs=32632)
    birds["e"], birds["n"] = birds.geometry.x, birds.geometry.y
    birds.to_parquet(path)
    _, whole = _check_blocks(path, ColumnSpec(x="e", y="n"))
    assert whole.columns["x"] == "e"


@pytest.mark.parametrize(("suffix", "driver"), [(".gpkg", "GPKG"), (".geojson", "GeoJSON")])
def test_geo_files(tmp_path: Path, suffix: str, driver: str) -> None:
    path = tmp_path / f"birds{suffix}"
    _birds(crs=32632 if driver == "GPKG" else 4326).to_file(path, driver=driver)
    _, whole = _check_blocks(path)
    assert whole.coords == ("planar" if driver == "GPKG" else "lonlat")


def test_glob_of_two_csv_files(tmp_path: Path) -> None:
    _fixes(10).to_csv(tmp_path / "a.csv", index=False)
    _fixes(12, start=100, seed=2).to_csv(tmp_path / "b.csv", index=False)
    blocks, _ = _check_blocks(str(tmp_path / "*.csv"))
    # blocks stop at the end of a file: 7 + 3 rows of a.csv, then 7 + 5 of b.csv
    assert [(b.source_index, b.first_row, len(b.frame)) for b in blocks] == [
        (0, 0, 7),
        (0, 7, 3),
        (1, 0, 7),
        (1, 7, 5),
    ]


def test_list_of_parquet_csv_and_compressed_tsv(tmp_path: Path) -> None:
    _fixes(9).to_parquet(tmp_path / "a.parquet")
    _fixes(8, start=50).to_csv(tmp_path / "b.csv", index=False)
    _fixes(15, start=90).to_csv(tmp_path / "c.tsv.gz", index=False, sep="\t")
    paths = [tmp_path / "a.parquet", tmp_path / "b.csv", tmp_path / "c.tsv.gz"]
    blocks, _ = _check_blocks(paths)
    assert [b.source_index for b in blocks] == [0, 0, 1, 1, 2, 2, 2]


def test_dataframe() -> None:
    blocks, _ = _check_blocks(_fixes(), rows=6)
    assert blocks[0].sources == ["<DataFrame>"]
    assert [len(b.frame) for b in blocks] == [6, 6, 6, 2]


def test_geodataframe_in_a_projected_crs() -> None:
    _, whole = _check_blocks(_birds(crs=32632))
    assert (whole.coords, whole.crs) == ("planar", "EPSG:32632")


def test_trajectory_collection() -> None:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        collection = mpd.TrajectoryCollection(_birds(), "animal", t="time")
    _, whole = _check_blocks(collection)
    assert whole.columns["id"] == "<trajectory id>"


def test_one_block_per_source_when_rows_are_many(tmp_path: Path) -> None:
    _fixes(10).to_csv(tmp_path / "a.csv", index=False)
    _fixes(12).to_parquet(tmp_path / "b.parquet")
    blocks, _ = _check_blocks([tmp_path / "a.csv", tmp_path / "b.parquet"], rows=1000)
    assert [len(b.frame) for b in blocks] == [10, 12]


# --------------------------------------------------------------------------- odd cells


def test_ids_keep_zeros_and_missing_cells(tmp_path: Path) -> None:
    path = tmp_path / "odd.csv"
    path.write_text(
        "id,time,x,y,role\n007,1772366400,1.5,2,a\n,1772366401,n/a,3,a\n 8 ,1772366402,4,5,\n"
    )
    blocks, _ = _check_blocks(path, rows=1)
    assert [b.frame["object"].iloc[0] for b in blocks][::2] == ["007", "8"]
    assert pd.isna(blocks[1].frame["object"].iloc[0]) and np.isnan(blocks[1].frame["x"].iloc[0])


def test_a_text_cell_in_a_small_file(tmp_path: Path) -> None:
    path = tmp_path / "odd.csv"
    path.write_text("id,time,x,y,role\na,0,1.5,2,r\na,1,oops,3,r\na,2,-4e1,4,r\n")
    blocks, _ = _check_blocks(path, rows=2)
    assert np.isnan(blocks[0].frame["x"].iloc[1])
    assert blocks[1].frame["x"].tolist() == [-40.0]


def test_a_text_cell_after_rows_already_given(tmp_path: Path) -> None:
    # Far enough into the file that blocks of parsed numbers come out before the text cell.
    n = 60_000
    frame = _fixes(n)
    frame["x"] = frame["x"].astype(object)
    frame.loc[50_000, "x"] = "oops"
    path = tmp_path / "long.csv"
    frame.to_csv(path, index=False)
    blocks, whole = _check_blocks(path, rows=20_000)
    assert np.isnan(whole.frame["x"].iloc[50_000])
    assert np.isnan(blocks[2].frame["x"].iloc[10_000])
    assert whole.frame["x"].notna().sum() == n - 1


# --------------------------------------------------------------------------- bad input


def _message(call: Any) -> str:
    with pytest.raises(InputError) as err:
        call()
    return str(err.value)


def test_header_only_and_empty_files(tmp_path: Path) -> None:
    header = tmp_path / "header.csv"
    header.write_text("id,time,x,y,role\n")
    empty = tmp_path / "empty.csv"
    empty.write_text("")
    parquet = tmp_path / "none.parquet"
    _fixes().iloc[:0].to_parquet(parquet)
    for path in (header, empty, parquet):
        message = _message(lambda p=path: read_tracks(p))
        assert _message(lambda p=path: list(read_blocks(p, rows=ROWS))) == message
    assert "no data rows" in _message(lambda: read_tracks(header))


def test_missing_and_misnamed_columns(tmp_path: Path) -> None:
    path = tmp_path / "walk.csv"
    _fixes().drop(columns="role").to_csv(path, index=False)
    parquet = tmp_path / "walk.parquet"
    _fixes().drop(columns="time").to_parquet(parquet)
    cases = [
        (path, None),
        (path, ColumnSpec(role="team", require_role=False)),
        (parquet, None),
        (_fixes().drop(columns=["x", "y"]), None),
    ]
    for source, spec in cases:
        message = _message(lambda s=source, c=spec: read_tracks(s, c))
        assert _message(lambda s=source, c=spec: list(read_blocks(s, c, rows=ROWS))) == message


def test_files_whose_columns_or_coordinates_disagree(tmp_path: Path) -> None:
    _fixes(10).to_csv(tmp_path / "a.csv", index=False)
    _fixes(10).rename(columns={"role": "kind"}).to_csv(tmp_path / "b.csv", index=False)
    _birds().to_parquet(tmp_path / "c.parquet")
    _birds(crs=3857).to_parquet(tmp_path / "d.parquet")
    for pair in (["a.csv", "b.csv"], ["c.parquet", "d.parquet"]):
        paths = [tmp_path / p for p in pair]
        message = _message(lambda ps=paths: read_tracks(ps))
        assert _message(lambda ps=paths: list(read_blocks(ps, rows=ROWS))) == message
        assert message.startswith(str(paths[1]))


def test_paths_are_checked_at_once(tmp_path: Path) -> None:
    (tmp_path / "tracks.xlsx").write_bytes(b"PK\x03\x04")
    for source in (tmp_path / "absent.csv", str(tmp_path / "*.csv"), tmp_path, []):
        message = _message(lambda s=source: read_tracks(s))
        assert _message(lambda s=source: read_blocks(s)) == message
    unknown = tmp_path / "tracks.xlsx"
    assert _message(lambda: list(read_blocks(unknown))) == _message(lambda: read_tracks(unknown))


def test_corrupt_files(tmp_path: Path) -> None:
    ragged = tmp_path / "ragged.csv"
    ragged.write_text("id,time,x,y,role\n1,0,1,2,a\n2,1,3\n")
    broken = tmp_path / "broken.parquet"
    broken.write_bytes(b"\x00\x01 this is not what the suffix promises \xff" * 10)
    for path, kind in ((ragged, "CSV"), (broken, "Parquet")):
        message = _message(lambda p=path: list(read_blocks(p, rows=ROWS)))
        assert message.startswith(f"{path}: cannot be read as {kind}")


def test_rows_must_be_positive() -> None:
    with pytest.raises(ValueError, match="at least 1"):
        read_blocks(_fixes(), rows=0)


# --------------------------------------------------------------------------- laziness


def test_the_next_file_is_read_only_when_its_blocks_are_asked_for(tmp_path: Path) -> None:
    _fixes(20).to_csv(tmp_path / "a.csv", index=False)
    _fixes(5).to_csv(tmp_path / "b.csv", index=False)
    blocks = read_blocks(str(tmp_path / "*.csv"), rows=ROWS)
    first = next(blocks)
    (tmp_path / "b.csv").unlink()
    rest = [next(blocks), next(blocks)]
    assert [b.first_row for b in (first, *rest)] == [0, 7, 14]
    assert {b.source_index for b in (first, *rest)} == {0}
    with pytest.raises(InputError, match="b.csv"):
        next(blocks)

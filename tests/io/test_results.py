"""Results folders are written whole or not at all."""

from __future__ import annotations

import json

import pandas as pd
import pytest

from comove.errors import InputError
from comove.io.results import (
    MANIFEST,
    csv_writer,
    geojson_writer,
    json_writer,
    read_manifest,
    write_folder,
)


def test_writes_every_file(tmp_path):
    out = write_folder(
        tmp_path / "res",
        {
            "a.csv": csv_writer(
                pd.DataFrame({"v": [1, 2], "t": pd.to_datetime([0, 10**9], utc=True)})
            ),
            "b.json": json_writer({"k": 1}),
        },
    )
    assert sorted(p.name for p in out.iterdir()) == [MANIFEST, "a.csv", "b.json"]
    assert read_manifest(out).files == {"results": ["a.csv", "b.json"]}
    assert json.loads((out / "b.json").read_text()) == {"k": 1}
    assert "1970-01-01T00:00:01.000000Z" in (out / "a.csv").read_text()


def test_failed_write_leaves_nothing(tmp_path):
    def boom(path):
        path.write_text("half")
        raise RuntimeError("disk full")

    with pytest.raises(RuntimeError):
        write_folder(tmp_path / "res", {"a.json": json_writer({}), "b.json": boom})
    assert list(tmp_path.iterdir()) == []


def test_existing_folder_needs_force_and_survives_a_failed_replace(tmp_path):
    out = write_folder(tmp_path / "res", {"a.json": json_writer({"run": 1})})
    with pytest.raises(InputError, match="already exists; choose another --out, add --force"):
        write_folder(out, {"a.json": json_writer({"run": 2})})

    def boom(path):
        raise RuntimeError("interrupted")

    with pytest.raises(RuntimeError):
        write_folder(out, {"a.json": boom}, force=True)
    assert json.loads((out / "a.json").read_text()) == {"run": 1}
    write_folder(out, {"a.json": json_writer({"run": 3})}, force=True)
    assert json.loads((out / "a.json").read_text()) == {"run": 3}
    assert [p.name for p in tmp_path.iterdir()] == ["res"]


def test_a_file_in_the_way_is_an_input_error(tmp_path):
    (tmp_path / "res").write_text("x")
    with pytest.raises(InputError, match="is not a folder"):
        write_folder(tmp_path / "res", {"a.json": json_writer({})}, force=True)


@pytest.mark.parametrize(
    ("crs", "member"), [("EPSG:4326", None), ("EPSG:32633", "urn:ogc:def:crs:EPSG::32633")]
)
def test_geojson_keeps_geometry_times_and_crs(tmp_path, crs, member):
    # read back with geopandas (GDAL's GeoJSON driver): the same lines, times as ISO text
    import geopandas as gpd
    import shapely

    lines = [shapely.LineString([(1.5, 2.25), (3.0, 4.0)]), shapely.LineString([(0, 0), (1, 1)])]
    frame = gpd.GeoDataFrame(
        {"episode": ["E0001", "E0002"], "start": pd.to_datetime([0, 10**9], utc=True)},
        geometry=lines,
        crs=crs,
    )
    out = write_folder(tmp_path / "res", {"p.geojson": geojson_writer(frame)})
    raw = json.loads((out / "p.geojson").read_text())
    assert raw.get("crs", {}).get("properties", {}).get("name") == member
    back = gpd.read_file(out / "p.geojson")
    assert back.crs.equals(crs)
    assert back.geometry.geom_equals_exact(frame.geometry, 0).all()
    assert back["start"].astype(str).tolist()[1].startswith("1970-01-01")
    assert raw["features"][1]["properties"]["start"] == "1970-01-01T00:00:01.000000Z"

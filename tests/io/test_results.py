"""Results folders are written whole or not at all."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from comove.errors import InputError
from comove.io import results
from comove.io.results import (
    MANIFEST,
    csv_lines,
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


def _pandas_text(frame: pd.DataFrame) -> str:
    return frame.to_csv(index=False, float_format="%.10g", lineterminator="\n")


@pytest.mark.parametrize("seed", range(6))
def test_csv_text_is_pandas_text_byte_for_byte(seed, monkeypatch):
    # the reference is pandas' own writer with the same float format
    rng = np.random.default_rng(seed)
    n = 300
    floats = rng.normal(0, 10.0 ** rng.integers(-12, 12, n), n)
    floats[rng.random(n) < 0.1] = np.nan
    floats[:6] = [np.inf, -np.inf, -0.0, 0.0, 1e300, 5e-324]
    # (text holding a carriage return is quoted, where pandas leaves it bare: tested below)
    words = np.array(["a", "b,c", 'say "hi"', "two\nlines", "cr\r\nhere", "", " pad ", "é"])
    text = pd.Series(words[rng.integers(0, words.size, n)], dtype=object)
    text[rng.random(n) < 0.1] = None
    frame = pd.DataFrame({
        "f": floats, "i": rng.integers(-10**12, 10**12, n),
        "u": rng.integers(0, 9, n).astype(np.uint8), "b": rng.random(n) < 0.5, "t": text,
        "s": pd.Series(words[rng.integers(0, 8, n)], dtype="str"), 'odd, "name"': rng.random(n),
    })  # fmt: skip
    assert "".join(csv_lines(frame)) == _pandas_text(frame)
    assert "".join(csv_lines(frame.iloc[:0])) == _pandas_text(frame.iloc[:0])
    monkeypatch.setattr(results, "CSV_BLOCK", 7)  # many blocks, the last one short
    assert "".join(csv_lines(frame)) == _pandas_text(frame)


@pytest.mark.parametrize(
    "frame",
    [
        pd.DataFrame({"only": ["", "x", None]}),  # one column: an empty field alone is quoted
        pd.DataFrame({"n": pd.array([1, None, 3], dtype="Int64"), "x": [1.0, 2.0, 3.0]}),
        pd.DataFrame({"c": pd.Categorical(["a", "b", "a"]), "x": [1, 2, 3]}),
        pd.DataFrame({"mixed": ["a", 1, 2.5], "x": [1, 2, 3]}),
        pd.DataFrame({"f32": np.array([0.1, 2.5, np.nan], dtype=np.float32), "x": [1, 2, 3]}),
        pd.DataFrame([[1, 2.5], [3, 4.5]], columns=["same", "same"]),
    ],
)
def test_csv_text_of_other_kinds_is_pandas_text(frame):
    assert "".join(csv_lines(frame)) == _pandas_text(frame)


def test_text_a_spreadsheet_would_run_is_guarded_and_read_back_exactly(tmp_path):
    # CSV injection: a cell starting = + - @, a tab or a CR is a formula to a spreadsheet;
    # the guard's apostrophe is doubled on text that starts with one, so reading is exact
    cells = ["=HYPERLINK(\"x\")", "+1", "-x", "@sum", "\tt", "'q", "''", "a;b",
             "ok", "", None]  # fmt: skip
    frame = pd.DataFrame({"roles": cells, "n": range(len(cells)), "v": -1.5})
    path = tmp_path / "t.csv"
    results.csv_writer(frame)(path)
    import csv

    with open(path, newline="", encoding="utf-8") as handle:
        fields = [row[0] for row in csv.reader(handle)][1:]
    assert fields[:7] == ["'" + c for c in cells[:7]]  # guarded, in the file
    assert fields[7:] == ["a;b", "ok", "", ""]
    # numbers are never touched: the negative float stays a number
    back = results.formula_unguarded(pd.read_csv(path, keep_default_na=True))
    expected = [c if c else np.nan for c in cells]
    assert back["roles"].tolist()[:-2] == expected[:-2]
    assert back["v"].tolist() == [-1.5] * len(cells)


def test_text_holding_a_carriage_return_is_quoted_and_read_back(tmp_path):
    # pandas' writer, with lines ending in a line feed, leaves "a\rb" bare, and readers
    # split the row there; comove's writer quotes it
    frame = pd.DataFrame({"name": ["a\rb", "plain", "c\r"], "n": [1, 2, 3]})
    path = tmp_path / "cr.csv"
    results.csv_writer(frame)(path)
    assert path.read_bytes().startswith(b'name,n\n"a\rb",1\n')
    back = pd.read_csv(path)
    assert back["name"].tolist() == ["a\rb", "plain", "c\r"] and back["n"].tolist() == [1, 2, 3]

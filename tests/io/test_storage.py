"""Inputs at object-store addresses, read through fsspec (its in-memory store stands in)."""

from __future__ import annotations

import gzip
import uuid
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scenes import one_record

from comove.cli import main
from comove.errors import InputError
from comove.io import storage
from comove.io.provenance import input_digest
from comove.io.reading import read_blocks, read_tracks
from comove.io.scenarios import mine_options
from comove.tracks.streaming import estimated_rows

fsspec = pytest.importorskip("fsspec")


@pytest.fixture()
def store():
    """A folder of fsspec's in-memory store of its own, removed afterwards."""
    fs = fsspec.filesystem("memory")
    folder = f"/t-{uuid.uuid4().hex}"
    fs.mkdir(folder)
    yield fs, folder
    fs.rm(folder, recursive=True)


def frame() -> pd.DataFrame:
    rng = np.random.default_rng(4)
    return pd.DataFrame(
        {
            "id": np.repeat(["a", "b", "c"], 20),
            "role": np.repeat(["r", "s", "r"], 20),
            "t": np.tile(np.arange(20.0), 3),
            "x": rng.normal(size=60).round(3),
            "y": rng.normal(size=60).round(3),
        }
    )


def same(here: pd.DataFrame, there: pd.DataFrame) -> None:
    """Assert two read frames are equal but for the name of the file each row came from."""
    pd.testing.assert_frame_equal(here.drop(columns="source"), there.drop(columns="source"))


def put(fs, folder: str, local: Path) -> str:
    fs.put(str(local), f"{folder}/{local.name}")
    return f"memory://{folder}/{local.name}"


@pytest.mark.parametrize("name", ["tracks.csv", "tracks.csv.gz", "tracks.parquet", "tracks.tsv"])
def test_an_address_reads_as_the_same_file_on_disk(name, store, tmp_path):
    fs, folder = store
    local = tmp_path / name
    if name.endswith(".parquet"):
        frame().to_parquet(local, index=False)
    elif name.endswith(".gz"):
        local.write_bytes(gzip.compress(frame().to_csv(index=False).encode()))
    else:
        frame().to_csv(local, index=False, sep="\t" if name.endswith(".tsv") else ",")
    address = put(fs, folder, local)
    here, there = read_tracks(str(local)), read_tracks(address)
    same(here.frame, there.frame)
    assert there.sources == [address]
    blocks_here = [b.frame for b in read_blocks(str(local), rows=25)]
    blocks_there = [b.frame for b in read_blocks(address, rows=25)]
    assert len(blocks_there) == 3
    for a, b in zip(blocks_here, blocks_there, strict=True):
        same(a, b)
    assert estimated_rows(address) == estimated_rows(str(local))
    # the digest covers names and bytes, wherever the file lies
    assert input_digest(address) == input_digest(str(local))


def test_geo_files_at_an_address(store, tmp_path):
    geopandas = pytest.importorskip("geopandas")
    fs, folder = store
    data = frame()
    geo = geopandas.GeoDataFrame(
        data.drop(columns=["x", "y"]),
        geometry=geopandas.points_from_xy(data["x"], data["y"]),
        crs="EPSG:3857",
    )
    for name in ("tracks.geoparquet.parquet", "tracks.geojson"):
        local = tmp_path / name
        if name.endswith(".parquet"):
            geo.to_parquet(local)
        else:
            geo.to_file(local, driver="GeoJSON")
        here, there = read_tracks(str(local)), read_tracks(put(fs, folder, local))
        same(here.frame, there.frame)


def test_a_pattern_at_an_address_lists_its_files(store, tmp_path):
    fs, folder = store
    data = frame()
    for i, (_, part) in enumerate(data.groupby("id")):
        part.to_csv(tmp_path / f"part-{i}.csv", index=False)
        put(fs, folder, tmp_path / f"part-{i}.csv")
    tracks = read_tracks(f"memory://{folder}/part-*.csv")
    assert len(tracks.sources) == 3 and all(s.endswith(".csv") for s in tracks.sources)
    assert len(tracks.frame) == len(data)


@pytest.mark.parametrize(
    ("tail", "message"),
    [
        ("/nope.csv", "no such file"),
        ("", "is a folder"),
        ("/*.txt", "no files match"),
    ],
)
def test_a_bad_address_is_refused_in_one_line(tail, message, store):
    _, folder = store
    with pytest.raises(InputError, match=message) as caught:
        read_tracks(f"memory://{folder}{tail}")
    assert "\n" not in str(caught.value)


def test_a_scheme_without_a_filesystem_names_what_to_install():
    with pytest.raises(InputError, match="install the fsspec package for this store"):
        read_tracks("nosuchstore://bucket/tracks.csv")


@pytest.mark.parametrize(
    ("name", "expected"),
    [
        ("s3://bucket/fleet/day.parquet", True),
        ("memory://t/x.csv", True),
        ("gcs://b/k", True),
        ("C://data/x.csv", False),  # a drive letter, not a scheme
        ("/data/x.csv", False),
        ("data/x://y.csv", False),
        ("x.csv", False),
    ],
)
def test_what_counts_as_an_address(name, expected):
    assert storage.is_address(name) is expected


def test_mine_reads_an_address_as_it_reads_a_local_file(tmp_path, capsys):
    # the command line, in one piece and over time windows, from an address: the same
    # tables as from the local file, and run.json names the address. fsspec's own
    # file:// store stands in for a remote one here: its in-memory store hands the same
    # file object to every reader, and the run reads its input in two threads at once
    # (the digest beside the reading), as a real store allows
    source, options = mine_options("small_sided_game")
    address = "file://" + str(Path(source).resolve())
    flags = [a for k, v in options.items() for a in ("--" + k.replace("_", "-"), str(v))]
    common = [*flags, "--replicates", "0", "--quiet"]
    outs = {}
    for label, where, extra in [
        ("local", source, []),
        ("address", address, []),
        ("address-windows", address, ["--chunk", "20s"]),
    ]:
        out = tmp_path / label
        code = main(["mine", where, *common, *extra, "--out", str(out)])
        assert code == 0, capsys.readouterr().err
        outs[label] = out
    for label in ("address", "address-windows"):
        for name in ("patterns.csv", "participation.csv"):
            assert (outs[label] / name).read_bytes() == (outs["local"] / name).read_bytes()
    run = one_record(outs["address"] / "run.json")
    assert run["input"] == [address]
    assert run["input_digest"] == one_record(outs["local"] / "run.json")["input_digest"]


def test_without_fsspec_the_message_says_what_to_install(monkeypatch):
    import sys

    monkeypatch.setitem(sys.modules, "fsspec", None)
    monkeypatch.setitem(sys.modules, "fsspec.core", None)
    with pytest.raises(InputError, match="pip install fsspec"):
        read_tracks("s3://bucket/fleet/day.csv")


def test_the_command_line_refuses_a_missing_address_in_one_line(tmp_path, capsys):
    code = main(["mine", "file:///no/such/folder/tracks.csv", "--radius", "2", "--quiet",
                 "--out", str(tmp_path / "out")])  # fmt: skip
    err = capsys.readouterr().err
    assert code != 0 and "no such file" in err and len(err.strip().splitlines()) == 1
    assert not (tmp_path / "out").exists()

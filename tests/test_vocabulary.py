"""Every output table's columns against the one documented list (docs/results-folder.md)."""

from __future__ import annotations

import json
import re
from pathlib import Path

import pandas as pd
import pytest

from comove.cli import main
from comove.io.scenarios import SCENARIOS_DIR

DOC = Path(__file__).resolve().parents[1] / "docs" / "results-folder.md"
GAME = str(SCENARIOS_DIR / "small_sided_game" / "players.csv.gz")

#: Unit written in the list -> the suffix a column in that unit ends with.
SUFFIXES = {"s": "_s", "m": "_m", "m²": "_m2"}


def documented() -> tuple[dict[str, list[tuple[str, str]]], set[str]]:
    """Return per file its documented (column, unit) rows, and the files that take test columns.

    Files are the ``### `name` ...`` headings of the columns section; a row
    naming several columns (``a``, ``b``) lists each.
    """
    text = DOC.read_text().split("## Columns of every table", 1)[1].split("\n## ", 1)[0]
    tables: dict[str, list[tuple[str, str]]] = {}
    with_tests: set[str] = set()
    current: list[str] = []
    for line in text.splitlines():
        if line.startswith("### "):
            current = re.findall(r"`([^`]+\.(?:csv|parquet|geojson))`", line)
            if line.strip() == "### Test columns":
                current = ["(tests)"]
            for name in current:
                tables[name] = []
        elif "Plus the test columns" in line:
            with_tests.update(current)
        elif line.startswith("| `") and current:
            cells = [c.strip() for c in line.strip().strip("|").split("|")]
            for column in re.findall(r"`([^`]+)`", cells[0]):
                for name in current:
                    tables[name].append((column, cells[1]))
    return tables, with_tests


@pytest.fixture(scope="module")
def folders(tmp_path_factory):
    """Results folders of every command, with every optional table and column switched on."""
    root = tmp_path_factory.mktemp("vocabulary")
    runs = {
        "mine": ["mine", GAME, "--radius", "3", "--replicates", "9", "--k-radii", "1,3"],
        "groups": ["groups", GAME, "--preset", "team-sport", "--replicates", "9"],
        "sweep": ["sweep", GAME, "--radius", "2:3:1"],
        "focal": [
            "focal",
            GAME,
            "--focal-role",
            "teal_forward",
            "--radius",
            "3",
            "--replicates",
            "9",
            "--min-prevalence",
            "0.1",
        ],
    }
    for name, argv in runs.items():
        assert main([*argv, "--quiet", "--out", str(root / name)]) == 0
    return root


def written_columns(path: Path) -> list[str]:
    if path.suffix == ".csv":
        return list(pd.read_csv(path, nrows=1).columns)
    if path.suffix == ".parquet":
        return list(pd.read_parquet(path).columns)
    features = json.loads(path.read_text())["features"]
    return [*features[0]["properties"], "geometry"]


def test_every_table_written_has_exactly_the_documented_columns(folders):
    tables, with_tests = documented()
    tests = [c for c, _ in tables.pop("(tests)")]
    written = sorted(p for p in folders.rglob("*") if p.suffix in {".csv", ".parquet", ".geojson"})
    assert {p.name for p in written} == set(tables), (
        "a table written is not documented, or the reverse"
    )
    for path in written:
        expected = [c for c, _ in tables[path.name]]
        if path.name in with_tests or path.name == "significance.csv":
            expected += tests
        assert written_columns(path) == expected, path.name


def unit_of_suffix(column: str) -> str | None:
    """Return the unit a column's name says it is in, or None."""
    for unit, suffix in sorted(SUFFIXES.items(), key=lambda item: -len(item[1])):
        if column.endswith(suffix):
            return unit
    return None


def test_a_column_carries_its_unit_suffix_exactly_when_it_has_that_unit():
    tables, _ = documented()
    rows = {row for rows in tables.values() for row in rows}
    assert len(rows) > 50, "the documented columns were not found"
    for column, unit in rows:
        assert unit_of_suffix(column) == (unit if unit in SUFFIXES else None), (column, unit)


def test_no_table_keeps_a_former_column_name():
    from comove.io.results import FORMER_COLUMNS

    tables, _ = documented()
    for name, former in FORMER_COLUMNS.items():
        now = {c for c, _ in tables[name]}
        assert not set(former) & now, name
        assert set(former.values()) <= now, name


def test_with_periods_every_table_starts_with_period_and_area(tmp_path):
    # docs/results-folder.md: with --periods or --areas every table (and GeoJSON) gains
    # period and area as its first columns, then the documented ones
    periods = tmp_path / "periods.csv"
    start = 1778925600  # the game's first time, epoch seconds
    periods.write_text(f"name,start,end\nearly,{start},{start + 300}\n"
                       f"late,{start + 300},{start + 3600}\n")  # fmt: skip
    runs = {
        "mine": ["mine", GAME, "--radius", "3"],
        "groups": ["groups", GAME, "--preset", "team-sport"],
        "focal": ["focal", GAME, "--focal-role", "teal_forward", "--radius", "3"],
    }
    tables, with_tests = documented()
    tests = [c for c, _ in tables.pop("(tests)")]
    seen = 0
    for name, argv in runs.items():
        out = tmp_path / name
        assert main([*argv, "--periods", str(periods), "--replicates", "9", "--quiet",
                     "--out", str(out)]) == 0  # fmt: skip
        for path in sorted(p for p in out.rglob("*")
                           if p.suffix in {".csv", ".parquet", ".geojson"}):  # fmt: skip
            if path.name == "track_sample.parquet":  # the tracks themselves, not split
                continue
            columns = written_columns(path)
            assert columns[:2] == ["period", "area"], path.name
            expected = [c for c, _ in tables[path.name]]
            if path.name in with_tests or path.name == "significance.csv":
                expected += tests
            assert columns[2:] == expected, path.name
            seen += 1
    assert seen >= 14

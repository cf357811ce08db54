"""Property-based fuzzing of the readers and the command line: hostile input never a traceback.

Generated files mix every kind of cell a careless export holds (blank, NaN and infinite
numbers, text in number columns, huge and negative values, times in several formats and
beyond the representable years, names with separators, formulas, control characters) and
settings at and beyond their edges. Whatever comes in, the run either succeeds (exit 0) or
says in one line what is wrong (exit 2): never a traceback.
"""

from __future__ import annotations

import gzip
import math

import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from comove.cli import main
from comove.errors import InputError
from comove.io.reading import read_tracks
from comove.tracks.cleaning import clean_fixes

T0 = 1_767_225_600  # 2026-01-01T00:00:00Z

names = st.sampled_from(["a", "b", "c", "7", "", " ", "=SUM(A1)", "x;y", "é", "a\u202eb", "\t"])
numbers = st.one_of(
    st.floats(-50, 50),
    st.sampled_from([math.nan, math.inf, -math.inf, 1e300, -1e9, 0.0]),
    st.sampled_from(["", "n/a", "abc", "1,5"]),
)


def time_cells(index: int):
    """A time cell for row ``index``: mostly regular, sometimes hostile."""
    return st.one_of(
        st.just(T0 + index),
        st.just(pd.Timestamp(T0 + index, unit="s", tz="UTC").isoformat()),
        st.just((T0 + index) * 1000),
        st.sampled_from(
            ["", "soon", "0001-01-01", "9999-12-31T00:00:00Z", "01/02/2026 10:00", 0, -1, 1e30]
        ),  # fmt: skip
    )


@st.composite
def frames(draw) -> pd.DataFrame:
    n = draw(st.integers(0, 12))
    rows = []
    for i in range(n):
        rows.append({
            "id": draw(names), "time": draw(time_cells(i)), "x": draw(numbers),
            "y": draw(numbers), "role": draw(names),
        })  # fmt: skip
    frame = pd.DataFrame(rows, columns=["id", "time", "x", "y", "role"])
    dropped = draw(st.sampled_from([None, "role", "x", "time"]))
    return frame.drop(columns=[dropped]) if dropped else frame


def write(frame: pd.DataFrame, folder, sep: str, name: str = "in.csv") -> str:
    path = folder / name
    frame.to_csv(path, index=False, sep=sep)
    return str(path)


@settings(
    max_examples=150,
    deadline=None,
    derandomize=True,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture],
)
@given(frame=frames(), sep=st.sampled_from([",", ";", "\t"]))
def test_reading_and_cleaning_hostile_files_raise_only_input_errors(frame, sep, tmp_path):
    path = write(frame, tmp_path, sep)
    try:
        clean_fixes(read_tracks(path))
    except InputError as exc:
        assert "\n" not in str(exc)


settings_ = st.fixed_dictionaries({
    "--radius": st.sampled_from(["2", "0", "-1", "nan", "1e-9", "1e12", "abc"]),
    "--step": st.sampled_from(["1", "0.5", "0", "1e-7", "inf", "x"]),
    "--max-size": st.sampled_from(["2", "3", "1", "50", "2.5"]),
    "--min-participation": st.sampled_from(["0.5", "0", "1", "1.5", "-0.1"]),
    "--chunk": st.sampled_from(["auto", "whole", "2s", "0", "soon"]),
})  # fmt: skip


@settings(
    max_examples=40,
    deadline=None,
    derandomize=True,
    suppress_health_check=[HealthCheck.too_slow, HealthCheck.function_scoped_fixture],
)
@given(frame=frames(), options=settings_, command=st.sampled_from(["mine", "groups"]))
def test_the_command_line_never_shows_a_traceback(frame, options, command, tmp_path, capsys):
    path = write(frame, tmp_path, ",")
    flags = [a for k, v in options.items() for a in (k, v)]
    if command == "groups":  # groups has no co-location settings
        flags = [a for k, v in options.items()
                 if k not in ("--max-size", "--min-participation") for a in (k, v)]  # fmt: skip
    out = tmp_path / "out"
    code = main([command, path, *flags, "--replicates", "0", "--quiet", "--force",
                 "--out", str(out)])  # fmt: skip
    err = capsys.readouterr().err
    assert "Traceback" not in err
    assert code in (0, 2), err
    if code == 2:
        errors = [line for line in err.splitlines() if ": error:" in line]
        assert len(errors) == 1, err


@pytest.mark.parametrize(
    "content",
    [b"", b"\x1f\x8b", b"id,t,x,y\n", b"\xff\xfe\x00garbage", gzip.compress(b"id,t,x,y\n")],
)
@pytest.mark.parametrize("name", ["in.csv", "in.csv.gz", "in.parquet", "in.geojson"])
def test_damaged_files_are_refused_in_one_line(content, name, tmp_path, capsys):
    path = tmp_path / name
    path.write_bytes(content)
    code = main(["mine", str(path), "--radius", "2", "--replicates", "0", "--quiet",
                 "--out", str(tmp_path / "out")])  # fmt: skip
    err = capsys.readouterr().err
    assert code == 2 and "Traceback" not in err and err.count("\n") == 1, err

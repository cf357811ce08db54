"""A run over time windows writes the same results as the whole period held in memory."""

from __future__ import annotations

import json
from dataclasses import fields

import pandas as pd
import pytest
from scenes import one_record, run_scenario

from comove.cli import main
from comove.errors import InputError
from comove.io.results import by_command
from comove.io.scenarios import mine_options
from comove.pipeline.core import mine

#: Window lengths that cut each scenario into many windows, some shorter than its max gap.
CHUNKS = {"small_sided_game": ("7s", "41.3s"), "fleet": ("20min", "2h"),
          "herd": ("1 day", "5 days")}  # fmt: skip


def assert_same_folders(whole, windowed) -> None:
    """Every file of two results folders is the same, but run.json's record of the windows."""
    names = sorted(p.name for p in whole.iterdir() if not p.name.startswith("."))
    assert names == sorted(p.name for p in windowed.iterdir() if not p.name.startswith("."))
    for name in names:
        a, b = whole / name, windowed / name
        if name == "run.json":
            ra, rb = json.loads(a.read_text()), json.loads(b.read_text())
            ra, rb = (by_command(r)[next(iter(by_command(r)))] for r in (ra, rb))
            assert ra["settings"]["chunk"] != rb["settings"]["chunk"]
            for record in (ra, rb):
                record["settings"].pop("chunk")
                record.pop("windows")
                record.pop("created", None)
            assert ra["settings"] == rb["settings"]
        elif name.endswith(".parquet"):
            pd.testing.assert_frame_equal(pd.read_parquet(a), pd.read_parquet(b), check_exact=True)
        else:
            assert a.read_bytes() == b.read_bytes(), name


@pytest.mark.parametrize("name", sorted(CHUNKS))
def test_groups_over_windows_write_the_whole_run_files(name, tmp_path):
    _, whole = run_scenario(name, chunk="whole", replicates=0, seed=1)
    whole.write(tmp_path / "whole")
    for chunk in CHUNKS[name]:
        _, windowed = run_scenario(name, chunk=chunk, replicates=0, seed=1)
        assert windowed.run["windows"]["bucket_s"] > 0
        windowed.write(tmp_path / chunk)
        assert_same_folders(tmp_path / "whole", tmp_path / chunk)
    assert len(whole.episodes) > 0 and len(whole.dyads) > 0
    assert len(whole.leaders) > 0 or name != "small_sided_game"  # leadership.csv compared too


@pytest.mark.parametrize("name", sorted(CHUNKS))
def test_mine_over_windows_writes_the_whole_run_files(name, tmp_path):
    source, options = mine_options(name)
    whole = mine(source, chunk="whole", seed=1, replicates=0, **options)
    whole.write(tmp_path / "whole")
    assert len(whole.patterns) > 0
    for chunk in CHUNKS[name]:
        mine(source, chunk=chunk, seed=1, replicates=0, **options).write(tmp_path / chunk)
        assert_same_folders(tmp_path / "whole", tmp_path / chunk)


@pytest.mark.parametrize("command", ["mine", "groups"])
def test_windows_in_this_process_and_in_two_workers_give_the_same_tables(command):
    # one worker: every window in this process with the run's threads; two: the windows
    # are tasks of two worker processes, one thread each
    if command == "mine":
        source, options = mine_options("fleet")
        one, two = (mine(source, chunk="30min", seed=1, replicates=0, jobs=j, **options)
                    for j in (1, 2))  # fmt: skip
    else:
        (_, one), (_, two) = (run_scenario("fleet", chunk="30min", replicates=0, seed=1, jobs=j)
                              for j in (1, 2))  # fmt: skip
    compared = 0
    for name, value in vars(one).items():
        if isinstance(value, pd.DataFrame):
            pd.testing.assert_frame_equal(value, getattr(two, name), check_exact=True, obj=name)
            compared += 1
    assert compared >= 3


def test_a_window_without_its_scratch_folder_says_which_setting_to_give(tmp_path):
    from comove.io.reading import ColumnSpec
    from comove.pipeline.windows import windowed_tracks
    from comove.tracks.alignment import AlignParams
    from comove.tracks.cleaning import CleanParams

    source, options = mine_options("fleet")
    names = {f.name for f in fields(ColumnSpec)}
    columns = ColumnSpec(**{k: v for k, v in options.items() if k in names})
    with windowed_tracks(source, columns, CleanParams(), AlignParams(step=60.0),
                         (3600 * 10**9, None), str(tmp_path)) as run:  # fmt: skip
        run.cleaned.spill.folder.rename(tmp_path / "elsewhere")  # as on a worker of another machine
        with pytest.raises(InputError, match="--scratch a folder every worker shares"):
            run.outer(0)
        (tmp_path / "elsewhere").rename(run.cleaned.spill.folder)


def test_co_present_dyads_over_windows_equal_the_whole_run():
    _, whole = run_scenario("fleet", chunk="whole", dyad_pairs="co-present", replicates=0, seed=1)
    _, windowed = run_scenario(
        "fleet", chunk="30min", dyad_pairs="co-present", replicates=0, seed=1
    )
    pd.testing.assert_frame_equal(whole.dyads, windowed.dyads, check_exact=True)


def test_a_chunk_with_significance_tests_is_refused_in_one_line(capsys, tmp_path):
    source, options = mine_options("small_sided_game")
    flags = [a for k, v in options.items() for a in ("--" + k.replace("_", "-"), str(v))]
    code = main(["mine", source, *flags, "--replicates", "9", "--chunk", "10s", "--quiet",
                 "--out", str(tmp_path / "out")])  # fmt: skip
    err = capsys.readouterr().err
    assert code != 0 and "--chunk" in err and "Traceback" not in err
    assert len(err.strip().splitlines()) == 1
    assert not (tmp_path / "out").exists()


@pytest.mark.parametrize("chunk", ["0", "-2h", "soon", "nan"])
def test_a_bad_chunk_is_refused_in_one_line(chunk, capsys, tmp_path):
    source, options = mine_options("small_sided_game")
    flags = [a for k, v in options.items() for a in ("--" + k.replace("_", "-"), str(v))]
    code = main(["mine", source, *flags, "--chunk", chunk, "--quiet",
                 "--out", str(tmp_path / "out")])  # fmt: skip
    err = capsys.readouterr().err
    assert code != 0 and "--chunk" in err and len(err.strip().splitlines()) == 1


def test_tests_that_keep_a_large_input_in_one_piece_say_so_first(capsys, tmp_path, monkeypatch):
    import comove.tracks.streaming as streaming

    # a machine with little memory: the scenario is larger than the run plans to hold
    monkeypatch.setattr(streaming, "memory_budget", lambda: 10_000)
    source, options = mine_options("small_sided_game")
    flags = [a for k, v in options.items() for a in ("--" + k.replace("_", "-"), str(v))]
    assert main(["mine", source, *flags, "--replicates", "3", "--quiet", "--seed", "1",
                 "--out", str(tmp_path / "tested")]) == 0  # fmt: skip
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and err[0].startswith("comove mine: note: ") and "--replicates 0" in err[0]
    run = one_record(tmp_path / "tested" / "run.json")
    assert run["windows"] is None  # held in one piece
    # without tests the same machine cuts the run into windows, silently
    assert main(["mine", source, *flags, "--replicates", "0", "--quiet",
                 "--out", str(tmp_path / "windows")]) == 0  # fmt: skip
    assert capsys.readouterr().err == ""
    assert one_record(tmp_path / "windows" / "run.json")["windows"] is not None

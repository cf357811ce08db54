"""The command line: results on disk, and one-line errors with exit status 2."""

from __future__ import annotations

import json
import os
import re
import subprocess
import sys

import pandas as pd
import pytest
from scenes import one_record

from comove.cli import main
from comove.errors import InputError
from comove.io.results import MANIFEST
from comove.io.runfile import load_run_file
from comove.pipeline.core import MINE_STAGES, mine


def run(argv, capsys):
    code = main([str(a) for a in argv])
    out, err = capsys.readouterr()
    return code, out, err


def test_mine_writes_the_results_folder(tracks_csv, tmp_path, capsys):
    out_dir = tmp_path / "res"
    code, out, err = run(["mine", tracks_csv, "--radius", 2, "--out", out_dir], capsys)
    assert code == 0, err
    assert sorted(p.name for p in out_dir.iterdir()) == [
        MANIFEST, "participation.csv", "participation_series.parquet", "patterns.csv",
        "quality.json", "run.json", "significance.csv", "track_sample.parquet",
    ]  # fmt: skip
    patterns = pd.read_csv(out_dir / "patterns.csv")
    assert patterns["roles"].tolist() == ["dog;owner"]
    assert patterns["time_prevalence"].iloc[0] == pytest.approx(1.0)
    run_json = one_record(out_dir / "run.json")
    assert run_json["settings"]["radius"] == 2.0
    assert run_json["settings"]["step"] == 1.0
    assert run_json["input_digest"].startswith("sha256:")
    assert run_json["versions"]["comove"]
    quality = one_record(out_dir / "quality.json")
    assert quality["rows_read"] == 300
    series = pd.read_parquet(out_dir / "participation_series.parquet")
    assert len(series) == 60 and series["prevalent"].all()
    assert "dog;owner" in out and "personal data" in out


def test_quiet_prints_nothing(tracks_csv, tmp_path, capsys):
    code, out, err = run(
        ["mine", tracks_csv, "--radius", 2, "--out", tmp_path / "r", "--quiet"], capsys
    )
    assert (code, out, err) == (0, "", "")


def test_existing_results_are_not_overwritten_without_force(tracks_csv, tmp_path, capsys):
    out_dir = tmp_path / "res"
    out_dir.mkdir()
    (out_dir / "keep.txt").write_text("mine")
    code, _, err = run(["mine", tracks_csv, "--radius", 2, "--out", out_dir], capsys)
    assert code == 2
    assert "already exists; choose another --out, add --force to replace it" in err
    assert (out_dir / "keep.txt").read_text() == "mine"
    # --force replaces only a folder comove wrote: this one holds a user's file
    code, _, err = run(["mine", tracks_csv, "--radius", 2, "--out", out_dir, "--force"], capsys)
    assert code == 2 and err.count("\n") == 1
    assert "remove it yourself or choose another --out" in err
    assert [p.name for p in out_dir.iterdir()] == ["keep.txt"]
    assert (out_dir / "keep.txt").read_text() == "mine"


def _bad(tmp_path, name, text):
    path = tmp_path / name
    path.write_text(text)
    return path


@pytest.mark.parametrize(
    ("make_input", "extra", "expected"),
    [
        (lambda p: p / "missing.csv", [], "missing.csv"),
        (lambda p: _bad(p, "tracks.xlsx", "x"), [], "unknown file type"),
        (lambda p: _bad(p, "empty.csv", "id,time,x,y,role\n"), [], "empty.csv"),
        (lambda p: _bad(p, "norole.csv", "id,time,x,y\na,0,0,0\n"), [], "--role"),
        (lambda p: _bad(p, "t.csv", "id,time,x,y,role\na,0,0,0,r\n"),
         ["--lon", "x", "--lat", "north"], "north"),
        (lambda p: _bad(p, "badtime.csv", "id,time,x,y,role\na,soon,0,0,r\nb,later,1,1,s\n"),
         [], "unparseable time"),
        (lambda p: p / "nothing-*.csv", [], "nothing-*.csv"),
    ],
)  # fmt: skip
def test_bad_input_is_one_line_with_status_2(tmp_path, capsys, make_input, extra, expected):
    source = make_input(tmp_path)
    code, out, err = run(["mine", source, "--radius", 2, "--out", tmp_path / "o", *extra], capsys)
    assert code == 2
    assert err.count("\n") == 1 and "Traceback" not in err
    assert expected in err
    assert not (tmp_path / "o").exists()


@pytest.mark.parametrize(
    ("options", "expected"),
    [
        ([], "--radius"),
        (["--radius", "abc"], "--radius"),
        (["--radius", "-1"], "--radius must be a positive"),
        (["--radius", "2", "--min-participation", "1.5"], "--min-participation must be in"),
        (["--radius", "2", "--min-prevalence", "0"], "--min-prevalence must be in"),
        (["--radius", "2", "--max-size", "1"], "--max-size"),
        (["--radius", "2", "--step", "0"], "--step"),
        (["--radius", "2", "--time-unit", "h"], "time"),
        (["--radius", "2", "--x", "x"], "--y"),
    ],
)
def test_bad_options_are_one_line_with_status_2(tracks_csv, tmp_path, capsys, options, expected):
    code, _, err = run(["mine", tracks_csv, "--out", tmp_path / "o", *options], capsys)
    assert code == 2
    assert err.count("\n") == 1 and expected in err
    assert not (tmp_path / "o").exists()


def test_real_process_exit_status_and_no_traceback(tmp_path):
    done = subprocess.run(
        [sys.executable, "-m", "comove.cli", "mine", str(tmp_path / "absent.parquet"),
         "--radius", "3", "--out", str(tmp_path / "o")],
        capture_output=True, text=True,
    )  # fmt: skip
    assert done.returncode == 2
    assert done.stderr.count("\n") == 1 and "Traceback" not in done.stderr
    assert "absent.parquet" in done.stderr


def test_groups_writes_episodes_dyads_and_paths(tracks_csv, tmp_path, capsys):
    out_dir = tmp_path / "g"
    code, out, err = run(
        ["groups", tracks_csv, "--radius", 2, "--min-together-time", 10, "--out", out_dir], capsys
    )
    assert code == 0, err
    assert f"for figures: comove report {out_dir}" in out  # as mine says it
    assert sorted(p.name for p in out_dir.iterdir()) == [
        MANIFEST, "association.graphml", "association_edges.csv", "dyads.csv",
        "episode_paths.geojson", "episode_paths.parquet",
        "episode_roles.csv", "episodes.csv", "leadership.csv", "leadership_roles.csv",
        "quality.json", "run.json", "track_sample.parquet",
    ]  # fmt: skip
    episodes = pd.read_csv(out_dir / "episodes.csv")
    # each dog walks beside its owner for the whole minute; the cat sits apart
    assert sorted(episodes["members"]) == ["a0;a2", "a1;a3"]
    assert episodes["duration_s"].tolist() == [60.0, 60.0]
    dyads = pd.read_csv(out_dir / "dyads.csv")
    # by default the pairs ever within the radius: each dog with its owner
    assert sorted(dyads["object_a"] + ";" + dyads["object_b"]) == ["a0;a2", "a1;a3"]
    assert "2 pairs of objects together at least once in dyads.csv" in out
    run_json = one_record(out_dir / "run.json")
    assert run_json["command"] == "groups"
    assert run_json["settings"]["min_together_time"] == 10.0
    assert run_json["settings"]["dyad_pairs"] == "together"


def test_groups_can_list_every_co_present_pair(tracks_csv, tmp_path, capsys):
    out_dir = tmp_path / "g"
    code, out, err = run(["groups", tracks_csv, "--radius", 2, "--dyad-pairs", "co-present",
                          "--out", out_dir], capsys)  # fmt: skip
    assert code == 0, err
    assert len(pd.read_csv(out_dir / "dyads.csv")) == 10  # every pair of 5 objects
    assert "10 pairs of objects seen at the same time" in out
    code, _, err = run(["groups", tracks_csv, "--radius", 2, "--dyad-pairs", "all",
                        "--out", tmp_path / "h"], capsys)  # fmt: skip
    assert code != 0
    assert "argument --dyad-pairs: invalid choice: 'all'" in err.strip().splitlines()[-1]


def test_groups_preset_supplies_defaults_and_flags_override(tracks_csv, tmp_path, capsys):
    out_dir = tmp_path / "g"
    code, _, err = run(
        [
            "groups",
            tracks_csv,
            "--preset",
            "pedestrians",
            "--max-heading",
            "-1",
            "--out",
            out_dir,
            "--quiet",
        ],
        capsys,
    )
    assert code == 0, err
    settings = one_record(out_dir / "run.json")["settings"]
    assert settings["radius"] == 1.5  # from the preset
    assert settings["max_heading"] is None  # switched off by the flag


@pytest.mark.parametrize(
    ("options", "expected"),
    [
        ([], "--radius is required: give it in metres, or a preset"),
        (["--preset", "robots"], "--preset"),
        (["--radius", "2", "--mode", "blob"], "--mode: invalid choice: 'blob'"),
        (["--radius", "2", "--min-size", "1"], "--min-size"),
    ],
)
def test_groups_bad_options(tracks_csv, tmp_path, capsys, options, expected):
    code, _, err = run(["groups", tracks_csv, "--out", tmp_path / "o", *options], capsys)
    assert code == 2
    assert err.count("\n") == 1 and expected in err


def test_mine_significance_and_cross_k_options(tracks_csv, tmp_path, capsys):
    out_dir = tmp_path / "s"
    code, _, err = run(
        [
            "mine",
            tracks_csv,
            "--radius",
            2,
            "--out",
            out_dir,
            "--quiet",
            "--replicates",
            49,
            "--seed",
            3,
            "--null",
            "role-shuffle",
            "--k-radii",
            "1:3:1",
        ],
        capsys,
    )
    assert code == 0, err
    patterns = pd.read_csv(out_dir / "patterns.csv")
    assert {
        "p_value",
        "q_value",
        "null_mean",
        "null_sd",
        "difference",
        "standardised_effect",
        "ratio",
        "significant",
    } <= set(patterns.columns)
    assert patterns["p_value"].between(1 / 50, 1).all()
    cross = pd.read_csv(out_dir / "cross_k.csv")
    assert sorted(cross["radius_m"].unique()) == [1.0, 2.0, 3.0]
    assert {"null_low_m", "null_high_m", "above", "below"} <= set(cross.columns)
    settings = one_record(out_dir / "run.json")["settings"]
    assert (settings["null"], settings["replicates"]) == ("role-shuffle", 49)
    assert settings["seed"] == 3


def test_replicates_zero_switches_the_tests_off(tracks_csv, tmp_path, capsys):
    out_dir = tmp_path / "s"
    code, _, err = run(
        ["mine", tracks_csv, "--radius", 2, "--out", out_dir, "--quiet", "--replicates", 0],
        capsys,
    )
    assert code == 0, err
    assert "p_value" not in pd.read_csv(out_dir / "patterns.csv").columns
    assert not (out_dir / "significance.csv").exists()


@pytest.mark.parametrize(
    ("command", "former", "now", "value"),
    [
        ("mine", "--permutations", "replicates", 0),
        ("mine", "--min-duration", "min_prevalent_time", 3.0),
        ("groups", "--min-duration", "min_together_time", 3.0),
    ],
)
def test_a_former_flag_name_is_read_as_the_new_one_with_a_note(
    tracks_csv, tmp_path, capsys, command, former, now, value
):
    out_dir = tmp_path / "o"
    argv = [command, tracks_csv, "--radius", 2, "--out", out_dir, former, value]
    code, _, err = run([*argv, "--replicates", 0] if now != "replicates" else argv, capsys)
    assert code == 0, err
    flag = "--" + now.replace("_", "-")
    assert f"note: {former.lstrip('-').replace('-', '_')} ({former}) is now {now} ({flag})" in err
    assert one_record(out_dir / "run.json")["settings"][now] == value


def test_a_former_name_in_a_run_file_or_a_keyword_is_read_with_a_note(tracks_csv, tmp_path):
    from comove.errors import RenamedSetting

    config = tmp_path / "run.toml"
    config.write_text("radius = 2\nmin_duration = 4\npermutations = 0\n")
    options = load_run_file(config, "mine", MINE_STAGES)
    assert (options["min_prevalent_time"], options["replicates"]) == (4.0, 0)
    with pytest.warns(RenamedSetting, match="permutations"):
        result = mine(tracks_csv, radius=2, permutations=0)
    assert result.run["settings"]["replicates"] == 0
    with pytest.raises(InputError, match="^replicates is given twice"):
        mine(tracks_csv, radius=2, permutations=0, replicates=9)


def test_groups_tests_pairs_and_role_sets(tracks_csv, tmp_path, capsys):
    out_dir = tmp_path / "g"
    code, _, err = run(
        [
            "groups",
            tracks_csv,
            "--radius",
            2,
            "--out",
            out_dir,
            "--quiet",
            "--replicates",
            39,
            "--seed",
            1,
        ],
        capsys,
    )
    assert code == 0, err
    dyads = pd.read_csv(out_dir / "dyads.csv").set_index(["object_a", "object_b"])
    assert {"p_value", "q_value", "standardised_effect", "statistic"} <= set(dyads.columns)
    # each dog with its owner: together every snapshot, never so in a shifted replicate
    assert dyads.loc[("a0", "a2"), "p_value"] == pytest.approx(1 / 40)
    roles = pd.read_csv(out_dir / "episode_roles.csv")
    assert "p_value" in roles.columns


@pytest.mark.parametrize(
    ("options", "expected"),
    [
        (["--null", "bootstrap"], "--null: invalid choice: 'bootstrap'"),
        (["--replicates", "-2"], "--replicates"),
        (["--k-radii", "a:b"], "--k-radii must be"),
        (["--k-radii", "3,1"], "--k-radii must be strictly ascending"),
    ],
)
def test_bad_significance_options(tracks_csv, tmp_path, capsys, options, expected):
    code, _, err = run(
        ["mine", tracks_csv, "--radius", 2, "--out", tmp_path / "o", *options], capsys
    )
    assert code == 2
    assert err.count("\n") == 1 and expected in err


def test_mine_and_groups_results_merge_into_one_folder(tracks_csv, tmp_path, capsys):
    out_dir = tmp_path / "both"
    base = ["--radius", 2, "--out", out_dir, "--quiet", "--replicates", 0]
    assert run(["mine", tracks_csv, *base], capsys)[0] == 0
    code, _, err = run(["groups", tracks_csv, *base], capsys)
    assert code == 2 and "--merge" in err  # never silently mixed in
    assert run(["groups", tracks_csv, *base, "--merge"], capsys)[0] == 0
    names = {p.name for p in out_dir.iterdir()}
    assert {"patterns.csv", "episodes.csv", "dyads.csv", "run.json"} <= names
    runs = json.loads((out_dir / "run.json").read_text())["by_command"]
    assert set(runs) == {"mine", "groups"}
    assert runs["groups"]["command"] == "groups"
    quality = json.loads((out_dir / "quality.json").read_text())["by_command"]
    assert quality["mine"]["rows_read"] == quality["groups"]["rows_read"] == 300
    # merging again would overwrite the groups files: that needs --force
    code, _, err = run(["groups", tracks_csv, *base, "--merge"], capsys)
    assert code == 2 and "already holds" in err and "--force" in err


def test_toml_run_file_and_flags_override(tracks_csv, tmp_path, capsys):
    # the run file's input is relative to the file's own folder
    (tmp_path / "run.toml").write_text(
        f'input = "{tracks_csv.name}"\nout = "from-file"\nradius = 2.0\n'
        "min-prevalence = 0.9\npermutations = 0\n"
    )
    code, _, err = run(
        ["mine", "--config", tmp_path / "run.toml", "--quiet", "--min-prevalence", "0.5"], capsys
    )
    assert code == 0, err
    out_dir = tmp_path / "from-file"
    settings = one_record(out_dir / "run.json")["settings"]
    assert settings["radius"] == 2.0  # from the file
    assert settings["min_prevalence"] == 0.5  # the flag wins


def test_unknown_run_file_key_is_named(tracks_csv, tmp_path, capsys):
    (tmp_path / "run.toml").write_text("radius = 2\nradiuss = 3\n")
    code, _, err = run(
        ["mine", tracks_csv, "--config", tmp_path / "run.toml", "--out", tmp_path / "o"], capsys
    )
    assert code == 2 and err.count("\n") == 1
    assert "unknown key 'radiuss'" in err and "run.toml" in err


@pytest.mark.parametrize(
    ("line", "message"),
    [
        ('radius = "three"', "radius = 'three' must be a number"),
        ("radius = [3, 4]", "radius = [3, 4] must be a number"),
        ('replicates = "zero"', "replicates = 'zero' must be a whole number"),
        ("replicates = 9.5", "replicates = 9.5 must be a whole number"),
        ("jobs = true", "jobs = True must be a whole number or left out"),
        ("out = 42", "out = 42 must be text"),
        ('k_radii = [1, "x"]', "must be a list of numbers or grid text"),
    ],
)
def test_run_file_values_of_the_wrong_type_are_named(line, message, tracks_csv, tmp_path, capsys):
    (tmp_path / "run.toml").write_text(f"radius = 2\n{line}\n" if "radius" not in line else line)
    code, _, err = run(
        ["mine", tracks_csv, "--config", tmp_path / "run.toml", "--out", tmp_path / "o"], capsys
    )
    assert code == 2 and err.count("\n") == 1 and "Traceback" not in err
    assert message in err and "run.toml" in err


def test_run_file_numbers_are_taken_as_their_settings_take_them(tracks_csv, tmp_path, capsys):
    # an integral float for a whole number, a whole number for a real one, a number for
    # text (the window length in seconds)
    (tmp_path / "run.toml").write_text("radius = 2\npermutations = 0.0\nchunk = 3600\n")
    code, _, err = run(["mine", tracks_csv, "--config", tmp_path / "run.toml", "--quiet",
                        "--out", tmp_path / "o"], capsys)  # fmt: skip
    assert code == 0, err
    settings = one_record(tmp_path / "o" / "run.json")["settings"]
    assert settings["radius"] == 2.0
    assert settings["replicates"] == 0
    assert settings["chunk"] == "3600"


def test_a_run_json_value_of_the_wrong_type_is_named(tracks_csv, tmp_path, capsys):
    first = tmp_path / "first"
    code, _, err = run(["mine", tracks_csv, "--radius", 2, "--out", first, "--quiet",
                        "--replicates", 0], capsys)  # fmt: skip
    assert code == 0, err
    record = one_record(first / "run.json")
    text = json.dumps(record).replace('"radius": 2.0', '"radius": "3m"')
    assert text != json.dumps(record)
    (tmp_path / "edited.json").write_text(text)
    code, _, err = run(["mine", "--config", tmp_path / "edited.json", "--out", tmp_path / "o"],
                       capsys)  # fmt: skip
    assert code == 2 and "radius = '3m' must be a number" in err and err.count("\n") == 1


def test_a_run_json_refuses_an_input_changed_since_that_run(tracks_csv, tmp_path, capsys):
    import shutil

    source = tmp_path / "copy.csv"
    shutil.copy(tracks_csv, source)
    first = tmp_path / "first"
    code, _, err = run(["mine", source, "--radius", 2, "--out", first, "--quiet",
                        "--replicates", 0], capsys)  # fmt: skip
    assert code == 0, err
    again = ["mine", "--config", first / "run.json", "--quiet"]
    code, _, err = run([*again, "--out", tmp_path / "same"], capsys)
    assert code == 0, err  # unchanged: repeated
    with source.open("a") as handle:  # one more row
        handle.write(source.read_text().splitlines()[-1] + "\n")
    code, _, err = run([*again, "--out", tmp_path / "changed"], capsys)
    assert code == 2 and err.count("\n") == 1
    assert "the input files changed since that run" in err and "--allow-changed-input" in err
    assert not (tmp_path / "changed").exists()
    code, _, err = run([*again, "--allow-changed-input", "--out", tmp_path / "changed"], capsys)
    assert code == 0, err
    # an input named on the command line is the user's choice: not compared
    code, _, err = run([*again, source, "--out", tmp_path / "named"], capsys)
    assert code == 0, err


@pytest.mark.parametrize("command", ["mine", "groups"])
def test_run_json_repeats_the_run_exactly(tracks_csv, tmp_path, capsys, command):
    first = tmp_path / "first"
    code, _, err = run(
        [command, tracks_csv, "--radius", 2, "--out", first, "--quiet", "--replicates", 19],
        capsys,
    )
    assert code == 0, err
    again = tmp_path / "again"
    code, _, err = run([command, "--config", first / "run.json", "--out", again, "--quiet"], capsys)
    assert code == 0, err
    for name in sorted(p.name for p in first.iterdir()):
        if name.endswith(".csv") or name.endswith(".geojson"):
            assert (first / name).read_bytes() == (again / name).read_bytes(), name
    a = one_record(first / "run.json")
    b = one_record(again / "run.json")
    assert a["settings"] == b["settings"] and a["input_digest"] == b["input_digest"]


@pytest.mark.parametrize(("given", "expected"), [(None, 1), ("2", 2)])
def test_command_line_runs_openblas_on_one_thread_unless_told(given, expected):
    # set before numpy loads (import comove alone must not load it); read back with
    # threadpoolctl, which asks the loaded BLAS libraries themselves
    code = (
        "import sys, comove; assert 'numpy' not in sys.modules; import comove.cli\n"
        "from threadpoolctl import threadpool_info\n"
        "print(sorted({i['num_threads'] for i in threadpool_info()"
        " if i['internal_api'] == 'openblas'}))"
    )
    env = {k: v for k, v in os.environ.items() if k != "OPENBLAS_NUM_THREADS"}
    if given is not None:
        env["OPENBLAS_NUM_THREADS"] = given
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env)
    assert done.returncode == 0, done.stderr
    threads = json.loads(done.stdout)
    if not threads:
        pytest.skip("this numpy is not built with OpenBLAS")
    assert threads == [min(expected, os.cpu_count() or 1)]  # OpenBLAS caps at the cores


@pytest.mark.parametrize("collecting", [True, False])
def test_importing_the_command_line_keeps_the_programs_garbage_collection_setting(collecting):
    # the command line loads its libraries without collections and freezes them; a
    # program that imports it finds collection on or off as it had set it
    code = (
        f"import gc\nif not {collecting}: gc.disable()\nimport comove.cli\n"
        "print(gc.isenabled(), gc.get_freeze_count() > 0)"
    )
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True)
    assert done.returncode == 0, done.stderr
    assert done.stdout.split() == [str(collecting), "True"]


@pytest.mark.parametrize("chunk", ["whole", "1h"])
@pytest.mark.parametrize("command", ["mine", "groups"])
def test_a_stray_time_stamp_is_refused_in_one_line_naming_it(chunk, command, tmp_path, capsys):
    # one row at the epoch among fixes of 2023: a grid of 1.7e9 snapshots, or 472,000
    # windows of an hour, refused before anything is allocated, naming the row's time
    n = 120
    frame = pd.DataFrame({
        "id": ["a"] * n + ["b"] * n, "role": ["r"] * n + ["s"] * n,
        "time": [1_700_000_000 + i for i in range(n)] * 2,
        "x": [float(i % 7) for i in range(2 * n)], "y": 0.0,
    })  # fmt: skip
    frame.loc[5, "time"] = 0
    path = tmp_path / "stray.csv"
    frame.to_csv(path, index=False)
    out_dir = tmp_path / "out"
    code, _, err = run([command, path, "--radius", 2, "--chunk", chunk, "--replicates", 0,
                        "--quiet", "--out", out_dir], capsys)  # fmt: skip
    assert code == 2 and "Traceback" not in err
    assert len(err.strip().splitlines()) == 1
    # in one piece the object is named too; over windows, the time to the window
    assert re.search(r"1970-01-01T00:00:00Z (\(object 'a'\) )?lies 53.9 years before the", err)
    assert ("(object 'a')" in err) == (chunk == "whole")
    assert not out_dir.exists()


@pytest.mark.parametrize("chunk", ["whole", "60"])
def test_rows_lost_in_numbers_get_a_note_even_when_quiet(chunk, tmp_path, capsys):
    # half the times written another way: once dropped with exit 0 and only the quality
    # report to tell; now a note line names the reason, share, an example row and the fix
    n = 60
    times = [f"2026-03-01T12:{i // 60:02d}:{i % 60:02d}Z" for i in range(n)]
    times = [t if i % 2 else "01/03/2026 12:00" for i, t in enumerate(times)]
    frame = pd.DataFrame({"id": ["a"] * n + ["b"] * n, "role": ["r"] * n + ["s"] * n,
                          "time": times * 2, "x": 0.0, "y": 1.0})  # fmt: skip
    frame.to_csv(tmp_path / "mixed.csv", index=False)
    code, _, err = run(["mine", tmp_path / "mixed.csv", "--radius", 2, "--replicates", 0,
                        "--chunk", chunk, "--quiet", "--out", tmp_path / "o"], capsys)  # fmt: skip
    assert code == 0, err
    notes = [line for line in err.splitlines() if "note:" in line]
    assert len(notes) == 1
    assert "60 of 120 rows (50.0%) were dropped for unparseable time" in notes[0]
    assert "mixed.csv row 1" in notes[0] and "ISO 8601" in notes[0]


@pytest.mark.parametrize("chunk", ["whole", "60"])
@pytest.mark.parametrize(("column", "kind"), [("role", "role"), ("id", "object id")])
def test_a_name_holding_the_separator_is_refused(column, kind, chunk, tmp_path, capsys):
    # "r;x" would read as two roles in patterns.csv (and two members in episodes.csv)
    frame = pd.DataFrame({"id": ["a", "b"] * 5, "role": ["r", "s"] * 5,
                          "time": [1_700_000_000 + i // 2 for i in range(10)],
                          "x": [0.0, 1.0] * 5, "y": 0.0})  # fmt: skip
    frame.loc[0, column] = "r;x"
    frame.to_csv(tmp_path / "semi.csv", index=False)
    code, _, err = run(["mine", tmp_path / "semi.csv", "--radius", 2, "--replicates", 0,
                        "--chunk", chunk, "--out", tmp_path / "o"], capsys)  # fmt: skip
    assert code == 2 and err.count("\n") == 1
    assert f"the {kind} 'r;x' holds ';'" in err and not (tmp_path / "o").exists()


def test_a_role_named_like_a_formula_stays_text_in_csv_and_exact_elsewhere(tmp_path, capsys):
    from comove.io.results import ResultsFolder

    role = '=HYPERLINK("http://example.invalid")'
    frame = pd.DataFrame({"id": ["a", "b"] * 20, "role": [role, "s"] * 20,
                          "time": [1_700_000_000 + i // 2 for i in range(40)],
                          "x": [0.0, 1.0] * 20, "y": 0.0})  # fmt: skip
    frame.to_csv(tmp_path / "f.csv", index=False)
    out = tmp_path / "o"
    code, _, err = run(["mine", tmp_path / "f.csv", "--radius", 2, "--replicates", 0,
                        "--quiet", "--out", out], capsys)  # fmt: skip
    assert code == 0, err
    raw = (out / "patterns.csv").read_text().splitlines()[1]
    assert raw.startswith("\"'=HYPERLINK(") and ";s" in raw  # guarded in the file
    assert ResultsFolder(out).table("patterns.csv")["roles"].iloc[0] == f"{role};s"
    series = pd.read_parquet(out / "participation_series.parquet")
    assert f"{role};s" in set(series["roles"].astype(str))  # Parquet keeps the value


@pytest.mark.parametrize("command", ["mine", "groups"])
def test_a_crowd_beyond_memory_is_refused_in_one_line(command, tmp_path, capsys, monkeypatch):
    # 400 objects within a metre of one another: with little memory, both commands stop
    # before the neighbour search in one line naming the crowd, leaving nothing
    import numpy as np

    import comove.tracks.neighbours as neighbours

    rng = np.random.default_rng(5)
    n, t = 400, 3
    frame = pd.DataFrame({
        "id": np.repeat([f"o{i}" for i in range(n)], t),
        "role": np.repeat([f"r{i % 4}" for i in range(n)], t),
        "time": np.tile(1_700_000_000 + np.arange(t), n),
        "x": rng.uniform(0, 1, n * t), "y": rng.uniform(0, 1, n * t),
    })  # fmt: skip
    frame.to_csv(tmp_path / "crowd.csv", index=False)
    monkeypatch.setattr(neighbours, "available_memory", lambda: 2**20)
    code, _, err = run([command, tmp_path / "crowd.csv", "--radius", 2, "--replicates", 0,
                        "--quiet", "--out", tmp_path / "o"], capsys)  # fmt: skip
    assert code == 2 and err.count("\n") == 1 and "Traceback" not in err
    assert "one object has 399 neighbours; give a smaller --radius" in err
    assert not (tmp_path / "o").exists()


COMMANDS = ["mine", "groups", "sweep", "report", "demo"]


@pytest.mark.parametrize("command", [None, *COMMANDS])
def test_help_has_no_leaked_markup_and_lists_every_choice(command, capsys):
    import argparse
    from dataclasses import fields

    from comove.cli import build_parser

    assert main([command, "--help"] if command else ["--help"]) == 0
    text = capsys.readouterr().out
    # docstring markup (double backquotes, backquotes, roles such as :func:) stays out
    assert "`" not in text and ":func:" not in text and ":class:" not in text
    if command is None:
        return
    parser = build_parser()
    sub = next(a for a in parser._actions if isinstance(a, argparse._SubParsersAction))
    for action in sub.choices[command]._actions:
        if action.choices:  # every option with choices shows them in the usage and help
            for choice in action.choices:
                assert str(choice) in text, (action.option_strings, choice)
    # each settings field validated against a list declares that list as its choices
    from comove.groups.dyads import DyadParams
    from comove.groups.grouping import GroupParams
    from comove.roles.crossk import CrossKParams
    from comove.stats.significance import SignificanceParams

    listed = {"null", "shift_within", "statistic", "mode", "links", "standing", "dyad_pairs",
              "k_correction"}  # fmt: skip
    for stage in (DyadParams, GroupParams, CrossKParams, SignificanceParams):
        for f in fields(stage):
            if f.name in listed:
                assert f.metadata.get("choices"), (stage.__name__, f.name)


@pytest.mark.parametrize(
    ("preset", "words"),
    [("pedestrians", "tracked people"), ("vehicles", "drivers"), ("collars", "protected species"),
     (None, "personal data (of people")],
)  # fmt: skip
def test_the_caution_speaks_of_what_was_tracked(tracks_csv, tmp_path, capsys, preset, words):
    out_dir = tmp_path / "g"
    flags = ["--preset", preset] if preset else []
    code, out, err = run(["groups", tracks_csv, "--radius", 2, *flags, "--replicates", 0,
                          "--out", out_dir], capsys)  # fmt: skip
    assert code == 0, err
    caution = one_record(out_dir / "run.json")["caution"]
    assert words in caution and "association, not interaction or cause" in caution
    assert f"Caution: {caution}" in out


def test_a_signal_whose_exception_a_library_swallows_still_stops_the_run(monkeypatch, capsys):
    # a signal that arrives inside a finaliser (as in a library's garbage-collector
    # callback): Python swallows the handler's exception there; the run must still end
    # as stopped, in one line, with 128 + the signal's number
    import gc
    import signal

    import comove.cli as cli

    class Finaliser:
        def __del__(self):
            os.kill(os.getpid(), signal.SIGTERM)

    def command(args):
        Finaliser()
        gc.collect()  # the signal's exception is raised and swallowed here

    monkeypatch.setattr(cli, "_run_report", command)
    code = main(["report", "somewhere"])
    err = capsys.readouterr().err
    assert code == 128 + signal.SIGTERM
    assert err == "comove report: stopped by SIGTERM; nothing was written\n"

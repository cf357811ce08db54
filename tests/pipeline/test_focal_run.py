"""``comove focal`` end to end: planted surroundings, windows, engines, tests, the command."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scenes import one_record
from test_windows import assert_same_folders

from comove.cli import main
from comove.io.scenarios import load_truth, mine_options
from comove.pipeline.focal import focal

FOCAL_OPTIONS = ("radius", "step", "max_gap", "max_speed", "min_prevalence",
                 "min_prevalent_time")  # fmt: skip


def scenario_focal(name: str, role: str, **extra):
    source, options = mine_options(name)
    kept = {k: v for k, v in options.items() if k not in ("min_participation", "max_size")}
    return focal(source, focal_role=role, **kept, **extra)


def test_calves_are_around_their_mothers_as_planted():
    # a calf has an adult female around exactly when the planted pair {adult_female, calf} is
    # prevalent: every calf follows its own mother, so the calves' participation ratio is the
    # share here, and the planted time prevalence is that of the pair
    truth = {tuple(p["roles"]): p for p in load_truth("herd")["planted"]}
    result = scenario_focal("herd", "calf", replicates=0, seed=1)
    sets = result.sets.set_index("around")
    planted = truth[("adult_female", "calf")]
    assert sets.loc["adult_female", "time_prevalence"] == pytest.approx(
        planted["time_prevalence"], abs=planted["tolerance"])  # fmt: skip
    assert "adult_male" not in " ".join(sets.index)  # the males range alone, km away
    shares = result.neighbourhoods["share"]
    assert shares.sum() == pytest.approx(1.0) and (shares > 0).all()


def test_the_planted_surroundings_are_significant_and_absent_roles_are_not_tested():
    result = scenario_focal("herd", "calf", replicates=39, seed=3)
    tests = result.tests.set_index("around")
    assert tests.loc["adult_female", "p_value"] == pytest.approx(1 / 40)
    assert tests.loc["adult_female", "statistic"] == "mean_share"
    assert not any("adult_male" in a for a in tests.index)
    assert {"p_value", "q_value", "significant"} <= set(result.sets.columns)


def test_independent_walkers_are_not_called_significant():
    # roles dealt at random to independent random walkers: under the role shuffle every
    # p-value is uniform, so a few tests at most fall below 0.05 (a rule of thumb check)
    rng = np.random.default_rng(11)
    n_obj, n_snap = 24, 120
    steps = rng.normal(0, 1.0, (n_snap, n_obj, 2)).cumsum(axis=0)
    pos = steps + rng.uniform(0, 30, (1, n_obj, 2))
    frame = pd.DataFrame({
        "id": np.tile([f"w{i:02d}" for i in range(n_obj)], n_snap),
        "time": np.repeat(np.arange(n_snap, dtype=float), n_obj),
        "x": pos[..., 0].ravel(), "y": pos[..., 1].ravel(),
        "role": np.tile(rng.choice(["a", "b", "c", "d"], n_obj), n_snap),
    })  # fmt: skip
    result = focal(frame, focal_role="a", radius=6.0, step=1.0, min_share=0.3,
                   replicates=99, null="role-shuffle", seed=2)  # fmt: skip
    assert len(result.tests) >= 3
    assert (result.tests["p_value"] < 0.05).sum() <= 1


def test_focal_tests_compare_every_kth_snapshot_of_a_fine_grid():
    # 4 snapshots a second, compared every second (--null-step 1): the observed statistic is
    # that of the snapshots at whole seconds alone, as in a run on those snapshots only
    rng = np.random.default_rng(5)
    n_obj, n_snap = 16, 400
    pos = rng.normal(0, 0.4, (n_snap, n_obj, 2)).cumsum(axis=0) + rng.uniform(0, 12, (1, n_obj, 2))
    frame = pd.DataFrame({
        "id": np.tile([f"w{i:02d}" for i in range(n_obj)], n_snap),
        "time": np.repeat(np.arange(n_snap) / 4.0, n_obj),
        "x": pos[..., 0].ravel(), "y": pos[..., 1].ravel(),
        "role": np.tile(rng.choice(["a", "b", "c"], n_obj), n_snap),
    })  # fmt: skip
    options = dict(focal_role="a", radius=4.0, min_share=0.3, min_prevalence=0.05,
                   replicates=19, seed=3)  # fmt: skip
    thinned = focal(frame, step=0.25, **options)
    assert len(thinned.tests) > 0 and (thinned.tests["compared_step_s"] == 1.0).all()
    every = focal(frame, step=0.25, null_step=0.0, **options)
    assert (every.tests["compared_step_s"] == 0.25).all()
    whole = focal(frame[frame["time"] % 1.0 == 0], step=1.0, null_step=0.0, **options)
    both = thinned.tests.merge(whole.tests, on="around", suffixes=("", "_whole"))
    assert len(both) == len(thinned.tests)
    np.testing.assert_allclose(both["difference"] + both["null_mean"],
                               both["difference_whole"] + both["null_mean_whole"])  # fmt: skip


@pytest.mark.parametrize("name, role, chunk", [("fleet", "hauler", "20min"),
                                               ("herd", "calf", "5 days")])  # fmt: skip
def test_focal_over_windows_writes_the_whole_run_files(name, role, chunk, tmp_path):
    whole = scenario_focal(name, role, chunk="whole", replicates=0, seed=1, jobs=2)
    assert len(whole.sets) > 0
    whole.write(tmp_path / "whole")
    windowed = scenario_focal(name, role, chunk=chunk, replicates=0, seed=1, jobs=2)
    assert windowed.run["windows"] is not None
    windowed.write(tmp_path / "windowed")
    assert_same_folders(tmp_path / "whole", tmp_path / "windowed")


def test_the_command_writes_a_folder_and_a_report(tmp_path, capsys):
    source, options = mine_options("herd")
    flags = [a for k in FOCAL_OPTIONS if k in options
             for a in ("--" + k.replace("_", "-"), str(options[k]))]  # fmt: skip
    columns = load_truth("herd")["columns"]
    out = tmp_path / "herd"
    argv = ["focal", source, "--role", columns["role"], "--focal-role", "calf", *flags,
            "--out", str(out)]  # fmt: skip
    assert main(argv) == 0
    printed = capsys.readouterr().out
    assert "durably around calf" in printed and "adult_female" in printed
    record = one_record(out / "run.json")
    assert record["command"] == "focal" and record["settings"]["focal_role"] == "calf"
    assert main(["report", str(out), "--quiet"]) == 0
    page = (out / "report.html").read_text()
    assert "What surrounds calf" in page and (out / "figures" / "focal.png").is_file()
    # mine into the same folder beside it
    assert main(["mine", source, "--role", columns["role"], *flags, "--merge", "--quiet",
                 "--out", str(out)]) == 0  # fmt: skip
    assert (out / "patterns.csv").is_file() and (out / "focal.csv").is_file()


@pytest.mark.parametrize(
    "argv, message",
    [
        (["--radius", "300"], "give --focal-role ROLE"),
        (["--focal-role", "calf"], "give --radius"),
        (["--focal-role", "foal", "--radius", "300"], "no object has the role 'foal'; give "
         "--focal-role one of the input's roles: adult_female, adult_male, calf, yearling"),
    ],
)  # fmt: skip
def test_a_missing_or_unknown_focal_role_is_one_line_and_status_2(argv, message, tmp_path,
                                                                  capsys):  # fmt: skip
    source, _ = mine_options("herd")
    status = main(["focal", source, "--role", "sex_age", *argv, "--out", str(tmp_path / "x")])
    err = capsys.readouterr().err
    assert status == 2 and message in err and err.count("\n") == 1
    assert not (tmp_path / "x").exists()

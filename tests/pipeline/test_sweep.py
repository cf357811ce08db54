"""Threshold sweeps equal separate mining runs at every grid point."""

from __future__ import annotations

import matplotlib.image as mpimg
import numpy as np
import pandas as pd
import pytest

from comove.cli import main
from comove.errors import InputError
from comove.io.runfile import parse_grid
from comove.io.scenarios import mine_options
from comove.pipeline.core import mine
from comove.pipeline.sweep import SweepParams, sweep
from comove.present import figures

GRID = SweepParams(radius=(1.5, 3.0, 5.0), min_participation=(0.3, 0.5))


@pytest.fixture(scope="module")
def game():
    source, options = mine_options("small_sided_game")
    base = {k: v for k, v in options.items() if k not in ("radius", "min_participation")}
    return source, options, base


def test_each_grid_point_equals_a_separate_mine_run(game):
    source, options, base = game
    table = sweep(source, radius=GRID.radius, min_participation="0.3,0.5", **base).table
    for radius in GRID.radius:
        for threshold in GRID.min_participation:
            alone = mine(
                source,
                **{**options, "radius": radius, "min_participation": threshold},
                replicates=0,
            )
            got = (
                table[
                    (table["radius_m"] == radius)
                    & (table["min_participation"] == threshold)
                    & table["kept"]
                ]
                .set_index("roles")
                .sort_index()
            )
            want = alone.patterns.set_index("roles").sort_index()
            assert list(got.index) == list(want.index), (radius, threshold)
            for col in ("time_prevalence", "prevalent_s", "longest_run_s"):
                np.testing.assert_allclose(got[col], want[col], rtol=1e-12, err_msg=col)


def test_workers_do_not_change_the_table(game):
    source, _, base = game
    one = sweep(source, radius=GRID.radius, jobs=1, **base).table
    two = sweep(source, radius=GRID.radius, jobs=2, **base).table
    pd.testing.assert_frame_equal(one, two)


def test_grid_text():
    assert parse_grid("1:3:0.5", "radius") == (1.0, 1.5, 2.0, 2.5, 3.0)
    assert parse_grid("2,5, 10", "radius") == (2.0, 5.0, 10.0)
    for bad in ("1:3", "3:1:1", "1:3:0", "a,b", "", "1:inf:1", "nan:3:1"):
        with pytest.raises(InputError, match="^radius") as caught:
            parse_grid(bad, "radius")
        assert caught.value.worded_for().startswith("--radius ")
    # a reversed grid and a step that does not advance say so
    with pytest.raises(InputError, match="3:1:1 runs backwards.*as in 1:3:1"):
        parse_grid("3:1:1", "radius")
    for bad in ("1:3:0", "1:3:-1"):
        with pytest.raises(InputError, match="the step must be above 0"):
            parse_grid(bad, "radius")
    # a grid too fine is refused before its values are made (it once asked for 30 GiB)
    with pytest.raises(InputError, match="4,000,000,001 values, more than the 10,000"):
        parse_grid("1:5:1e-9", "radius")
    assert len(parse_grid("0:9999:1", "radius")) == 10_000
    # a grid given as text, one number or a list of numbers (as in a TOML run file)
    assert SweepParams(radius="1,2").radius == SweepParams(radius=[1, 2]).radius == (1.0, 2.0)
    assert SweepParams(radius=3).radius == (3.0,)


def test_sweep_takes_a_run_file(game, tmp_path, capsys):
    source, _, base = game
    config = tmp_path / "sweep.toml"
    lines = [f'input = "{source}"', 'out = "from-file"', 'radius = "2:3:1"', "jobs = 1"]
    lines += [f"{k} = {v!r}".replace("'", '"') for k, v in base.items()]
    config.write_text("\n".join(lines) + "\n")
    code = main(["sweep", "--config", str(config), "--quiet"])
    assert code == 0, capsys.readouterr().err
    table = pd.read_csv(tmp_path / "from-file" / "sweep.csv")
    assert sorted(table["radius_m"].unique()) == [2.0, 3.0]


def test_sweep_command_writes_table_and_plot(tmp_path, capsys):
    source, _ = mine_options("small_sided_game")
    out = tmp_path / "sw"
    code = main(
        [
            "sweep",
            source,
            "--id",
            "player",
            "--time",
            "t",
            "--x",
            "x",
            "--y",
            "y",
            "--role",
            "role",
            "--step",
            "0.1",
            "--radius",
            "1:4:1",
            "--out",
            str(out),
            "--quiet",
        ]
    )
    assert code == 0, capsys.readouterr().err
    table = pd.read_csv(out / "sweep.csv")
    assert sorted(table["radius_m"].unique()) == [1.0, 2.0, 3.0, 4.0]
    image = mpimg.imread(out / "sweep.png")
    assert image.shape[1] == 800  # the report's width
    assert {"run.json", "quality.json"} <= {p.name for p in out.iterdir()}
    # the report takes a sweep folder: the curves and the role sets kept per grid point
    assert main(["report", str(out), "--quiet"]) == 0
    page = (out / "report.html").read_text()
    assert "Role sets over a grid of radii and thresholds" in page
    assert (out / "figures" / "sweep_curves.png").is_file()


def test_sweep_figure_draws_every_threshold_with_the_legend_off_the_curves(game):
    source, _, base = game
    result = sweep(source, radius="1:4:1", min_participation="0.3,0.4,0.5,0.6", **base)
    fig, note = figures.sweep_curves(result.table, 0.5)
    figures.to_png(fig)  # lays the figure out
    panels = [ax for ax in fig.axes if ax.get_visible()]
    assert [ax.get_title(loc="left") for ax in panels] == [
        f"participation threshold {m:g}" for m in (0.3, 0.4, 0.5, 0.6)]  # fmt: skip
    legend = fig.legends[0].get_window_extent()
    for ax in panels:
        assert not legend.overlaps(ax.get_window_extent())
    # one colour per role set, the same in every panel
    colours = [{line.get_label(): line.get_color() for line in ax.get_lines()} for ax in panels]
    assert all(c == colours[0] for c in colours)


def test_bad_sweep_grid_is_one_line(tmp_path, capsys):
    source, _ = mine_options("small_sided_game")
    code = main(["sweep", source, "--radius", "0:3:1", "--out", str(tmp_path / "o")])
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1 and "--radius" in err

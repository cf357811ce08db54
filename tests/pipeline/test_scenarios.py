"""Planted truth of every bundled scenario is recovered by `mine`."""

from __future__ import annotations

import pytest

from comove.cli import main
from comove.io.scenarios import load_truth, mine_options, scenario_names
from comove.pipeline.core import mine

SCENARIOS = scenario_names()


def test_every_scenario_is_bundled():
    assert set(SCENARIOS) >= {"small_sided_game", "fleet", "herd"}


@pytest.fixture(scope="module", params=SCENARIOS)
def mined(request):
    name = request.param
    source, options = mine_options(name)
    return load_truth(name), mine(source, **options)


def label(roles):
    return ";".join(sorted(roles))


def test_planted_role_sets_are_kept_at_their_planted_prevalence(mined):
    truth, result = mined
    kept = result.patterns.set_index("roles")
    assert truth["planted"]
    for planted in truth["planted"]:
        name = label(planted["roles"])
        assert name in kept.index, f"{truth['scenario']}: {name} not found"
        got = kept.loc[name, "time_prevalence"]
        assert abs(got - planted["time_prevalence"]) <= planted["tolerance"], (name, got)


def test_independent_role_sets_are_not_kept(mined):
    truth, result = mined
    kept = set(result.patterns["roles"])
    assert truth["independent"]
    for roles in truth["independent"]:
        assert label(roles) not in kept


def test_bad_rows_are_reported_by_reason(mined):
    truth, result = mined
    expected: dict[str, int] = {}
    for bad in truth.get("bad_rows", []):
        expected[bad["drop_reason"]] = expected.get(bad["drop_reason"], 0) + 1
    for reason, count in expected.items():
        assert result.quality["dropped"][reason] == count, reason


def test_demo_command_says_where_the_results_are(tmp_path, capsys):
    out = tmp_path / "demo"
    assert main(["demo", "--out", str(out)]) == 0
    printed = capsys.readouterr().out
    assert f"Results written to {out}" in printed
    assert (out / "patterns.csv").is_file()


def test_planted_role_sets_are_significant_at_the_default_number_of_replicates(mined):
    # default 199 time-shift replicates: the smallest attainable p-value is 1/200
    truth, result = mined
    assert result.run["settings"]["replicates"] == 199
    kept = result.patterns.set_index("roles")
    for planted in truth["planted"]:
        assert kept.loc[label(planted["roles"]), "p_value"] < 0.01

"""The planted counter-attack leads of the small-sided game, found by ``groups``.

The game's truth (``synthetic_tracks/small_sided_game/truth.json``, ``leads``) lists who
breaks upfield and who takes his heading how much later; the run uses the team-sport
tutorial's settings (``docs/tutorials/team-sport.md``).
"""

from __future__ import annotations

import pandas as pd
import pytest

from comove.io.scenarios import SCENARIOS_DIR, load_truth
from comove.pipeline.core import groups

GAME = "small_sided_game"
#: One snapshot of the tutorial's grid, seconds: how close a found delay must come.
STEP = 0.1


@pytest.fixture(scope="module")
def game():
    truth = load_truth(GAME)
    # the tutorial's `comove groups` settings; the leadership table does not depend on the
    # null replicates, so none are drawn
    found = groups(
        str(SCENARIOS_DIR / GAME / truth["input"]),
        preset="team-sport",
        radius=3.0,
        step=STEP,
        seed=1,
        replicates=0,
        **truth["columns"],
    )
    return truth, found


def test_every_planted_lead_names_its_leader_with_the_planted_delay(game):
    truth, found = game
    table = found.leaders
    assert truth["leads"]
    for lead in truth["leads"]:
        pair = {lead["leader"], lead["follower"]}
        rows = table[table["leader"].isin(pair) & table["follower"].isin(pair)]
        assert len(rows) == 1, (lead["leader"], lead["follower"], table)
        row = rows.iloc[0]
        assert row["leader"] == lead["leader"] and row["follower"] == lead["follower"], row
        assert bool(row["clear_leader"]), row
        assert abs(row["delay_s"] - lead["delay_s"]) <= STEP, row
        # judged on at least the planted runs, each within the radius and running
        planted_s = sum(
            (pd.Timestamp(w["end"]) - pd.Timestamp(w["start"])).total_seconds()
            for w in lead["when"]
        )
        assert row["moving_together_s"] >= planted_s - len(lead["when"]) * STEP, row


def test_pairs_without_a_planted_lead_turn_within_a_snapshot_of_each_other(game):
    # the markers mirror their forwards and the pressers move as one unit: no lead planted
    truth, found = game
    planted = {frozenset((lead["leader"], lead["follower"])) for lead in truth["leads"]}
    table = found.leaders
    pairs = zip(table["leader"], table["follower"], strict=True)
    others = table[[frozenset(p) not in planted for p in pairs]]
    assert len(others) >= 5  # three marking pairs and the pressers
    assert (others["delay_s"] < STEP).all(), others

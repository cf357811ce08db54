"""Named sets of defaults for the kinds of user of ``comove groups``.

A preset only supplies defaults; every flag given on the command line (or
keyword given to :func:`comove.pipeline.core.groups`) overrides it. Each value
carries where it comes from; "common practice" marks a value with no single
published source.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

from comove.errors import bad_setting


@dataclass(frozen=True)
class Preset:
    """A documented set of defaults.

    Attributes
    ----------
    name : str
        The name given to ``--preset``.
    summary : str
        Who it is for.
    values : dict
        Option name -> value.
    why : dict
        Option name -> where the value comes from.
    subject : {"people", "vehicles", "animals"} or None
        What is tracked, which the caution printed with the results speaks of.
    """

    name: str
    summary: str
    values: dict[str, Any]
    why: dict[str, str]
    subject: str | None = None


#: Reasons that hold for the same value in every preset.
_SHARED_WHY = {
    "mode": "component: members linked through one another are one group, as groups "
    "walking in file or spread out are (common practice)",
    "min_size": "2: a pair is the smallest group",
}

PRESETS: dict[str, Preset] = {
    p.name: p
    for p in (
        Preset(
            name="pedestrians",
            subject="people",
            summary="people walking together in a crowd (overhead video or indoor tracking)",
            values={
                "radius": 1.5,
                "mode": "component",
                "min_speed": 0.3,
                "max_heading": 30.0,
                "max_speed_ratio": 1.25,
                "velocity_window": 1.2,
                "min_size": 2,
                "min_together_time": 4.0,
                "tolerance": 2.0,
                "links": "evidence",
                "evidence_window": 30.0,
                "evidence_share": 0.4,
                "nearest": 3,
                "min_abreast": 15.0,
                "standing": "ignored",
                "max_delay": 2.0,
            },
            why={
                **_SHARED_WHY,
                "radius": "Hall's proxemics: personal distance, kept among companions, ends "
                "at about 1.2 m; social distance (1.2–3.6 m) is kept among strangers "
                "(Hall 1966); plus about 0.3 m for the position error of person tracking "
                "(common practice)",
                "min_speed": "about a quarter of normal walking speed (1.2–1.4 m/s, "
                "Fruin 1971): slower counts as standing, where headings are noise",
                "max_heading": "companions walk in step; 30 degrees allows for weaving "
                "(common practice)",
                "max_speed_ratio": "companions keep a common pace: 1.25 allows about 10 % "
                "either side of it, the spread of one walker's speed (common practice)",
                "velocity_window": "about one stride pair, which averages out body sway "
                "(common practice)",
                "min_together_time": "a few seconds together, so that passing strangers who fall "
                "in step for a moment are not a group (common practice)",
                "tolerance": "brief occlusions or a step aside do not split a group "
                "(common practice)",
                "links": "a pair is judged on its own recent history, not on one moment: "
                "wherever people stand, queue or crowd, a moment's nearness chains strangers",
                "evidence_window": "half a minute, about 40 m at walking pace: strangers fall "
                "in step for seconds, companions keep together for as long as both are in "
                "view (common practice)",
                "evidence_share": "together at 40 % of the window or more: companions weave "
                "round others, fall behind or spread out much of the time (common practice)",
                "nearest": "companions are among each other's nearest: pedestrian groups are "
                "mostly of two to four (Moussaid et al. 2010), so three nearest reach every "
                "neighbour in a group of four; mutual nearest neighbours after Brito et al. 1997",
                "min_abreast": "companions walk side by side or in a V (Moussaid et al. 2010), "
                "strangers in a stream one behind another; a follower straight behind appears "
                "within about 10 degrees of the line of walking (half a 0.45 m shoulder "
                "breadth at 1.2 m) plus a few degrees of sway, hence 15 (common practice)",
                "max_delay": "2 s: a walker follows a companion's turn within a step "
                "or two (about 1 s), so twice that covers it (common practice)",
                "standing": "ignored: people standing or queueing keep personal distances "
                "from strangers too (Hall 1966), so nearness at rest is no evidence either way; "
                "companions who stop keep the evidence of their walk",
            },
        ),
        Preset(
            name="team-sport",
            subject="people",
            summary="players of a team sport tracked by optical or GNSS systems",
            values={
                "radius": 5.0,
                "mode": "component",
                "min_speed": 1.0,
                "max_heading": 45.0,
                "max_speed_ratio": 2.0,
                "velocity_window": 1.0,
                "min_size": 2,
                "min_together_time": 5.0,
                "tolerance": 1.0,
                "links": "evidence",
                "evidence_window": 6.0,
                "evidence_share": 0.5,
                "nearest": 3,
                "min_abreast": None,
                "standing": "together",
                "max_delay": 2.0,
            },
            why={
                **_SHARED_WHY,
                "radius": "GNSS player tracking errs by about 1–1.5 m per position, so "
                "radii below ~2 m are noise on GNSS data; 5 m is within reach of a "
                "challenge or a short pass (common practice)",
                "min_speed": "1 m/s: the upper edge of the standing-and-walking speed band "
                "used when GNSS running loads are monitored; slower, a player's heading is "
                "noise (common practice)",
                "max_heading": "45 degrees keeps players running the same line together "
                "and drops crossing runs (common practice)",
                "max_speed_ratio": "2.0 (common practice)",
                "velocity_window": "1 s smooths 10–25 Hz positional noise (common practice)",
                "min_together_time": "5 s: longer than a passing duel (common practice)",
                "tolerance": "1 s (common practice)",
                "links": "judged on the pair's last and next few seconds, so that a duel or "
                "a crossing run does not link two players",
                "evidence_window": "6 s: a few times a passing duel (common practice)",
                "evidence_share": "together more often than not (common practice)",
                "nearest": "in a crowded penalty area close means closer than the other "
                "players: each among the other's three nearest (common practice)",
                "min_abreast": "off: players run in file as often as abreast",
                "max_delay": "2 s: a player reacts to a teammate's or an opponent's run "
                "within about a second (common practice)",
                "standing": "together: a marker stays with a forward whether both run, jog or "
                "stand, and stoppages are short against the window; the three-nearest rule "
                "keeps a crowded set piece from linking everyone (common practice)",
            },
        ),
        Preset(
            name="vehicles",
            subject="vehicles",
            summary="road vehicles or vessels travelling in convoy (GPS or AIS fixes)",
            values={
                "radius": 60.0,
                "mode": "component",
                "min_speed": 2.0,
                "max_heading": 30.0,
                "max_speed_ratio": 1.5,
                "velocity_window": 20.0,
                "min_size": 2,
                "min_together_time": 120.0,
                "tolerance": 30.0,
                "links": "evidence",
                "evidence_window": 120.0,
                "evidence_share": 0.5,
                "nearest": 3,
                "min_abreast": None,
                "standing": "apart",
                "max_delay": 120.0,
            },
            why={
                **_SHARED_WHY,
                "radius": "the two-second following headway (common practice in driver "
                "guidance) at about 30 m/s, i.e. 60 m",
                "min_speed": "2 m/s: below it a vehicle is queueing or parked (common practice)",
                "max_heading": "30 degrees (common practice)",
                "max_speed_ratio": "1.5 (common practice)",
                "velocity_window": "20 s, a few GPS/AIS fixes (common practice)",
                "min_together_time": "2 minutes: longer than meeting at a junction "
                "(common practice)",
                "tolerance": "30 s covers a missed fix or two (common practice)",
                "links": "judged on the pair's last and next minute, so that overtaking or "
                "sharing a junction does not link two vehicles",
                "evidence_window": "2 minutes, the minimum duration (common practice)",
                "evidence_share": "together more often than not (common practice)",
                "nearest": "in dense traffic close means closer than the other vehicles: each "
                "among the other's three nearest, the vehicles ahead and behind and one "
                "alongside (common practice)",
                "min_abreast": "off: convoys drive in file",
                "max_delay": "2 minutes: a following vehicle takes the same turn a few headways "
                "later (common practice)",
                "standing": "apart: vehicles queueing at lights or parked are not a convoy, and "
                "a queue moving off in file would otherwise look like one",
            },
        ),
        Preset(
            name="vessels",
            subject="vehicles",
            summary="ships and boats travelling together (AIS fixes)",
            values={
                "radius": 500.0,
                "mode": "component",
                "min_speed": 0.5,
                "max_heading": 20.0,
                "max_speed_ratio": 1.3,
                "velocity_window": 60.0,
                "min_size": 2,
                "min_together_time": 600.0,
                "tolerance": 180.0,
                "links": "evidence",
                "evidence_window": 600.0,
                "evidence_share": 0.5,
                "nearest": 3,
                "min_abreast": None,
                "standing": "apart",
                "max_delay": 1800.0,
            },
            why={
                **_SHARED_WHY,
                "radius": "500 m, about 2.7 cables (1 cable = 185.2 m): ships sailing in "
                "company or in convoy keep station a few cables apart, while anchored "
                "neighbours in a roadstead lie closer (common practice)",
                "min_speed": "0.5 m/s, about 1 knot of speed over ground: below it a vessel "
                "is anchored, moored or drifting, and its course over ground is noise (common "
                "practice in AIS analysis)",
                "max_heading": "20 degrees of course over ground: ships in company steer the "
                "same course within a few degrees; 20 allows for yawing in a seaway (common "
                "practice)",
                "max_speed_ratio": "1.3: ships in company keep one speed (common practice)",
                "velocity_window": "60 s: several AIS reports of a vessel under way, which "
                "Class A transponders send every 2 to 10 s and Class B every 30 s (ITU-R "
                "M.1371, from memory)",
                "min_together_time": "10 minutes: longer than two ships passing or overtaking "
                "(common practice)",
                "tolerance": "3 minutes: one or two missed reports, and the 3-minute interval "
                "of a slow or anchored ship (ITU-R M.1371, from memory)",
                "links": "judged on the pair's last and next five minutes, so that an "
                "overtaking or a crossing in a channel does not link two ships",
                "evidence_window": "10 minutes, the minimum duration (common practice)",
                "evidence_share": "together more often than not (common practice)",
                "nearest": "in a busy channel close means closer than the other ships: each "
                "among the other's three nearest (common practice)",
                "min_abreast": "off: ships in company sail in line ahead as often as abreast",
                "max_delay": "30 minutes: a ship in convoy turns where the ship ahead "
                "turned, a few nautical miles later at 10–15 knots (common practice)",
                "standing": "apart: ships at anchor or moored side by side are not sailing "
                "together",
            },
        ),
        Preset(
            name="collars",
            subject="animals",
            summary="collared animals with fixes every few minutes to hours",
            values={
                "radius": 100.0,
                "mode": "component",
                "min_speed": 0.0,
                "max_heading": None,
                "max_speed_ratio": None,
                "velocity_window": 7200.0,
                "min_size": 2,
                "min_together_time": 6 * 3600.0,
                "tolerance": 6 * 3600.0,
                "links": "evidence",
                "evidence_window": 6 * 3600.0,
                "evidence_share": 0.5,
                "nearest": 0,
                "min_abreast": None,
                "standing": "together",
                "max_delay": 6 * 3600.0,
            },
            why={
                **_SHARED_WHY,
                "radius": "proximity thresholds of 50–100 m are widely used for "
                "association of ungulates from GPS collars, a little above collar "
                "error and herd spacing (common practice)",
                "max_heading": "off: headings between hourly fixes say little about "
                "moving together (common practice)",
                "max_speed_ratio": "off, for the same reason",
                "min_together_time": "6 hours (common practice)",
                "tolerance": "6 hours: with hourly fixes and 10–30 % of them missed, runs "
                "of three or four missed fixes are routine (common practice)",
                "min_speed": "0: with the motion predicates off it does not matter",
                "velocity_window": "two fixes at hourly sampling",
                "links": "judged on the pair's last and next few hours, so that one fix "
                "side by side at a waterhole does not link two animals",
                "evidence_window": "6 hours, the minimum duration (common practice)",
                "evidence_share": "together more often than not (common practice)",
                "nearest": "off: a herd is a group, so every animal near is a companion",
                "min_abreast": "off: no headings between hourly fixes",
                "max_delay": "6 hours: a few GPS fixes; herd members set off after an initiator "
                "within hours at collar rates (common practice)",
                "standing": "together: resting together is association for animals",
            },
        ),
    )
}


def preset_subject(name: str | None) -> str | None:
    """Return what preset ``name`` is for: people, vehicles or animals (None without one)."""
    return PRESETS[name].subject if name in PRESETS else None


def preset_values(name: str | None) -> dict[str, Any]:
    """Return the defaults of preset ``name`` (empty for None).

    Raises
    ------
    InputError
        When no preset has that name.
    """
    if name is None:
        return {}
    if name not in PRESETS:
        raise bad_setting("preset", f"must be one of {', '.join(PRESETS)}, not {name!r}")
    return dict(PRESETS[name].values)

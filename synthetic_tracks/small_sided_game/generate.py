"""Small-sided game: two invented teams of six on a 60 x 40 m pitch, 10 Hz for six minutes.

Run ``python synthetic_tracks/small_sided_game/generate.py`` to rewrite ``players.csv.gz``
and ``truth.json`` next to this file; import it and call ``generate(seed)`` for variants.

Layout (x along the pitch, amber defends x = 0, teal defends x = 60):

* Teal forwards attack in three separate lanes of the amber half. Lanes are at least
  6.5 m apart, so a marker shadowing one forward is never within 2 x radius of another.
* Each amber back shadows one forward: tight (about 1 m, goal side) while marking, loose
  (about 8 m behind) otherwise. Marking with two backs on three forwards gives forward
  participation 2/3, one marking back only 1/3 - so the pair {amber_back, teal_forward}
  is prevalent exactly while both backs mark at once.
* Amber's pivot, winger and striker press as a compact unit in the teal half part of the
  time and otherwise spread into three lanes. At 4:00 the striker drops back to mark the
  third forward, and his role changes to amber_back; the pivot and winger keep pressing
  as a pair.
* Keepers stay in their goal areas, more than 50 m apart.
* Eight counter-attacks (as many as there is room for, at least six): teal wins the ball
  and back T02 breaks upfield, 6 s at 4.5 m/s, cutting from side to side every 1-1.8 s;
  back T03 runs about 1 m behind him and 1.3 m to one side, heading where T02 headed
  0.6 s earlier (T02 leads, T03 follows 0.6 s later). T03 closes in on T02 over 5 s, T02
  speeds up over 2 s, both ease off over 2 s and drop back to their own paths over 10 s.
  Each break lies where both stay at least 4 m from every other player until they stop,
  away from the decoy crossings.
"""

from __future__ import annotations

import json
import sys
from datetime import UTC, datetime
from pathlib import Path

import numpy as np
import pandas as pd
from scipy.ndimage import maximum_filter1d

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))
import scenario_kit as kit  # noqa: E402

SEED = 20260516
HERE = Path(__file__).resolve().parent
DATA_FILE = "players.csv.gz"
START_EPOCH = int(datetime(2026, 5, 16, 10, 0, tzinfo=UTC).timestamp())
RATE_HZ = 10
N_SAMPLES = 360 * RATE_HZ
DT = 1.0 / RATE_HZ
RADIUS = 3.0
CHANGE_INDEX = 240 * RATE_HZ  # 4:00, when the striker drops back
TOLERANCE = 0.01
PARAMETERS = {
    "radius": RADIUS,
    "min_participation": 0.5,
    "min_prevalence": 0.5,
    "min_prevalent_time": 30.0,
    "step": 0.1,
    "max_gap": 1.0,
}
PLAYERS = {
    "A01": "amber_keeper",
    "A02": "amber_back",
    "A03": "amber_back",
    "A04": "amber_pivot",
    "A05": "amber_winger",
    "A06": "amber_striker",
    "T01": "teal_keeper",
    "T02": "teal_back",
    "T03": "teal_back",
    "T04": "teal_forward",
    "T05": "teal_forward",
    "T06": "teal_forward",
}
# Goal-side offsets of a back from the forward he shadows.
TIGHT = np.array([-0.8, 0.3])
LOOSE = np.array([-8.0, 0.0])
MARK_RAMP = 4.0
PRESS_RAMP = 3.0
STRIKER_LAST_PRESS_END = 232.0
DROP_START, DROP_LENGTH = 234.0, 8.0
# Counter-attacks: leader, follower, and how much later (seconds) the follower takes the
# leader's heading.
LEAD = ("T02", "T03", 0.6)
COUNTERS, FEWEST_COUNTERS = 8, 6  # as many as there is room for, at least the fewest
COUNTER_LENGTH, COUNTER_SPEED = 6.0, 4.5  # seconds at full speed, m/s
CUT_ANGLE, CUT_EVERY, CUT_TIME = 0.4, (1.0, 1.8), 0.3  # rad off the line; seconds
COUNTER_BEHIND, COUNTER_SIDE = 1.0, 1.3  # metres: where the follower runs, on average
# seconds in which the follower closes in, the leader speeds up, both ease off, both drop back
CLOSE, JOIN, EASE, REJOIN = 5.0, 2.0, 2.0, 10.0
COUNTER_CLEAR = RADIUS + 1.0  # least distance to every other player until the two stop
TOP_SPEED = 8.5  # m/s, fastest a player may run at any moment of a break
DECOY_MARGIN = 6.0  # seconds kept free of counter-attacks around a decoy crossing


def _crossing(
    pos: dict[str, np.ndarray],
    options: list[tuple[str, str, np.ndarray]],
    t: np.ndarray,
    lo: float,
    hi: float,
) -> tuple[str, str, int]:
    """Bend one player's path so that he runs past another, 1 m to the side, head-on.

    ``options`` lists (runner, passed player, weight that is non-zero while the passed
    player is pressing). Among moments in [lo, hi] when the passed player runs freely
    at 2.5 m/s or more, the one needing the smallest bend of the runner's own path wins,
    which keeps the runner's speed realistic.
    """
    hold, ramp, speed_b = 0.6, 3.0, 3.5
    span = hold + ramp
    k_span = int(round(span * RATE_HZ))
    ks = np.arange(int(lo * RATE_HZ) + k_span, int(hi * RATE_HZ) - k_span)
    best: tuple[float, str, str, int] = (np.inf, "", "", -1)
    for b, a, a_busy in options:
        va = np.gradient(pos[a], DT, axis=0)
        speed_a = np.hypot(va[:, 0], va[:, 1])
        busy = maximum_filter1d(a_busy, size=2 * k_span + 1)[ks] > 0
        cand = ks[~busy & (speed_a[ks] >= 2.5)]
        direction = va[cand] / speed_a[cand, None]
        side = np.stack([-direction[:, 1], direction[:, 0]], axis=1)
        start = pos[a][cand] + side + direction * speed_b * span
        end = pos[a][cand] + side - direction * speed_b * span
        inside = (np.minimum(start, end) > 1.0).all(1) & (np.maximum(start, end) < [59, 39]).all(1)
        bend = np.maximum(
            np.linalg.norm(pos[b][cand - k_span] - start, axis=1),
            np.linalg.norm(pos[b][cand + k_span] - end, axis=1),
        )
        bend[~inside] = np.inf
        if len(cand) and bend.min() < best[0]:
            best = (float(bend.min()), b, a, int(cand[np.argmin(bend)]))
    bend, b, a, k = best
    if not np.isfinite(bend):
        raise RuntimeError(f"no crossing possible in [{lo}, {hi}] s")
    va = np.gradient(pos[a], DT, axis=0)[k]
    direction = va / np.hypot(*va)
    side = np.array([-direction[1], direction[0]])
    run = pos[a][k] + side - np.outer(t - t[k], direction) * speed_b
    w = kit.plateau_weight(t, [(t[k] - hold, t[k] + hold)], ramp)[:, None]
    pos[b] = (1 - w) * pos[b] + w * run
    return b, a, k


def _cuts(rng: np.random.Generator, n: int) -> np.ndarray:
    """Heading offsets (rad) of a run with cuts: from side to side of its line, at random times.

    Offsets hold between cuts at 60-100 % of ``CUT_ANGLE`` on alternating sides; cuts come
    every ``CUT_EVERY`` seconds and each turns over ``CUT_TIME`` seconds.
    """
    span = n * DT
    cut_at = np.cumsum(rng.uniform(*CUT_EVERY, size=int(span / CUT_EVERY[0]) + 2))
    cut_at -= rng.uniform(0.0, CUT_EVERY[1])
    side = (-1.0) ** (np.arange(cut_at.size + 1) + rng.integers(2))
    level = CUT_ANGLE * rng.uniform(0.6, 1.0, size=cut_at.size + 1) * side
    local = np.arange(n) * DT
    turns = kit.smoothstep((local[None, :] - cut_at[:, None]) / CUT_TIME)  # (cuts, samples)
    return level[0] + np.diff(level) @ turns


def _counter_attacks(
    rng: np.random.Generator,
    pos: dict[str, np.ndarray],
    t: np.ndarray,
    busy: list[int],
) -> list[dict[str, float]]:
    """Plant the counter-attacks: the leader breaks upfield, the follower takes his headings.

    In each break the leader runs along a line within 40 degrees of upfield, cutting from
    side to side of it (:func:`_cuts`): from where he is, his speed rises to
    ``COUNTER_SPEED`` over ``JOIN`` seconds, holds for ``COUNTER_LENGTH`` and falls to
    nothing over ``EASE``, and over ``REJOIN`` seconds he drops back to his own path. The
    follower's target is the leader's position ``delay`` earlier plus a constant shift
    that puts him, at full speed, on average ``COUNTER_BEHIND`` behind the leader and
    ``COUNTER_SIDE`` to one side: while he is on it his heading at t is the leader's at
    t - delay. He blends onto it over ``CLOSE`` seconds before the leader speeds up,
    keeps to it until both stop, and drops back to his own path from where he stopped.

    Start times (every 0.5 s, ``DECOY_MARGIN`` clear of the ``busy`` sample indices),
    lines and sides are tried together; a break must keep both on the pitch, the two
    0.5-2.6 m apart at full speed and under the radius until they stop, everyone else
    ``COUNTER_CLEAR`` away until they stop, and nobody over ``TOP_SPEED``; of those the
    one with the lowest top speed is taken. Breaks are placed one after another without
    overlap, up to ``COUNTERS`` of them while there is room, and at least
    ``FEWEST_COUNTERS``.

    Returns
    -------
    list of dict
        Per break, ``start`` and ``end`` (seconds) of the full-speed stretch.
    """
    leader, follower, delay = LEAD
    lag = int(round(delay * RATE_HZ))
    n_close, n_join, n_run, n_ease, n_back = (
        int(round(s * RATE_HZ)) for s in (CLOSE, JOIN, COUNTER_LENGTH, EASE, REJOIN)
    )
    n_pre = n_close + n_join  # window samples before full speed
    n_win = n_pre + n_run + n_ease + n_back  # one break, from closing in to back in place
    # The leader's path is built from ``lag`` samples before the window, for the follower.
    local = (np.arange(-lag, n_win) - n_pre) * DT  # seconds from the start of full speed
    speed = COUNTER_SPEED * kit.smoothstep((local + JOIN) / JOIN)
    speed *= kit.smoothstep((COUNTER_LENGTH + EASE - local) / EASE)
    back = kit.smoothstep((COUNTER_LENGTH + EASE + REJOIN - local) / REJOIN)
    on_lead = (kit.smoothstep((local + JOIN) / JOIN) * back)[:, None]
    on_follow = (kit.smoothstep((local + JOIN + CLOSE) / CLOSE) * back)[lag:, None]
    full = slice(lag + n_pre, lag + n_pre + n_run)  # leader samples at full speed
    running = slice(n_pre, n_pre + n_run + n_ease)  # window samples from full speed to stop
    others = np.stack([pos[p] for p in PLAYERS if p not in (leader, follower)])
    starts = np.arange(n_pre + lag, len(t) - n_win + n_pre, 5)  # first full-speed sample
    free = np.ones(starts.size, dtype=bool)
    margin = int(DECOY_MARGIN * RATE_HZ)
    for k in busy:
        free &= (starts - n_pre + n_win < k - margin) | (starts - n_pre > k + margin)
    counters = []
    while len(counters) < COUNTERS:
        cuts = _cuts(rng, lag + n_win)
        ks = starts[free]
        span = ks[:, None] - n_pre - lag + np.arange(lag + n_win)  # (candidates, samples)
        win = span[:, lag:]
        best: tuple[float, int, np.ndarray, np.ndarray] = (np.inf, -1, np.empty(0), np.empty(0))
        for line in np.pi + np.linspace(-0.7, 0.7, 8):
            heading = line + cuts
            run = np.cumsum(speed[:, None] * np.column_stack([np.cos(heading), np.sin(heading)]),
                            axis=0) * DT  # fmt: skip
            # from where the leader is as he starts to speed up (his speed is nil before)
            target = pos[leader][ks - n_join][:, None] + run - run[0]
            lead = (1 - on_lead) * pos[leader][span] + on_lead * target
            gap = (run[full] - run[n_pre : n_pre + n_run]).mean(axis=0)  # run in one delay
            ahead = gap / np.linalg.norm(gap)
            for side in (-1.0, 1.0):
                beside = side * COUNTER_SIDE * np.array([-ahead[1], ahead[0]])
                shift = gap - COUNTER_BEHIND * ahead + beside
                # on the leader's heading until they stop, then back to his own path
                follow = lead[:, :-lag] + shift
                follow[:, running.stop :] = follow[:, running.stop - 1 : running.stop]
                trail = (1 - on_follow) * pos[follower][win] + on_follow * follow
                both = np.stack([lead[:, lag:], trail])  # (2, candidates, samples, 2)
                apart = np.linalg.norm(both[0, :, running] - both[1, :, running], axis=-1)
                top = np.linalg.norm(np.diff(both, axis=2), axis=-1).max(axis=(0, 2)) / DT
                ok = (
                    (both.min(axis=(0, 2, 3)) > 1.0)
                    & (both[..., 0].max(axis=(0, 2)) < 59.0)
                    & (both[..., 1].max(axis=(0, 2)) < 39.0)
                    & (apart[:, :n_run].max(axis=1) <= 2.6)
                    & (apart[:, :n_run].min(axis=1) >= 0.5)
                    & (apart.max(axis=1) < RADIUS)
                    & (top <= TOP_SPEED)
                )
                cand = np.flatnonzero(ok)
                if cand.size == 0:
                    continue
                near = others[:, win[cand][:, running]]  # (others, cand, samples, 2)
                gaps = np.linalg.norm(near[None] - both[:, None, cand][:, :, :, running], axis=-1)
                cand = cand[gaps.min(axis=(0, 1, 3)) >= COUNTER_CLEAR]
                if cand.size and top[cand].min() < best[0]:
                    i = cand[np.argmin(top[cand])]
                    best = (float(top[i]), int(ks[i]), both[0, i], both[1, i])
        _, k, lead_path, trail_path = best
        if k < 0:
            break
        window = slice(k - n_pre, k - n_pre + n_win)
        pos[leader][window], pos[follower][window] = lead_path, trail_path
        counters.append({"start": k * DT, "end": (k + n_run) * DT})
        free &= (starts - n_pre > k - n_pre + n_win) | (starts - n_pre + n_win < k - n_pre)
    if len(counters) < FEWEST_COUNTERS:
        raise RuntimeError(f"room for {len(counters)} counter-attacks only")
    return sorted(counters, key=lambda c: c["start"])


def _build(seed: int) -> dict[str, object]:
    rng = np.random.default_rng(seed)
    n, t = N_SAMPLES, np.arange(N_SAMPLES) * DT

    def box(lo: list[float], hi: list[float], sigma: float, vmax: float) -> np.ndarray:
        return kit.wander_in_box(rng, n, DT, lo, hi, tau=2.5, sigma=sigma, vmax=vmax)

    def jitter(amp: float) -> np.ndarray:
        return kit.bounded_jitter(rng, n, DT, tau=3.0, amp=amp)

    pos: dict[str, np.ndarray] = {}
    pos["A01"] = box([0.8, 15.0], [4.0, 25.0], 1.0, 3.0)
    pos["T01"] = box([56.0, 15.0], [59.2, 25.0], 1.0, 3.0)
    pos["T04"] = box([12.0, 3.0], [30.0, 10.0], 2.8, 6.5)
    pos["T05"] = box([12.0, 17.0], [30.0, 23.0], 2.8, 6.5)
    pos["T06"] = box([12.0, 30.0], [30.0, 37.0], 2.8, 6.5)
    teal_back_free = {k: box([34.0, 3.0], [52.0, 37.0], 2.0, 6.0) for k in ("T02", "T03")}

    # Two backs, independent marking schedules: the pair set is prevalent only in overlaps.
    marking = {}
    for back, fwd in (("A02", "T04"), ("A03", "T05")):
        iv = kit.alternating_intervals(
            rng, 0, 360, (40, 80), (12, 24), MARK_RAMP, start_on=bool(rng.random() < 0.7)
        )
        w = kit.plateau_weight(t, iv, MARK_RAMP)[:, None]
        pos[back] = pos[fwd] + (1 - w) * LOOSE + w * TIGHT + jitter(0.25)
        marking[back] = iv

    # When not pressing, the three hold a spread shape around the same moving centre,
    # 10 m or more apart; pressing compresses the shape to about 1 m.
    unit = box([38.0, 12.0], [48.0, 28.0], 2.4, 5.0)
    spread = {
        "A04": np.array([-7.0, 0.0]),
        "A05": np.array([0.0, -8.0]),
        "A06": np.array([0.0, 8.0]),
    }
    offsets = {"A04": np.zeros(2), "A05": np.array([0.9, -0.5]), "A06": np.array([0.9, 0.5])}
    press = kit.alternating_intervals(rng, 0, 360, (25, 45), (14, 26), PRESS_RAMP, start_on=False)
    striker_press = [iv for iv in press if iv[1] + PRESS_RAMP <= STRIKER_LAST_PRESS_END]
    w_pair = kit.plateau_weight(t, press, PRESS_RAMP)
    w_striker = kit.plateau_weight(t, striker_press, PRESS_RAMP)
    for pid, w in (("A04", w_pair), ("A05", w_pair), ("A06", w_striker)):
        shape = (1 - w[:, None]) * (spread[pid] + jitter(1.0)) + w[:, None] * (
            offsets[pid] + jitter(0.15)
        )
        pos[pid] = unit + shape
    w_drop = kit.smoothstep((t - DROP_START) / DROP_LENGTH)[:, None]
    pos["A06"] = (1 - w_drop) * pos["A06"] + w_drop * (pos["T06"] + TIGHT + jitter(0.25))

    decoys = []
    pos["T02"], pos["T03"] = teal_back_free["T02"], teal_back_free["T03"]
    busy_striker = w_striker + w_drop[:, 0]
    for lo, hi, passed in (
        (10.0, 120.0, (("A05", w_pair), ("A04", w_pair), ("A06", busy_striker))),
        (120.0, 230.0, (("A05", w_pair), ("A04", w_pair), ("A06", busy_striker))),
        (245.0, 355.0, (("A05", w_pair), ("A04", w_pair))),
    ):
        options = [(b, a, busy) for b in ("T02", "T03") for a, busy in passed]
        b, a, k = _crossing(pos, options, t, lo, hi)
        decoys.append({"members": sorted([a, b]), "index": k})
    counters = _counter_attacks(rng, pos, t, [d["index"] for d in decoys])

    return {
        "t": t,
        "pos": pos,
        "marking": marking,
        "press": press,
        "striker_press": striker_press,
        "decoys": decoys,
        "counters": counters,
    }


def _iso(seconds: float) -> str:
    return kit.iso_utc(START_EPOCH * kit.NS + int(round(seconds * 1000)) * 1_000_000)


def _episodes(plan: dict[str, object]) -> list[dict[str, object]]:
    end = (N_SAMPLES - 1) * DT
    out = []

    def add(members: list[str], a: float, b: float, how: str, shortest: float = 10.0) -> None:
        a, b = max(a, 0.0), min(b, end)
        if b - a >= shortest:
            out.append({"members": sorted(members), "start": _iso(a), "end": _iso(b), "how": how})

    for back, fwd in (("A02", "T04"), ("A03", "T05")):
        for a, b in plan["marking"][back]:
            add([back, fwd], a, b, "back marks a forward about 1 m goal side, same run")
    for a, b in plan["striker_press"]:
        add(["A04", "A05", "A06"], a, b, "pressing trio moves as a compact unit")
    for a, b in plan["press"]:
        if (a, b) not in plan["striker_press"] and a > STRIKER_LAST_PRESS_END:
            add(["A04", "A05"], a, b, "pivot and winger press as a pair after 4:00")
    add(["A06", "T06"], DROP_START + DROP_LENGTH, end, "former striker marks the third forward")
    for run in plan["counters"]:
        add(
            list(LEAD[:2]),
            run["start"],
            run["end"],
            "counter-attack: the two backs break upfield together",
            shortest=COUNTER_LENGTH / 2,
        )
    return sorted(out, key=lambda e: (e["start"], e["members"]))


def generate(seed: int = SEED) -> tuple[pd.DataFrame, dict]:
    """Build the game tracks and their truth.

    Parameters
    ----------
    seed : int
        Seed of the numpy generator; the default reproduces the committed files.

    Returns
    -------
    tuple of (pandas.DataFrame, dict)
        Columns player, t (epoch seconds), x, y (metres), role; and the truth dict.
    """
    plan = _build(seed)
    ids = list(PLAYERS)
    pos = np.stack([plan["pos"][p] for p in ids])
    lo, hi = pos.min(axis=(0, 1)), pos.max(axis=(0, 1))
    if (lo < 0).any() or hi[0] > 60 or hi[1] > 40:
        raise RuntimeError(f"seed {seed}: a player left the pitch ({lo}, {hi})")
    roles = np.array([[PLAYERS[p]] * N_SAMPLES for p in ids], dtype=object)
    roles[ids.index("A06"), CHANGE_INDEX:] = "amber_back"
    present = np.ones(roles.shape, dtype=bool)

    frame = pd.DataFrame(
        {
            "player": np.repeat(ids, N_SAMPLES),
            "t": np.tile(np.round(START_EPOCH + np.arange(N_SAMPLES) / RATE_HZ, 1), len(ids)),
            "x": np.round(pos[..., 0].ravel(), 2),
            "y": np.round(pos[..., 1].ravel(), 2),
            "role": roles.ravel(),
        }
    )
    frame = frame.sort_values(["t", "player"], kind="stable").reset_index(drop=True)

    def stats(role_set: list[str]) -> dict[str, int | float]:
        return kit.planted_prevalence(pos, present, roles, role_set, RADIUS, 0.5)

    trio_how = "pivot, winger and striker press as one unit (pairwise under 1.5 m), "
    planted = [
        kit.planted_entry(
            stats(["amber_back", "teal_forward"]),
            ["amber_back", "teal_forward"],
            TOLERANCE,
            "two backs each tightly mark one of three forwards; prevalent only while both "
            "mark (forward participation 2/3); after 4:00 a third back marks the third forward",
        ),
        kit.planted_entry(
            stats(["amber_pivot", "amber_striker", "amber_winger"]),
            ["amber_pivot", "amber_striker", "amber_winger"],
            TOLERANCE,
            trio_how + "otherwise spread into lanes 7 m apart; striker role exists until 4:00",
        ),
        kit.planted_entry(
            stats(["amber_pivot", "amber_striker"]),
            ["amber_pivot", "amber_striker"],
            TOLERANCE,
            "implied by the pressing trio",
        ),
        kit.planted_entry(
            stats(["amber_striker", "amber_winger"]),
            ["amber_striker", "amber_winger"],
            TOLERANCE,
            "implied by the pressing trio",
        ),
        kit.planted_entry(
            stats(["amber_pivot", "amber_winger"]),
            ["amber_pivot", "amber_winger"],
            TOLERANCE,
            "part of the pressing trio, and still pressing as a pair after 4:00",
        ),
    ]
    truth = {
        "scenario": "small_sided_game",
        "description": "Two invented six-a-side teams (amber, teal) on a 60 x 40 m pitch, "
        "10 Hz positions for six minutes; times are epoch seconds (UTC).",
        "input": DATA_FILE,
        "columns": {"id": "player", "time": "t", "x": "x", "y": "y", "role": "role"},
        "parameters": PARAMETERS,
        "planted": planted,
        "independent": [
            ["amber_keeper", "teal_keeper"],
            ["amber_back", "teal_keeper"],
            ["amber_keeper", "teal_back"],
            ["amber_keeper", "teal_forward"],
        ],
        "episodes": _episodes(plan),
        "decoys": [
            {
                "members": d["members"],
                "time": _iso(d["index"] * DT),
                "how": "crossing paths, opposite headings",
            }
            for d in plan["decoys"]
        ],
        "leads": [
            {
                "leader": LEAD[0],
                "follower": LEAD[1],
                "delay_s": LEAD[2],
                "when": [
                    {"start": _iso(r["start"]), "end": _iso(r["end"])} for r in plan["counters"]
                ],
                "how": "counter-attacks: the leader breaks upfield, cutting from side to "
                "side; the follower runs about 1 m behind him and 1.3 m to one side and heads "
                "where the leader headed delay_s earlier",
            }
        ],
        "role_changes": [
            {
                "id": "A06",
                "from": "amber_striker",
                "to": "amber_back",
                "time": _iso(CHANGE_INDEX * DT),
                "how": "striker drops back to mark the third forward for the last two minutes",
            }
        ],
    }
    return frame, truth


def write(out_dir: Path = HERE, seed: int = SEED) -> None:
    """Write the data file and truth.json into ``out_dir``."""
    frame, truth = generate(seed)
    out_dir.mkdir(parents=True, exist_ok=True)
    # A fixed gzip timestamp keeps the file byte-identical between runs.
    frame.to_csv(out_dir / DATA_FILE, index=False, compression={"method": "gzip", "mtime": 0})
    (out_dir / "truth.json").write_text(json.dumps(truth, indent=2) + "\n")


if __name__ == "__main__":
    write()

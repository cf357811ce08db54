"""Dense crowd: 340 invented strangers and 24 planted groups on a 40 x 30 m plaza, five minutes.

Run ``python synthetic_tracks/dense_crowd/generate.py`` to rewrite ``people.csv.gz`` and
``truth.json`` next to this file; import it and call ``generate(seed)`` for variants.

The scene is built to be hard for a group detector, with the traps of real crowds:

* **Crossers** (180) walk from one edge of the plaza to another at their own pace.
* **A stream** (80) of people walks along a 4 m wide band between the west and east
  entrances, both ways: strangers who go the same way at about the same speed, close
  side by side or one behind another, for tens of seconds.
* **Standers** (40) walk in, stand for half a minute to a few minutes (many of them near two
  notice boards, a metre or two from strangers) and walk out.
* **A queue** (40 strangers) at a kiosk: people stand in line 0.75 m apart, step forward
  together each time the head is served, and leave when served.
* **Planted groups** (24: 14 pairs, 7 triples, 3 of four) walk together side by side at
  0.6-0.9 m: ten cross the plaza, five walk in the stream, five walk to a notice board, wait
  there together among the standers and walk on, and four queue together at the kiosk.

Speeds: single walkers 1.3 m/s on average (sd 0.15; Fruin 1971 and later surveys put free
walking at 1.2-1.4 m/s); groups walk slower the larger they are (1.15, 1.05 and 0.95 m/s for
two, three and four members, after the trend reported by Moussaid et al. 2010). Positions
carry a smooth sway of up to 0.1 m and white noise of 0.03 m, like hand-annotated video.
Fixes every 0.4 s (2.5 Hz, the rate of the public annotated pedestrian scenes). Every person
and place here is invented.
"""

from __future__ import annotations

import gzip
import json
import sys
from pathlib import Path

import numpy as np
import pandas as pd

sys.path.insert(0, str(Path(__file__).resolve().parent.parent))
import scenario_kit as kit  # noqa: E402

SEED = 20261203
HERE = Path(__file__).resolve().parent
DT = 0.4
DURATION = 300.0
START = 1_790_500_000.0  # epoch seconds of the first frame (an arbitrary morning)
WIDTH, HEIGHT = 40.0, 30.0
BAND = (13.0, 17.0)  # y range of the west-east stream
BOARDS = ((9.0, 26.0), (27.0, 4.0))  # notice boards where people stand and wait
KIOSK = np.array([34.0, 23.0])  # head of the queue; the line grows westwards
QUEUE_SPACING = 0.75
GROUP_SIZES = [2] * 14 + [3] * 7 + [4] * 3
GROUP_PLANS = ["cross"] * 10 + ["stream"] * 5 + ["wait"] * 5 + ["queue"] * 4
GROUP_SPEED = {2: 1.15, 3: 1.05, 4: 0.95}
PARAMETERS = {"preset": "pedestrians", "step": DT, "max_gap": 1.2}


def _edge_point(rng: np.random.Generator, side: int | None = None) -> np.ndarray:
    """A point on the plaza's edge (0 west, 1 east, 2 south, 3 north)."""
    side = int(rng.integers(4)) if side is None else side
    if side in (0, 1):
        return np.array([0.0 if side == 0 else WIDTH, rng.uniform(1, HEIGHT - 1)])
    return np.array([rng.uniform(1, WIDTH - 1), 0.0 if side == 2 else HEIGHT])


def _other_edge(rng: np.random.Generator, start: np.ndarray) -> np.ndarray:
    """A point on an edge other than the one ``start`` lies on."""
    side = 0 if start[0] == 0 else 1 if start[0] == WIDTH else 2 if start[1] == 0 else 3
    return _edge_point(rng, int(rng.choice([s for s in range(4) if s != side])))


class _Path:
    """Knots (time, x, y) of a piecewise-straight path."""

    def __init__(self, t: float, xy: np.ndarray) -> None:
        self.knots = [(float(t), float(xy[0]), float(xy[1]))]

    @property
    def end(self) -> tuple[float, np.ndarray]:
        t, x, y = self.knots[-1]
        return t, np.array([x, y])

    def walk(self, to: np.ndarray, speed: float) -> _Path:
        t, at = self.end
        self.knots.append((t + float(np.hypot(*(to - at))) / speed, float(to[0]), float(to[1])))
        return self

    def stay(self, seconds: float) -> _Path:
        t, at = self.end
        self.knots.append((t + seconds, float(at[0]), float(at[1])))
        return self

    def at(self, times: np.ndarray) -> np.ndarray:
        k = np.array(self.knots)
        return np.column_stack([np.interp(times, k[:, 0], k[:, 1]),
                                np.interp(times, k[:, 0], k[:, 2])])  # fmt: skip


def _crossing(rng: np.random.Generator, t0: float, speed: float) -> _Path:
    start = _edge_point(rng)
    goal = _other_edge(rng, start)
    middle = (start + goal) / 2 + rng.normal(0, 3, 2)  # a gentle bend
    middle = np.clip(middle, [2, 2], [WIDTH - 2, HEIGHT - 2])
    return _Path(t0, start).walk(middle, speed).walk(goal, speed)


def _streaming(rng: np.random.Generator, t0: float, speed: float) -> _Path:
    lane = rng.uniform(*BAND)
    west, east = np.array([0.0, lane]), np.array([WIDTH, lane + rng.normal(0, 0.5)])
    start, goal = (west, east) if rng.random() < 0.6 else (east, west)
    return _Path(t0, start).walk(goal, speed)


def _waiting(rng: np.random.Generator, t0: float, speed: float, spot: np.ndarray,
             seconds: float) -> _Path:  # fmt: skip
    start = _edge_point(rng)
    return _Path(t0, start).walk(spot, speed).stay(seconds).walk(_other_edge(rng, start), speed)


def _stand_spot(rng: np.random.Generator) -> np.ndarray:
    """Where a stander waits: near a notice board (two in three) or anywhere."""
    if rng.random() < 2 / 3:
        board = np.array(BOARDS[int(rng.integers(len(BOARDS)))])
        return board + rng.uniform(-3.5, 3.5, 2) * [1.0, 0.6]
    return rng.uniform([4, 4], [WIDTH - 4, HEIGHT - 4])


def _queue_paths(rng: np.random.Generator, units: list[tuple[int, float]]) -> list[list[_Path]]:
    """Paths of queue units (size, arrival time): each stands in line until served.

    The head unit is served every 6-12 s while the line is not empty; everyone behind steps
    forward by the served unit's length. Units arrive at the tail, walking from an edge.
    """
    slot = lambda k: KIOSK - np.array([QUEUE_SPACING * k, 0.0])  # noqa: E731
    events: list[tuple[float, str, int]] = [(t, "arrive", u) for u, (_, t) in enumerate(units)]
    line: list[int] = []  # unit numbers, head first
    paths: list[list[_Path]] = [[] for _ in units]
    next_service = None
    events.sort()
    while events or line:
        if line and next_service is not None and (not events or next_service <= events[0][0]):
            now, head = next_service, line.pop(0)
            step = units[head][0]
            exit_ = _edge_point(rng, int(rng.choice([1, 3])))  # served: leave east or north
            along = np.array([0.0, 0.7]) if exit_[0] == WIDTH else np.array([0.7, 0.0])
            for m, p in enumerate(paths[head]):  # a group leaves side by side
                p.stay(max(now - p.end[0], 0.0)).walk(exit_ + m * along, 1.2 if step == 1 else 1.0)
            for u in line:  # the rest step forward together
                for p in paths[u]:
                    t, at = p.end
                    # a step that starts while the last is under way starts where it ends
                    p.stay(max(now - t, 0.0)).walk(at + np.array([QUEUE_SPACING * step, 0.0]),
                                                   0.5)  # fmt: skip
            next_service = now + rng.uniform(6, 12) if line else None
            continue
        now, _, u = events.pop(0)
        size = units[u][0]
        behind = sum(units[v][0] for v in line)
        start = _edge_point(rng, int(rng.choice([0, 2])))
        along = np.array([0.0, 0.7]) if start[0] == 0 else np.array([0.7, 0.0])
        for m in range(size):  # a group arrives side by side
            p = _Path(now - np.hypot(*(slot(behind + m) - start)) / 1.2, start + m * along)
            paths[u].append(p.walk(slot(behind + m), 1.2))
        line.append(u)
        if next_service is None:
            next_service = now + rng.uniform(6, 12)
    return paths


def _formation(rng: np.random.Generator, anchor: np.ndarray, size: int) -> np.ndarray:
    """Member positions of a group around its anchor path: abreast when walking, a huddle
    when standing; shape (size, n, 2)."""
    gap = rng.uniform(0.6, 0.9)
    heading = np.gradient(anchor, DT, axis=0)
    speed = np.hypot(heading[:, 0], heading[:, 1])
    walking = speed > 0.2
    # keep the last walking heading while standing
    idx = np.where(walking, np.arange(len(anchor)), 0)
    np.maximum.accumulate(idx, out=idx)
    unit = heading[idx] / np.maximum(speed[idx], 1e-9)[:, None]
    side = np.column_stack([-unit[:, 1], unit[:, 0]])
    lateral = (np.arange(size) - (size - 1) / 2) * gap
    angles = np.linspace(0, 2 * np.pi, size, endpoint=False) + rng.uniform(0, np.pi)
    huddle = 0.45 * gap / np.sin(np.pi / size) * np.column_stack([np.cos(angles), np.sin(angles)])
    # ease between the two formations over about two seconds
    kernel = np.ones(5) / 5
    w = np.convolve(np.pad(walking.astype(float), 2, mode="edge"), kernel, mode="valid")
    out = np.empty((size, len(anchor), 2))
    for m in range(size):
        abreast = lateral[m] * side
        out[m] = anchor + w[:, None] * abreast + (1 - w[:, None]) * huddle[m]
    return out


def _people(rng: np.random.Generator, times: np.ndarray) -> tuple[list, list, dict, dict]:
    """Return the strangers' paths and kinds, and each group's member paths and presence."""
    solo: list[_Path] = []
    kinds: list[str] = []
    walker_speed = lambda: float(np.clip(rng.normal(1.3, 0.15), 0.9, 1.8))  # noqa: E731
    for _ in range(180):
        solo.append(_crossing(rng, rng.uniform(-30, DURATION), walker_speed()))
        kinds.append("crosser")
    for _ in range(80):
        solo.append(_streaming(rng, rng.uniform(-30, DURATION), walker_speed()))
        kinds.append("stream")
    for _ in range(40):
        solo.append(_waiting(rng, rng.uniform(-120, DURATION - 20), walker_speed(),
                             _stand_spot(rng), rng.uniform(30, 200)))  # fmt: skip
        kinds.append("stander")
    # the queue: 40 single strangers and the four queueing groups, in random order
    queue_groups = [g for g, plan in enumerate(GROUP_PLANS) if plan == "queue"]
    order = rng.permutation(40 + len(queue_groups))
    arrivals = np.sort(rng.uniform(-60, DURATION - 40, order.size))
    units = [(GROUP_SIZES[queue_groups[k - 40]] if k >= 40 else 1, float(t))
             for k, t in zip(order, arrivals, strict=True)]  # fmt: skip
    queued = _queue_paths(rng, units)
    group_paths: dict[int, list[np.ndarray]] = {}
    presence_of: dict[int, tuple[float, float]] = {}
    for k, paths in zip(order, queued, strict=True):
        if k >= 40:  # a queueing group: present from its first knot to its last
            g = queue_groups[k - 40]
            group_paths[g] = [p.at(times) for p in paths]
            presence_of[g] = (min(p.knots[0][0] for p in paths), max(p.end[0] for p in paths))
        else:
            solo.append(paths[0])
            kinds.append("queuer")
    for g, (size, plan) in enumerate(zip(GROUP_SIZES, GROUP_PLANS, strict=True)):
        if plan == "queue":
            continue
        t0, speed = rng.uniform(-20, DURATION - 60), GROUP_SPEED[size]
        if plan == "cross":
            anchor = _crossing(rng, t0, speed)
        elif plan == "stream":
            anchor = _streaming(rng, t0, speed)
        else:
            anchor = _waiting(rng, t0, speed, _stand_spot(rng), rng.uniform(20, 60))
        group_paths[g] = list(_formation(rng, anchor.at(times), size))
        presence_of[g] = (anchor.knots[0][0], anchor.knots[-1][0])
    return solo, kinds, group_paths, presence_of


class _Recorder:
    """Turns paths into observed tracks (sway, noise, cut to the plaza) under running names."""

    def __init__(self, rng: np.random.Generator, times: np.ndarray) -> None:
        self.rng, self.times = rng, times
        self.tracks: list[pd.DataFrame] = []

    def add(self, xy: np.ndarray, first: float, last: float) -> str | None:
        """Record one person's path between ``first`` and ``last``; return its name, if seen."""
        times = self.times
        keep = (times >= first) & (times <= last)
        if keep.sum() < 2:
            return None
        sway = kit.bounded_jitter(self.rng, times.size, DT, 0.8, 0.1)
        xy = xy + sway + self.rng.normal(0, 0.03, xy.shape)
        on_plaza = (xy >= 0).all(axis=1) & (xy[:, 0] <= WIDTH) & (xy[:, 1] <= HEIGHT)
        inside = keep & on_plaza
        if inside.sum() < 2:
            return None
        name = f"w{len(self.tracks) + 1:04d}"
        self.tracks.append(pd.DataFrame({"person": name, "t": START + times[inside],
                                         "x": xy[inside, 0].round(3),
                                         "y": xy[inside, 1].round(3)}))  # fmt: skip
        return name


def generate(seed: int = SEED) -> tuple[pd.DataFrame, dict]:
    """Return the tracks (person, t, x, y) and the truth of the dense-crowd scene."""
    rng = np.random.default_rng(seed)
    times = np.arange(0.0, DURATION + DT / 2, DT)
    solo, kinds, group_paths, presence_of = _people(rng, times)
    seen = _Recorder(rng, times)
    strangers: dict[str, list[str]] = {k: [] for k in dict.fromkeys(kinds)}
    for p, kind in zip(solo, kinds, strict=True):
        if (name := seen.add(p.at(times), p.knots[0][0], p.end[0])) is not None:
            strangers[kind].append(name)
    truth_groups = []
    for g in range(len(GROUP_SIZES)):
        first, last = presence_of[g]
        ids = [n for xy in group_paths[g] if (n := seen.add(xy, first, last)) is not None]
        if len(ids) >= 2:
            truth_groups.append({"members": ids, "plan": GROUP_PLANS[g]})
    # names in a random order, so that nothing about a person shows in its name
    count = len(seen.tracks)
    shuffled = rng.permutation(count) + 1
    names = {f"w{k:04d}": f"w{v:04d}" for k, v in zip(range(1, count + 1), shuffled, strict=True)}
    frame = pd.concat(seen.tracks, ignore_index=True)
    frame["person"] = frame["person"].map(names)
    frame = frame.sort_values(["t", "person"], ignore_index=True)
    for group in truth_groups:
        group["members"] = sorted(names[m] for m in group["members"])
    strangers = {kind: sorted(names[m] for m in ids) for kind, ids in strangers.items()}
    truth = {
        "input": "people.csv.gz",
        "columns": {"id": "person", "time": "t", "x": "x", "y": "y"},
        "parameters": PARAMETERS,
        "seed": seed,
        "people": int(frame["person"].nunique()),
        "mean_people_per_frame": round(float(frame.groupby("t").size().mean()), 1),
        "groups": truth_groups,
        "strangers": strangers,
    }
    return frame, truth


def write(folder: Path = HERE) -> None:
    """Write ``people.csv.gz`` and ``truth.json`` into ``folder``."""
    frame, truth = generate()
    with gzip.GzipFile(folder / "people.csv.gz", "wb", mtime=0) as out:
        out.write(frame.to_csv(index=False, float_format="%.3f").encode())
    (folder / "truth.json").write_text(json.dumps(truth, indent=1) + "\n")


def main() -> None:
    """Write the files beside this generator."""
    write()
    truth = json.loads((HERE / "truth.json").read_text())
    print(f"{truth['people']} people, {truth['mean_people_per_frame']} per frame, "
          f"{len(truth['groups'])} groups")  # fmt: skip


if __name__ == "__main__":
    main()

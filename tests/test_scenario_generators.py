"""The synthetic scenarios agree with a brute-force recomputation from their own data files.

The checker here is written separately from the generators: it reads the committed files
the way a user would, interpolates each object onto the grid itself, and enumerates every
row instance with itertools, one combination of objects at a time.
"""

from __future__ import annotations

import gzip
import importlib.util
import itertools
import json
from pathlib import Path
from types import ModuleType

import numpy as np
import pandas as pd
import pytest

ROOT = Path(__file__).resolve().parents[1] / "synthetic_tracks"
SCENARIOS = ["small_sided_game", "fleet", "herd"]
EARTH_RADIUS = 6_371_008.8  # mean Earth radius in metres (IUGG value, recalled from memory)
NS = 1_000_000_000
_MODULES: dict[str, ModuleType] = {}


def generator(name: str) -> ModuleType:
    if name not in _MODULES:
        spec = importlib.util.spec_from_file_location(
            f"scenario_{name}", ROOT / name / "generate.py"
        )
        module = importlib.util.module_from_spec(spec)
        spec.loader.exec_module(module)
        _MODULES[name] = module
    return _MODULES[name]


def truth_of(name: str) -> dict:
    return json.loads((ROOT / name / "truth.json").read_text())


# --- independent reader and grid alignment ---------------------------------------------


def tracks_from_frame(raw: pd.DataFrame, truth: dict) -> pd.DataFrame:
    """Columns id, t (int ns), x, y (metres), role; listed bad rows dropped."""
    cols = truth["columns"]
    raw = raw.drop(index=[b["row"] for b in truth.get("bad_rows", [])])
    raw = raw.drop_duplicates()
    times = raw[cols["time"]]
    if pd.api.types.is_numeric_dtype(times):
        # Epoch seconds carry at most 0.1 s resolution here; rounding to the microsecond
        # removes binary floating-point noise before going to integers.
        t_ns = np.round(times.to_numpy() * 1e6).astype(np.int64) * 1000
    else:
        t_ns = pd.to_datetime(times, utc=True).dt.as_unit("ns").astype("int64").to_numpy()
    if "x" in cols:
        x, y = raw[cols["x"]].to_numpy(float), raw[cols["y"]].to_numpy(float)
    else:
        lon, lat = raw[cols["lon"]].to_numpy(float), raw[cols["lat"]].to_numpy(float)
        lat0 = np.radians(np.nanmean(lat))
        x = np.radians(lon - np.nanmean(lon)) * EARTH_RADIUS * np.cos(lat0)
        y = np.radians(lat - np.nanmean(lat)) * EARTH_RADIUS
    return pd.DataFrame(
        {
            "id": raw[cols["id"]].to_numpy(),
            "t": t_ns,
            "x": x,
            "y": y,
            "role": raw[cols["role"]].to_numpy(),
        }
    )


def read_tracks(name: str, truth: dict) -> pd.DataFrame:
    files = sorted((ROOT / name).glob(truth["input"]))
    assert files, truth["input"]
    # Row numbers in bad_rows refer to a single input file, so only then is the index kept.
    raw = pd.concat([pd.read_csv(f) for f in files], ignore_index=len(files) > 1)
    return tracks_from_frame(raw, truth)


class Grid:
    """Objects interpolated onto multiples of the step, never across a long gap."""

    def __init__(self, tracks: pd.DataFrame, step_s: float, max_gap_s: float) -> None:
        step, max_gap = int(round(step_s * NS)), int(round(max_gap_s * NS))
        first = -(-int(tracks["t"].min()) // step) * step
        last = int(tracks["t"].max()) // step * step
        self.times = np.arange(first, last + 1, step, dtype=np.int64)
        self.ids = sorted(tracks["id"].unique())
        n_obj, n_t = len(self.ids), len(self.times)
        self.xy = np.full((n_obj, n_t, 2), np.nan)
        self.present = np.zeros((n_obj, n_t), dtype=bool)
        self.role = np.full((n_obj, n_t), None, dtype=object)
        for i, oid in enumerate(self.ids):
            one = tracks[tracks["id"] == oid].sort_values("t").drop_duplicates("t")
            t = one["t"].to_numpy()
            p = one[["x", "y"]].to_numpy()
            after = np.searchsorted(t, self.times, side="right")
            before = after - 1
            has_before = before >= 0
            b = np.clip(before, 0, len(t) - 1)
            a = np.clip(after, 0, len(t) - 1)
            on_fix = has_before & (t[b] == self.times)
            between = has_before & (after < len(t)) & (t[a] - t[b] <= max_gap) & ~on_fix
            span = np.where(between, t[a] - t[b], 1)
            frac = np.where(between, (self.times - t[b]) / span, 0.0)
            ok = on_fix | between
            self.xy[i, ok] = (p[b] + frac[:, None] * (p[a] - p[b]))[ok]
            self.present[i] = ok
            self.role[i, ok] = one["role"].to_numpy()[b][ok]

    def index(self, iso: str) -> int:
        ns = pd.Timestamp(iso).as_unit("ns").value
        return int(np.argmin(np.abs(self.times - ns)))


def brute_prevalence(
    grid: Grid, roles: list[str], radius: float, min_part: float
) -> tuple[float, int]:
    """Time prevalence by enumerating every combination of objects, one per role."""
    holders = {r: [i for i in range(len(grid.ids)) if (grid.role[i] == r).any()] for r in roles}
    n_t = len(grid.times)
    in_instance = {r: np.zeros((len(grid.ids), n_t), dtype=bool) for r in roles}
    for combo in itertools.product(*(holders[r] for r in roles)):
        if len(set(combo)) < len(combo):
            continue
        ok = np.ones(n_t, dtype=bool)
        for obj, r in zip(combo, roles, strict=True):
            ok &= grid.role[obj] == r
        for a, b in itertools.combinations(combo, 2):
            ok &= np.hypot(*(grid.xy[a] - grid.xy[b]).T) <= radius
        for obj, r in zip(combo, roles, strict=True):
            in_instance[r][obj] |= ok
    pi = np.full(n_t, np.inf)
    everyone_there = np.ones(n_t, dtype=bool)
    for r in roles:
        holds = grid.role == r
        count = holds.sum(axis=0)
        everyone_there &= count > 0
        pr = np.where(count > 0, (in_instance[r] & holds).sum(axis=0) / np.maximum(count, 1), 0.0)
        pi = np.minimum(pi, pr)
    n_present = int(everyone_there.sum())
    prevalent = int((everyone_there & (pi >= min_part)).sum())
    return (prevalent / n_present if n_present else 0.0), n_present


def velocities(grid: Grid, i: int) -> np.ndarray:
    step_s = (grid.times[1] - grid.times[0]) / NS
    return np.gradient(grid.xy[i], step_s, axis=0)


# --- fixtures ----------------------------------------------------------------------------

_GRIDS: dict[str, Grid] = {}


def committed_grid(name: str) -> Grid:
    if name not in _GRIDS:
        truth = truth_of(name)
        p = truth["parameters"]
        _GRIDS[name] = Grid(read_tracks(name, truth), p["step"], p["max_gap"])
    return _GRIDS[name]


# --- tests ---------------------------------------------------------------------------------


@pytest.mark.parametrize("name", SCENARIOS)
def test_truth_has_every_field_and_small_files(name: str) -> None:
    truth = truth_of(name)
    for key in ("scenario", "description", "input", "columns", "parameters", "planted"):
        assert key in truth
    for key in ("independent", "episodes", "decoys"):
        assert isinstance(truth[key], list)
    assert truth["scenario"] == name
    assert set(truth["columns"]) <= {"id", "time", "x", "y", "lon", "lat", "role"}
    assert {"id", "time", "role"} <= set(truth["columns"])
    for key in ("radius", "min_participation", "min_prevalence", "min_prevalent_time", "step",
                "max_gap"):  # fmt: skip
        assert truth["parameters"][key] > 0
    for p in truth["planted"]:
        assert p["roles"] == sorted(p["roles"]) and len(set(p["roles"])) == len(p["roles"]) >= 2
        assert 0 < p["tolerance"] < 0.1
    files = list((ROOT / name).glob(truth["input"]))
    assert files
    assert sum(f.stat().st_size for f in (ROOT / name).rglob("*") if f.is_file()) < 2_000_000


@pytest.mark.parametrize("name", SCENARIOS)
def test_generator_is_deterministic(name: str) -> None:
    module = generator(name)
    first, truth_a = module.generate(seed=4242)
    second, truth_b = module.generate(seed=4242)
    pd.testing.assert_frame_equal(first, second)
    assert truth_a == truth_b
    other, _ = module.generate(seed=4243)
    assert not first.equals(other)


def _data_texts(folder: Path, pattern: str) -> dict[str, str]:
    out = {}
    for f in sorted(folder.glob(pattern)):
        raw = f.read_bytes()
        out[f.name] = (gzip.decompress(raw) if f.suffix == ".gz" else raw).decode()
    return out


@pytest.mark.parametrize("name", SCENARIOS)
def test_committed_files_are_what_the_generator_writes(name: str, tmp_path: Path) -> None:
    truth = truth_of(name)
    generator(name).write(tmp_path)
    assert json.loads((tmp_path / "truth.json").read_text()) == truth
    assert _data_texts(tmp_path, truth["input"]) == _data_texts(ROOT / name, truth["input"])


@pytest.mark.parametrize("name", SCENARIOS)
def test_planted_prevalence_matches_brute_force(name: str) -> None:
    truth, grid = truth_of(name), committed_grid(name)
    p = truth["parameters"]
    for planted in truth["planted"]:
        value, n_present = brute_prevalence(
            grid, planted["roles"], p["radius"], p["min_participation"]
        )
        assert abs(value - planted["time_prevalence"]) <= planted["tolerance"], planted["roles"]
        assert abs(n_present - planted["present_snapshots"]) <= 2, planted["roles"]
        assert planted["time_prevalence"] - planted["tolerance"] > p["min_prevalence"]


@pytest.mark.parametrize("name", SCENARIOS)
def test_independent_and_unlisted_role_pairs_are_not_prevalent(name: str) -> None:
    truth, grid = truth_of(name), committed_grid(name)
    p = truth["parameters"]
    for roles in truth["independent"]:
        value, _ = brute_prevalence(grid, roles, p["radius"], p["min_participation"])
        assert value < 0.2, roles
    planted = {tuple(x["roles"]) for x in truth["planted"]}
    all_roles = sorted({r for r in grid.role.ravel() if r is not None})
    for pair in itertools.combinations(all_roles, 2):
        if pair not in planted:
            value, _ = brute_prevalence(grid, list(pair), p["radius"], p["min_participation"])
            assert value < p["min_prevalence"], pair


@pytest.mark.parametrize("name", SCENARIOS)
def test_tolerance_holds_for_another_seed(name: str) -> None:
    frame, truth = generator(name).generate(seed=97)
    p = truth["parameters"]
    grid = Grid(tracks_from_frame(frame, truth), p["step"], p["max_gap"])
    for planted in truth["planted"]:
        value, _ = brute_prevalence(grid, planted["roles"], p["radius"], p["min_participation"])
        assert abs(value - planted["time_prevalence"]) <= planted["tolerance"], planted["roles"]


# Speeds below these are too slow for a heading to mean anything against position noise.
MIN_SPEED = {"small_sided_game": 0.5, "fleet": 2.0, "herd": 0.03}


@pytest.mark.parametrize("name", SCENARIOS)
def test_episodes_stay_close_with_similar_heading(name: str) -> None:
    truth, grid = truth_of(name), committed_grid(name)
    radius = truth["parameters"]["radius"]
    for ep in truth["episodes"]:
        a, b = grid.index(ep["start"]), grid.index(ep["end"]) + 1
        members = [grid.ids.index(m) for m in ep["members"]]
        for i, j in itertools.combinations(members, 2):
            together = grid.present[i, a:b] & grid.present[j, a:b]
            assert together.mean() > 0.7, ep
            d = np.hypot(*(grid.xy[i, a:b] - grid.xy[j, a:b]).T)[together]
            assert (d <= radius).mean() >= 0.97, ep
            vi, vj = velocities(grid, i)[a:b][together], velocities(grid, j)[a:b][together]
            si, sj = np.hypot(*vi.T), np.hypot(*vj.T)
            moving = (si > MIN_SPEED[name]) & (sj > MIN_SPEED[name])
            if moving.sum() >= 5:
                cos = (vi * vj).sum(axis=1)[moving] / (si * sj)[moving]
                assert np.median(cos) > 0.8, ep


@pytest.mark.parametrize("name", SCENARIOS)
def test_decoys_pass_close_with_opposite_headings(name: str) -> None:
    truth, grid = truth_of(name), committed_grid(name)
    radius = truth["parameters"]["radius"]
    for decoy in truth["decoys"]:
        k = grid.index(decoy["time"])
        i, j = (grid.ids.index(m) for m in decoy["members"])
        window = slice(max(k - 2, 0), k + 3)
        gap = np.hypot(*(grid.xy[i, window] - grid.xy[j, window]).T)
        assert np.nanmin(gap) <= radius, decoy
        vi, vj = velocities(grid, i)[k], velocities(grid, j)[k]
        assert (vi @ vj) / (np.hypot(*vi) * np.hypot(*vj)) < -0.8, decoy


def test_fleet_bad_rows_are_really_bad() -> None:
    truth = truth_of("fleet")
    raw = pd.read_csv(ROOT / "fleet" / truth["input"])
    reasons = []
    for bad in truth["bad_rows"]:
        row = raw.loc[bad["row"]]
        assert row["vehicle_id"] == bad["vehicle_id"] and row["timestamp"] == bad["timestamp"]
        if row[["longitude", "latitude"]].isna().any():
            reasons.append("missing")
        elif raw.loc[bad["row"] - 1].equals(row):
            reasons.append("duplicate")
        else:
            same = raw[(raw["vehicle_id"] == row["vehicle_id"]) & raw["latitude"].notna()]
            k = same.index.get_loc(bad["row"])
            near = same.iloc[[k - 1, k + 1]][["longitude", "latitude"]].to_numpy().mean(axis=0)
            dlon, dlat = np.radians(row[["longitude", "latitude"]].to_numpy(float) - near)
            jump = EARTH_RADIUS * np.hypot(dlon * np.cos(np.radians(near[1])), dlat)
            assert jump > 3000, bad
            reasons.append("spike")
    assert sorted(reasons) == ["duplicate", "missing", "spike"]
    assert (
        raw.duplicated().sum() == 1 and raw[["longitude", "latitude"]].isna().any(axis=1).sum() == 1
    )


def test_game_role_change_is_in_the_role_column() -> None:
    truth = truth_of("small_sided_game")
    grid = committed_grid("small_sided_game")
    for change in truth["role_changes"]:
        k = grid.index(change["time"])
        i = grid.ids.index(change["id"])
        assert set(grid.role[i, :k]) == {change["from"]}
        assert set(grid.role[i, k:]) == {change["to"]}


def _largest_turn(lead: np.ndarray, follow: np.ndarray, a: int, b: int, shift: int) -> float:
    """Largest angle (rad) between the follower's heading at a..b and the leader's shift before."""
    diff = follow[a:b] - lead[a - shift : b - shift]
    return float(np.abs(np.angle(np.exp(1j * diff))).max())


def test_game_leads_follower_heads_where_the_leader_headed_delay_earlier() -> None:
    # in every planted window: the two within the radius, both running, and the follower's
    # heading at t the leader's at t - delay (to a few degrees of rounding), while one
    # snapshot more or less already differs by far more
    truth = truth_of("small_sided_game")
    grid = committed_grid("small_sided_game")
    p = truth["parameters"]
    assert truth["leads"]
    for lead in truth["leads"]:
        i, j = grid.ids.index(lead["leader"]), grid.ids.index(lead["follower"])
        lag = int(round(lead["delay_s"] / p["step"]))
        assert lag >= 1
        vi, vj = velocities(grid, i), velocities(grid, j)
        heading_i, heading_j = np.arctan2(vi[:, 1], vi[:, 0]), np.arctan2(vj[:, 1], vj[:, 0])
        assert lead["when"]
        for when in lead["when"]:
            a, b = grid.index(when["start"]), grid.index(when["end"]) + 1
            assert b - a >= 50, when
            gap = np.hypot(*(grid.xy[i, a:b] - grid.xy[j, a:b]).T)
            assert gap.max() <= p["radius"], when
            assert min(np.hypot(*vi[a:b].T).min(), np.hypot(*vj[a:b].T).min()) > 2.0, when
            turns = {
                s: _largest_turn(heading_i, heading_j, a, b, s) for s in (lag - 1, lag, lag + 1)
            }
            assert turns[lag] < np.radians(3.0), (when, turns)
            assert min(turns[lag - 1], turns[lag + 1]) > 3 * np.radians(3.0), (when, turns)


def test_dense_crowd_generator_is_deterministic_and_committed(tmp_path: Path) -> None:
    module = generator("dense_crowd")
    first, truth_a = module.generate(seed=77)
    second, truth_b = module.generate(seed=77)
    pd.testing.assert_frame_equal(first, second)
    assert truth_a == truth_b
    module.write(tmp_path)
    truth = truth_of("dense_crowd")
    assert json.loads((tmp_path / "truth.json").read_text()) == truth
    assert _data_texts(tmp_path, "people.csv.gz") == _data_texts(ROOT / "dense_crowd",
                                                                 "people.csv.gz")  # fmt: skip


def test_dense_crowd_is_dense_and_its_groups_keep_together() -> None:
    truth = truth_of("dense_crowd")
    frame = pd.read_csv(ROOT / "dense_crowd" / truth["input"])
    strangers = {p for ids in truth["strangers"].values() for p in ids}
    members = [set(g["members"]) for g in truth["groups"]]
    assert len(members) == 24
    assert len(strangers) >= 300 and not strangers & set().union(*members)
    assert frame.groupby("t").size().mean() >= 40
    assert {"stream", "stander", "queuer", "crosser"} <= set(truth["strangers"])
    # planted members stay within 2 m of one another at every shared frame; a group
    # queueing stands in line (0.75 m places), and steps out of it side by side
    wide = frame.pivot(index="t", columns="person", values=["x", "y"])
    for group in truth["groups"]:
        size = len(group["members"])
        bound = 2.0 if group["plan"] != "queue" else 0.75 * (size - 1) + 1.2
        for a, b in itertools.combinations(group["members"], 2):
            d = np.hypot(wide["x"][a] - wide["x"][b], wide["y"][a] - wide["y"][b]).dropna()
            assert len(d) > 20 and d.max() < bound, (a, b, d.max())

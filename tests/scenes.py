"""Small scenes built directly as cleaned fixes, for stage tests."""

from __future__ import annotations

import functools
import itertools
from pathlib import Path

import networkx as nx
import numpy as np
import pandas as pd

from comove.io.scenarios import SCENARIOS_DIR, load_truth
from comove.pipeline import groups
from comove.tracks.alignment import AlignParams, Snapshots, align
from comove.tracks.cleaning import Fixes

NS = 1_000_000_000


def make_fixes(obj, t_s, x, y, role, n_roles: int | None = None) -> Fixes:
    """Return Fixes from per-fix arrays (times in seconds), sorted by object and time."""
    obj = np.asarray(obj, dtype=np.int32)
    t = np.round(np.asarray(t_s, dtype=np.float64) * NS).astype(np.int64)
    order = np.lexsort((t, obj))
    role = np.asarray(role, dtype=np.int32)
    n_obj = int(obj.max()) + 1
    n_roles = n_roles or int(role.max()) + 1
    return Fixes(
        obj=obj[order],
        time=t[order],
        x=np.asarray(x, dtype=np.float64)[order],
        y=np.asarray(y, dtype=np.float64)[order],
        role=role[order],
        objects=np.array([f"obj{i:02d}" for i in range(n_obj)]),
        roles=np.array([f"role{r}" for r in range(n_roles)]),
        metric_crs=None,
        input_crs=None,
    )


def grid_scene(
    x: np.ndarray, y: np.ndarray, role: np.ndarray, present: np.ndarray, n_roles: int
) -> Snapshots:
    """Return snapshots from (n_snap, n_obj) arrays: one fix per object per second."""
    n_snap, n_obj = x.shape
    snap, obj = np.nonzero(present)
    fixes = make_fixes(
        obj, snap.astype(float), x[snap, obj], y[snap, obj], role[snap, obj], n_roles=n_roles
    )
    return align(fixes, AlignParams(step=1.0, max_gap=0.5))


def brute_force_pi(snaps: Snapshots, radius: float, max_size: int) -> dict:
    """Return {(role tuple, snapshot): (PI, {role: PR})} by enumerating cliques with networkx.

    Reference: networkx.enumerate_all_cliques on each snapshot's neighbour graph, built
    from all pairwise distances; PR and PI computed from their textbook definitions.
    """
    out = {}
    for s in np.unique(snaps.snap):
        idx = np.flatnonzero(snaps.snap == s)
        graph = nx.Graph()
        graph.add_nodes_from(idx.tolist())
        for a, b in itertools.combinations(idx.tolist(), 2):
            if (snaps.x[a] - snaps.x[b]) ** 2 + (snaps.y[a] - snaps.y[b]) ** 2 <= radius**2:
                graph.add_edge(a, b)
        members: dict[tuple, set] = {}
        for clique in nx.enumerate_all_cliques(graph):
            if len(clique) > max_size:
                break
            roles = snaps.role[clique]
            if len(clique) < 2 or len(set(roles.tolist())) < len(clique):
                continue
            members.setdefault(tuple(sorted(roles.tolist())), set()).update(clique)
        for key, objs in members.items():
            pr = {}
            for r in key:
                n_r = int((snaps.role[idx] == r).sum())
                pr[r] = sum(1 for m in objs if snaps.role[m] == r) / n_r
            out[(key, int(s))] = (min(pr.values()), pr)
    return out


def brute_force_episodes(
    snaps: Snapshots, groups, min_size: int, min_snaps: int, tol: int
) -> set[tuple[frozenset, int, int, int]]:
    """Return the maximal episodes {(members, start, end, together)} by the definition.

    Every set of objects is tried on its own, snapshot by snapshot (exponential in
    the number of objects: for tiny scenes only). A set S is together at snapshot t
    when some group there holds at least ``min_size`` of its members and every other
    member has no data at t, has been missing for at most ``tol`` snapshots and was
    together with S at its last fix. Runs of together snapshots whose gaps are at most
    ``tol`` snapshots are episodes from their first together snapshot to the last
    snapshot, up to their last together one, at which every member has data, kept
    when both that span and the number of together snapshots in it reach
    ``min_snaps``; then those contained in another (members and span) are dropped.
    """
    n_obj, n_snap = len(snaps.objects), snaps.n_snapshots
    present = np.zeros((n_snap, n_obj), dtype=bool)
    present[snaps.snap, snaps.obj] = True
    at = [[] for _ in range(n_snap)]
    for g in range(groups.n_groups):
        members = snaps.obj[groups.entries[groups.offsets[g] : groups.offsets[g + 1]]]
        at[int(groups.snap[g])].append(frozenset(members.tolist()))

    @functools.cache
    def together(s: frozenset, t: int) -> bool:
        for group in at[t]:
            if len(s & group) < min_size:
                continue
            excused = True
            for m in s - group:
                before = np.flatnonzero(present[:t, m])
                if (present[t, m] or before.size == 0 or t - before[-1] > tol
                        or not together(s, int(before[-1]))):  # fmt: skip
                    excused = False
                    break
            if excused:
                return True
        return False

    records = []
    for size in range(min_size, n_obj + 1):
        for combo in itertools.combinations(range(n_obj), size):
            s = frozenset(combo)
            runs: list[list[int]] = []
            for t in range(n_snap):
                if together(s, t):
                    if runs and t - runs[-1][1] - 1 <= tol:
                        runs[-1][1] = t
                    else:
                        runs.append([t, t])
            for start, seen in runs:
                full = [t for t in range(start, seen + 1) if present[t, list(s)].all()]
                if not full:
                    continue
                end = full[-1]
                count = sum(together(s, t) for t in range(start, end + 1))
                if end - start + 1 >= min_snaps and count >= min_snaps:
                    records.append((s, start, end, count))
    return {
        r for r in records
        if not any(o != r and r[0] <= o[0] and o[1] <= r[1] and r[2] <= o[2] for o in records)
    }  # fmt: skip


def random_scene(
    seed: int, n_snap=30, n_obj=10, n_roles=4, side=12.0, p_present=0.8, integer=False
):
    rng = np.random.default_rng(seed)
    x = rng.uniform(0, side, (n_snap, n_obj))
    y = rng.uniform(0, side, (n_snap, n_obj))
    if integer:
        x, y = np.round(x), np.round(y)
    role = np.broadcast_to(rng.integers(0, n_roles, n_obj), (n_snap, n_obj)).copy()
    present = rng.random((n_snap, n_obj)) < p_present
    present[0] = True  # every scene has at least one full snapshot
    return x, y, role, present, n_roles


def random_walkers(rng, n_obj, n_snap):
    # integer lattice walks: distances are exact under integer shifts and relabelling
    steps = rng.integers(-1, 2, size=(n_snap, n_obj, 2))
    start = rng.integers(0, 4, size=(1, n_obj, 2))
    pos = start + np.cumsum(steps, axis=0)
    present = rng.random((n_snap, n_obj)) < 0.9
    return pos[..., 0].astype(float), pos[..., 1].astype(float), present


#: Per scenario: the preset of its kind, and how far (seconds) a found episode's start and
#: end may lie from the planted schedule. The game's marking ramps in and out over ~2 s; a
#: fleet escort leaving its convoy takes up to ~2 minutes to open a gap of the 150 m radius
#: (it drops back or overtakes at a few m/s relative speed); the herd is sampled hourly.
SCENARIO_RUNS = {
    "small_sided_game": ("team-sport", 3.0),
    "fleet": ("vehicles", 150.0),
    "herd": ("collars", 3 * 3600.0),
}


def run_scenario(name, **extra):
    truth = load_truth(name)
    preset, _ = SCENARIO_RUNS[name]
    params = truth["parameters"]
    options = dict(
        truth["columns"],
        radius=params["radius"],
        step=params["step"],
        max_gap=params["max_gap"],
        **extra,
    )
    return truth, groups(str(SCENARIOS_DIR / name / truth["input"]), preset=preset, **options)


def gap_midpoints(snaps: Snapshots, most: int = 40) -> list[int]:
    """Return snapshots in the middle of objects' gaps in data (no fix there), at most ``most``."""
    order = snaps.object_order()
    snap, obj = snaps.snap[order], snaps.obj[order]
    gap = (obj[1:] == obj[:-1]) & (snap[1:] - snap[:-1] > 1)
    middle = (snap[:-1][gap] + snap[1:][gap]) // 2
    return sorted({int(m) for m in middle})[:most]


def one_record(path) -> dict:
    """Return the one command's record in a results folder's ``run.json`` or ``quality.json``."""
    import json

    from comove.io.results import by_command

    records = by_command(json.loads(Path(path).read_text()))
    assert len(records) == 1, f"{path} holds the records of {sorted(records)}"
    return next(iter(records.values()))


#: Snapshot step of :func:`planted_leads`, seconds.
LEAD_STEP = 0.1


def wandering_path(rng: np.random.Generator, n: int, speed: float = 1.5) -> np.ndarray:
    """Return (n, 2) positions of a walker turning smoothly at random, LEAD_STEP s apart."""
    heading = np.cumsum(rng.normal(0.0, 0.08, n))
    velocity = speed * np.column_stack([np.cos(heading), np.sin(heading)])
    return np.cumsum(velocity * LEAD_STEP, axis=0)


def planted_leads(seed: int = 1, n: int = 3000) -> pd.DataFrame:
    """A guide, two followers walking the guide's path 0.7 s and 1.2 s later, and a twin.

    The followers walk where the guide walked (beside the path), so their
    headings are the guide's, ``delay`` later; the twin walks beside the guide
    at the same time, with no lead either way.
    """
    rng = np.random.default_rng(seed)
    margin = 50
    path = wandering_path(rng, n + margin)
    t = np.arange(n) * LEAD_STEP
    walkers = {
        "guide": (path[margin:], "leader"),
        "late7": (path[margin - 7 : margin - 7 + n] + [0.6, 0.0], "follower"),
        "late12": (path[margin - 12 : margin - 12 + n] + [0.0, 0.6], "follower"),
        "twin": (path[margin:] + [-0.5, 0.3], "follower"),
    }
    return pd.concat(
        pd.DataFrame({"id": name, "time": t, "x": xy[:, 0], "y": xy[:, 1], "role": role})
        for name, (xy, role) in walkers.items()
    )


def shared_course_pairs(seed: int = 1, n_pairs: int = 60, n: int = 1500) -> pd.DataFrame:
    """Pairs walking one course side by side, each with its own smooth wobble: no lead.

    Both members of a pair are the pair's wandering path plus an independent
    smooth wobble (about 0.3 m), so neither heads where the other headed
    before any more than the reverse; pairs are 1 km apart.
    """
    from scipy.ndimage import gaussian_filter1d

    rng = np.random.default_rng(seed)
    t = np.arange(n) * LEAD_STEP
    frames = []
    for k in range(n_pairs):
        path = wandering_path(rng, n) + [0.0, 1000.0 * k]
        for m in range(2):
            wobble = gaussian_filter1d(rng.normal(0.0, 1.0, (n, 2)), 15, axis=0)
            xy = path + wobble * (0.3 / wobble.std()) + [0.0, 0.5 * m]
            frames.append(pd.DataFrame({"id": f"p{k:02d}{'ab'[m]}", "time": t, "x": xy[:, 0],
                                        "y": xy[:, 1], "role": "walker"}))  # fmt: skip
    return pd.concat(frames)

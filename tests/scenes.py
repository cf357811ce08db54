"""Small scenes built directly as cleaned fixes, for stage tests."""

from __future__ import annotations

import itertools

import networkx as nx
import numpy as np

from comove.alignment import AlignParams, Snapshots, align
from comove.cleaning import Fixes

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

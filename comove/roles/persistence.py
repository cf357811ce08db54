"""Persistence over time: keep the role sets that stay prevalent.

For a role set C, present(C) is the set of snapshots at which every role of C
has at least one object present, and

    time_prevalence(C) = (snapshots at which C is prevalent) / |present(C)|.

C is kept when its time prevalence reaches ``min_prevalence`` and its prevalent
time (prevalent snapshots x step) reaches ``min_prevalent_time``. The longest run is
the longest stretch of consecutive grid snapshots at which C is prevalent.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import ClassVar

import numpy as np
import pandas as pd

from comove.errors import bad_setting
from comove.roles.chain import RoleTally
from comove.roles.colocation import RATIO_EPS, LevelResult
from comove.tracks.alignment import longest_runs

ROLE_SEP = ";"


@dataclass(frozen=True)
class PersistenceParams:
    """Settings of the persistence filter.

    Parameters
    ----------
    min_prevalence : float, default 0.5
        Share of present(C) snapshots at which C must be prevalent, in (0, 1].
    min_prevalent_time : float, default 0.0
        Least total prevalent time in seconds.
    """

    min_prevalence: float = field(
        default=0.5,
        metadata={
            "help": "least share of the snapshots where all its roles are present at "
            "which a role set is prevalent, in (0, 1]"
        },
    )
    min_prevalent_time: float = field(
        default=0.0,
        metadata={"help": "least total time in seconds at which a role set is prevalent "
                  "(prevalent_s in patterns.csv)"},
    )  # fmt: skip

    #: Former names of settings, still read for one release.
    FORMER_NAMES: ClassVar[dict[str, str]] = {"min_duration": "min_prevalent_time"}

    def __post_init__(self) -> None:
        if not (0 < self.min_prevalence <= 1):
            raise bad_setting("min_prevalence", "must be in (0, 1]")
        if not (np.isfinite(self.min_prevalent_time) and self.min_prevalent_time >= 0):
            raise bad_setting("min_prevalent_time", "must be zero or a positive number of seconds")

    def keeps(self, prevalent: np.ndarray, present: np.ndarray, step_s: float) -> np.ndarray:
        """Return which role sets meet both thresholds, from their snapshot counts."""
        with np.errstate(invalid="ignore", divide="ignore"):
            prevalence = np.where(present > 0, prevalent / np.maximum(present, 1), 0.0)
        return (prevalence >= self.min_prevalence - RATIO_EPS) & (
            prevalent >= self.min_prevalent_snapshots(step_s)
        )

    def min_prevalent_snapshots(self, step_s: float) -> int:
        """Return the fewest prevalent snapshots a kept set can have (at least 1).

        Any set below this count fails ``min_prevalent_time``, and so do all its
        supersets (prevalent snapshots are anti-monotone), so the miner may stop
        extending it.
        """
        return max(1, math.ceil(self.min_prevalent_time / step_s - RATIO_EPS))


@dataclass
class PatternTables:
    """The kept role sets as tables.

    Attributes
    ----------
    patterns : DataFrame
        One row per kept role set (see :func:`durable_patterns`).
    participation : DataFrame
        One row per (kept role set, role): mean participation ratios.
    series : DataFrame
        Participation index of every kept set at every snapshot of present(C).
    """

    patterns: pd.DataFrame
    participation: pd.DataFrame
    series: pd.DataFrame


def role_label(roles: np.ndarray, names: np.ndarray) -> str:
    """Return the role names of ``roles`` sorted and joined by ';'."""
    return ROLE_SEP.join(sorted(str(names[r]) for r in roles))


def durable_patterns(
    tally: RoleTally,
    params: PersistenceParams,
    min_participation: float,
) -> PatternTables:
    """Return the role sets that persist, with their per-snapshot series.

    Parameters
    ----------
    tally : RoleTally
        Output of :func:`comove.roles.chain.role_chain` (a whole run, or chunks
        combined).
    params : PersistenceParams
        Thresholds.
    min_participation : float
        The participation-index threshold used by the miner.

    Returns
    -------
    PatternTables
        ``patterns`` has columns ``roles`` (role names sorted, joined by ';'),
        ``size``, ``present_snapshots``, ``prevalent_snapshots``,
        ``time_prevalence``, ``prevalent_s``, ``longest_run_s``,
        ``longest_run_start`` (UTC), ``mean_participation_index`` (over
        present(C), absent instances counting as 0) and ``participation_ratios``
        (``role=mean PR`` joined by ';'); sorted by time prevalence, descending.

    References
    ----------
    .. [1] Y. Huang, S. Shekhar, H. Xiong, "Discovering colocation patterns from
       spatial data sets: a general approach", IEEE TKDE 16(12), 2004. (from memory, not checked)
    .. [2] M. Celik, S. Shekhar, J. P. Rogers, J. A. Shine, "Mixed-drove
       spatiotemporal co-occurrence pattern mining", IEEE TKDE 20(10), 2008.
       (from memory, not checked)
    """
    pattern_rows: list[dict] = []
    part_rows: list[dict] = []
    series_parts: list[pd.DataFrame] = []
    for level in tally.levels:
        kept = params.keeps(level.prevalent, level.present, tally.step_s)
        if kept.any():
            _kept_rows(level, kept, tally, min_participation, pattern_rows, part_rows,
                       series_parts)  # fmt: skip
    patterns = pd.DataFrame(pattern_rows, columns=PATTERN_COLUMNS)
    if len(patterns):
        patterns = patterns.sort_values(
            ["time_prevalence", "size", "roles"], ascending=[False, True, True], kind="stable"
        ).reset_index(drop=True)
        patterns["size"] = patterns["size"].astype("int64")
    participation = pd.DataFrame(part_rows, columns=PARTICIPATION_COLUMNS)
    series = (
        pd.concat(series_parts, ignore_index=True)
        if series_parts
        else pd.DataFrame({c: pd.Series(dtype=t) for c, t in SERIES_DTYPES.items()})
    )
    series["roles"] = series["roles"].astype("category")
    return PatternTables(patterns, participation, series)


def _kept_rows(
    level: LevelResult,
    kept: np.ndarray,
    tally: RoleTally,
    min_participation: float,
    pattern_rows: list[dict],
    part_rows: list[dict],
    series_parts: list[pd.DataFrame],
) -> None:
    """Append the pattern, participation and series rows of the kept sets of one level."""
    step_s, names = tally.step_s, tally.roles
    n_sets, k = level.roles.shape
    present = level.present
    with np.errstate(invalid="ignore", divide="ignore"):
        prevalence = np.where(present > 0, level.prevalent / np.maximum(present, 1), 0.0)
    is_prev = level.pi >= min_participation - RATIO_EPS
    longest, run_start = longest_runs(level.set_id[is_prev], level.snap[is_prev], n_sets)
    pi_sum = np.bincount(level.set_id, weights=level.pi, minlength=n_sets)
    pr_sum = np.column_stack(
        [np.bincount(level.set_id, weights=level.pr[:, c], minlength=n_sets) for c in range(k)]
    )
    pr_prev_sum = np.column_stack([
        np.bincount(level.set_id[is_prev], weights=level.pr[is_prev, c], minlength=n_sets)
        for c in range(k)
    ])  # fmt: skip
    for s in np.flatnonzero(kept):  # per kept role set
        roles = level.roles[s]
        label = role_label(roles, names)
        mean_pr = pr_sum[s] / present[s]
        mean_pr_prev = pr_prev_sum[s] / level.prevalent[s]
        order = np.argsort([str(names[r]) for r in roles])
        pattern_rows.append({
            "roles": label,
            "size": k,
            "present_snapshots": int(present[s]),
            "prevalent_snapshots": int(level.prevalent[s]),
            "time_prevalence": float(prevalence[s]),
            "prevalent_s": float(level.prevalent[s] * step_s),
            "longest_run_s": float(longest[s] * step_s),
            "longest_run_start": pd.Timestamp(int(tally.times(run_start[s : s + 1])[0]), tz="UTC"),
            "mean_participation_index": float(pi_sum[s] / present[s]),
            "participation_ratios": ROLE_SEP.join(
                f"{names[roles[c]]}={mean_pr[c]:.4f}" for c in order
            ),
        })  # fmt: skip
        part_rows += [
            {
                "roles": label,
                "role": str(names[roles[c]]),
                "mean_participation_ratio": float(mean_pr[c]),
                "mean_participation_ratio_when_prevalent": float(mean_pr_prev[c]),
            }
            for c in order
        ]
        series_parts.append(_series(level, s, label, tally, min_participation))


PATTERN_COLUMNS = [
    "roles", "size", "present_snapshots", "prevalent_snapshots", "time_prevalence",
    "prevalent_s", "longest_run_s", "longest_run_start",
    "mean_participation_index", "participation_ratios",
]  # fmt: skip
PARTICIPATION_COLUMNS = [
    "roles",
    "role",
    "mean_participation_ratio",
    "mean_participation_ratio_when_prevalent",
]
SERIES_DTYPES = {
    "roles": "object", "time": "datetime64[ns, UTC]", "participation_index": "float32",
    "prevalent": "bool",
}  # fmt: skip


def _series(
    level: LevelResult, s: int, label: str, tally: RoleTally, min_participation: float
) -> pd.DataFrame:
    """Return PI of set ``s`` at every snapshot of present(C), zeros included."""
    snap = tally.presence.snapshots(level.roles[s])
    lo, hi = np.searchsorted(level.set_id, [s, s + 1])
    pi = np.zeros(snap.size, dtype=np.float64)
    pi[np.searchsorted(snap, level.snap[lo:hi])] = level.pi[lo:hi]
    return pd.DataFrame(
        {
            "roles": np.full(snap.size, label, dtype=object),
            "time": pd.to_datetime(tally.times(snap), utc=True),
            "participation_index": pi.astype(np.float32),
            "prevalent": pi >= min_participation - RATIO_EPS,
        }
    )

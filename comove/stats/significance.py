"""Is it real? Monte Carlo tests against movement-preserving null models.

A high time prevalence can come from crowding alone: every player bunches near
the ball, every vessel uses the one channel, every animal goes to the one
waterhole. The null models here keep how each object moves and break only what
the question is about:

- ``"time-shift"`` (default): each object's aligned track is shifted in time
  by its own random offset, circularly. Each track keeps its own
  autocorrelation, speed, space use and gaps; only the timing *between*
  objects is broken (the toroidal-shift idea of Lotwick & Silverman 1982,
  applied along time). It asks: are these objects together more than their
  separate movements would bring them together by chance?
- ``"role-shuffle"``: role labels are permuted among objects (optionally only
  within strata, such as a team), keeping every track and every meeting
  intact. It asks: is the association specific to these *roles*, rather than
  to who happens to be near whom?

Who leads a pair (:func:`lead_tests`) is tested by neither: a time shift
breaks the pair apart, and a role shuffle leaves it as it is. Its null swaps
the two objects in random blocks of the pair's own time together, keeping
every heading and every meeting: under "neither leads" the pair is the same
either way round.

For each statistic (a role set's time prevalence, a pair's time together, a
role set's number of episodes) the Monte Carlo p-value is
``(1 + #{null >= observed}) / (1 + N)`` for N null replicates (Davison &
Hinkley 1997), and Benjamini–Hochberg q-values control the false discovery
rate across every statistic tested (Benjamini & Hochberg 1995).

Replicates run in worker processes. Each replicate ``k`` draws from its own
``numpy.random.SeedSequence(seed).spawn`` child, so results do not depend on
the number of workers or their scheduling.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field, replace
from typing import Any, ClassVar

import numpy as np
import pandas as pd

from comove.errors import bad_setting
from comove.roles.colocation import encode_role_sets
from comove.stats.engine import RunParams
from comove.tracks.alignment import Snapshots

NULL_MODELS = ("time-shift", "role-shuffle")

#: Columns every family of tests adds to its table.
TEST_COLUMNS = ["statistic", "compared_step_s", "p_value", "q_value", "null_mean", "null_sd",
                "difference", "standardised_effect", "ratio", "significant"]  # fmt: skip
SHIFT_SPANS = ("period", "object")
STATISTICS = ("continuous", "count")


@dataclass(frozen=True)
class SignificanceParams:
    """Settings of the Monte Carlo tests.

    Parameters
    ----------
    replicates : int, default 199
        Null replicates N; 0 switches the tests off. The smallest attainable
        p-value is 1 / (N + 1).
    null : {"time-shift", "role-shuffle"}, default "time-shift"
        The null model.
    shift_within : {"period", "object"}, default "period"
        Time shift: wrap each track around the whole analysed period, or
        around the object's own span from first to last presence.
    shuffle_strata : str or None, default None
        Role shuffle: permute roles only among objects whose role names share
        the text before this separator (``"_"`` keeps ``home_*`` and ``away_*``
        apart).
    alpha : float, default 0.05
        False discovery rate for the ``significant`` column.
    null_step : float, default 1.0
        Seconds between the snapshots the tests compare: on a finer grid the
        observed statistic and every replicate are computed on every k-th
        snapshot (k = null_step / step, rounded down), which costs k times less
        and keeps the test exact for that statistic; 0 compares every snapshot.
        Positions a fraction of a second apart carry almost the same
        information, so little power is lost.
    statistic : {"continuous", "count"}, default "continuous"
        What is tested of a role set: ``"continuous"``, its mean participation
        index over the snapshots where all its roles are present (``mine``) and
        the time together in its episodes (``groups``); ``"count"``, its time
        prevalence and its number of episodes. A share of snapshots above a
        threshold saturates near 1 (or 0) when the threshold is low (or high)
        or crowding is high, and then has little power; the mean does not.
    """

    replicates: int = field(
        default=199, metadata={"help": "null replicates for Monte Carlo p-values; 0: no test"}
    )
    null: str = field(
        default="time-shift",
        metadata={"help": "null model: tracks shifted in time, or role labels shuffled",
                  "choices": NULL_MODELS},
    )  # fmt: skip
    shift_within: str = field(
        default="period",
        metadata={"help": "time-shift wraps around the whole period or each object's own span",
                  "choices": SHIFT_SPANS},
    )  # fmt: skip
    shuffle_strata: str | None = field(
        default=None,
        metadata={"help": "role-shuffle only among roles sharing the text before this "
                  "separator"},
    )  # fmt: skip
    alpha: float = field(
        default=0.05, metadata={"help": "false discovery rate for the significant column"}
    )
    null_step: float = field(
        default=1.0,
        metadata={"help": "seconds between the snapshots the tests compare; a finer grid is "
                  "thinned to it (0: every snapshot)"},
    )  # fmt: skip
    statistic: str = field(
        default="continuous",
        metadata={"help": "what is tested of a role set: continuous (mean participation index; "
                  "time together in episodes) or count (time prevalence; number of episodes)",
                  "choices": STATISTICS},
    )  # fmt: skip

    #: Former names of settings, still read for one release.
    FORMER_NAMES: ClassVar[dict[str, str]] = {"permutations": "replicates"}

    def __post_init__(self) -> None:
        if int(self.replicates) != self.replicates or self.replicates < 0:
            raise bad_setting("replicates", "must be a whole number, 0 or more")
        if self.null not in NULL_MODELS:
            raise bad_setting("null", f"must be one of {', '.join(NULL_MODELS)}, not {self.null!r}")
        if self.shift_within not in SHIFT_SPANS:
            raise bad_setting("shift_within", f"must be one of {', '.join(SHIFT_SPANS)}")
        if self.shuffle_strata == "":
            raise bad_setting("shuffle_strata", "must be a non-empty separator such as _")
        if not (0 < self.alpha < 1):
            raise bad_setting("alpha", "must be between 0 and 1")
        if not (np.isfinite(self.null_step) and self.null_step >= 0):
            raise bad_setting("null_step", "must be zero or a positive number of seconds")
        if self.statistic not in STATISTICS:
            raise bad_setting("statistic", f"must be one of {', '.join(STATISTICS)}, "
                              f"not {self.statistic!r}")  # fmt: skip

    def thinning(self, step_s: float) -> int:
        """Return k: the tests compare every k-th snapshot of a grid of ``step_s`` seconds."""
        if self.null_step <= 0 or step_s <= 0:
            return 1
        return max(1, int(np.floor(self.null_step / step_s + 1e-9)))


# --------------------------------------------------------------------------- null models


class NullModel:
    """Draws null replicates of aligned snapshots.

    Per-object facts that do not change between replicates (each object's
    entries in time order, its presence span, its main role) are computed
    once here and reused by every replicate.

    Parameters
    ----------
    snaps : Snapshots
        The observed aligned snapshots.
    params : SignificanceParams
        Which null model and its options.
    """

    def __init__(self, snaps: Snapshots, params: SignificanceParams) -> None:
        self.snaps = snaps
        self.params = params
        n_obj = len(snaps.objects)
        self.by_obj = snaps.object_order()
        self.bounds = snaps.object_bounds()
        snap_sorted = snaps.snap[self.by_obj]
        present = np.diff(self.bounds) > 0
        self.present = present
        self.first = np.where(
            present, snap_sorted[np.minimum(self.bounds[:-1], snaps.n_entries - 1)], 0
        )
        self.last = np.where(present, snap_sorted[np.maximum(self.bounds[1:] - 1, 0)], 0)
        # each object's most frequent role, for the role shuffle
        self.main_role = snaps.main_roles()
        if params.shuffle_strata:
            sep = params.shuffle_strata
            stratum_names = np.array([str(r).split(sep, 1)[0] for r in snaps.roles])
            _, self.stratum = np.unique(stratum_names[self.main_role], return_inverse=True)
        else:
            self.stratum = np.zeros(n_obj, dtype=np.int64)

    def draw(self, rng: np.random.Generator) -> tuple[Snapshots, np.ndarray | None]:
        """Return one null replicate and how its entries map to the observed ones.

        Returns
        -------
        snaps : Snapshots
            The replicate.
        order : ndarray or None
            Entry ``e`` of the replicate is observed entry ``order[e]`` (apply
            it to per-entry arrays such as velocities); ``None`` when entries
            keep their places (role shuffle).
        """
        if self.params.null == "time-shift":
            return self._time_shift(rng)
        return self._role_shuffle(rng), None

    def _time_shift(self, rng: np.random.Generator) -> tuple[Snapshots, np.ndarray]:
        snaps = self.snaps
        n_obj = len(snaps.objects)
        if self.params.shift_within == "period":
            span = np.full(n_obj, snaps.n_snapshots)
            base = np.zeros(n_obj, dtype=np.int64)
        else:
            span = np.where(self.present, self.last - self.first + 1, 1)
            base = self.first
        if self.params.shift_within == "period":
            offset = _spread_offsets(rng, n_obj, snaps.n_snapshots)
        else:
            offset = (rng.random(n_obj) * span).astype(np.int64)
        obj = snaps.obj
        new_snap = base[obj] + (snaps.snap - base[obj] + offset[obj]) % span[obj]
        # in (object, snapshot) order each track is a rotation, two increasing runs,
        # so the stable sort by new snapshot is a cheap merge and keeps objects in order
        order = self.by_obj[np.argsort(new_snap[self.by_obj], kind="stable")]
        shifted = replace(
            snaps,
            snap=new_snap[order],
            obj=snaps.obj[order],
            role=snaps.role[order],
            x=snaps.x[order],
            y=snaps.y[order],
        )
        return shifted, order

    def _role_shuffle(self, rng: np.random.Generator) -> Snapshots:
        new_role = self.main_role.copy()
        for s in np.unique(self.stratum[self.present]):  # per stratum
            members = np.flatnonzero(self.present & (self.stratum == s))
            new_role[members] = self.main_role[members][rng.permutation(members.size)]
        return replace(self.snaps, role=new_role[self.snaps.obj].astype(np.int32))


def _spread_offsets(rng: np.random.Generator, n_obj: int, period: int) -> np.ndarray:
    """Return time offsets such that no two objects keep nearly their observed lag.

    With independent uniform offsets, two tracks often land within a few
    snapshots of their observed lag, and such a replicate reproduces the
    observed association (a small relative shift is almost no shift). So the
    period is cut into one slot per object, slots are dealt to objects at
    random, and each offset is jittered within the middle half of its slot:
    any two objects' relative shift is then at least half a slot,
    period / (2 n). Under independence every fixed set of shifts gives a valid
    replicate, so the restriction keeps the test exact; it is the usual
    minimum-displacement rule of toroidal shift tests (common practice).
    """
    slot = period / max(n_obj, 1)
    dealt = rng.permutation(n_obj)
    jitter = rng.uniform(0.25, 0.75, n_obj)
    return ((dealt + jitter) * slot).astype(np.int64) % max(period, 1)


# --------------------------------------------------------------------------- replicates


Statistic = Callable[["NullModel", np.random.Generator], np.ndarray]


def _replicate(shared: tuple[NullModel, Statistic], seed: np.random.SeedSequence) -> np.ndarray:
    """Return the statistic on the null replicate drawn from ``seed``."""
    model, statistic = shared
    return statistic(model, np.random.default_rng(seed))


def null_distribution(
    model: NullModel,
    statistic: Statistic,
    params: SignificanceParams,
    run: RunParams,
    progress: bool = False,
    label: str = "null replicates",
) -> np.ndarray:
    """Return the statistic on ``params.replicates`` null replicates.

    Parameters
    ----------
    model : NullModel
        Draws replicates of the observed snapshots.
    statistic : callable
        ``statistic(model, rng)`` returns a 1-d array (one value per tested
        item); it must be a picklable top-level function or partial.
    params : SignificanceParams
        ``replicates``.
    run : RunParams
        The seed (must be resolved) and the engine that runs the replicates.
    progress : bool, default False
        Show a progress bar with the time left.
    label : str
        Progress bar text.

    Returns
    -------
    ndarray, shape (replicates, n_items)
        Row k is replicate k, whatever the engine and its number of workers:
        replicate k draws from ``SeedSequence(seed).spawn(N)[k]``.
    """
    n = int(params.replicates)
    if run.seed is None:
        raise ValueError("resolve the seed first (RunParams.resolved)")
    seeds = np.random.SeedSequence(run.seed).spawn(n)
    rows = run.make_engine().map(
        _replicate, seeds, shared=(model, statistic), work_size=model.snaps.n_entries * n,
        progress=progress, label=label,
    )  # fmt: skip
    return np.vstack(rows) if rows else np.empty((0, 0))


# --------------------------------------------------------------------------- p and q values


def monte_carlo_p(observed: np.ndarray, null: np.ndarray) -> np.ndarray:
    """Return one-sided Monte Carlo p-values, (1 + #{null >= observed}) / (1 + N).

    Parameters
    ----------
    observed : ndarray, shape (n_items,)
        The statistic on the observed data.
    null : ndarray, shape (N, n_items)
        The statistic on N null replicates.

    References
    ----------
    .. [1] A. C. A. Hope, "A simplified Monte Carlo significance test
       procedure", JRSS B 30(3), 1968. (from memory, not checked)
    .. [2] A. C. Davison, D. V. Hinkley, "Bootstrap Methods and their
       Application", Cambridge University Press, 1997, section 4.2. (from memory, not checked)
    """
    n = null.shape[0]
    exceed = (null >= observed[None, :] - 1e-12).sum(axis=0)
    return (1.0 + exceed) / (1.0 + n)


def summary_table(
    observed: np.ndarray, null: np.ndarray, alpha: float, statistic: str, step_s: float = np.nan
) -> pd.DataFrame:
    """Return the test columns (``TEST_COLUMNS``) per item.

    ``statistic`` names what was tested and ``step_s`` the seconds between the
    snapshots it was computed on (``compared_step_s``).

    ``q_value`` is the Benjamini–Hochberg adjusted p-value over all items, from
    :func:`scipy.stats.false_discovery_control`. Three effect sizes, each named
    for what it is: ``difference`` = observed − null mean (in the statistic's
    own unit), ``standardised_effect`` = difference / null sd (how many null
    standard deviations above the null mean; infinite when the null never
    varies and the observed differs, NaN when both agree) and ``ratio`` =
    observed / null mean.

    References
    ----------
    .. [1] Y. Benjamini, Y. Hochberg, "Controlling the false discovery rate: a
       practical and powerful approach to multiple testing", Journal of the Royal
       Statistical Society B 57(1), 289-300, 1995. doi:10.1111/j.2517-6161.1995.tb02031.x
    """
    from scipy.stats import false_discovery_control  # loads all of scipy.stats: ~0.4 s

    p = monte_carlo_p(observed, null)
    q = false_discovery_control(p, method="bh") if p.size else p.copy()
    mean = null.mean(axis=0) if null.size else np.full(observed.size, np.nan)
    sd = null.std(axis=0, ddof=1) if null.shape[0] > 1 else np.full(observed.size, np.nan)
    difference = observed - mean
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.where(mean > 0, observed / mean, np.where(observed > 0, np.inf, np.nan))
        standardised = np.where(
            sd > 0, difference / sd,
            np.where(np.abs(difference) > 1e-12, np.sign(difference) * np.inf, np.nan),
        )  # fmt: skip
    return pd.DataFrame({
        "statistic": pd.Series([statistic] * p.size, dtype=object),
        "compared_step_s": np.full(p.size, float(step_s)),
        "p_value": p, "q_value": q, "null_mean": mean, "null_sd": sd, "difference": difference,
        "standardised_effect": standardised, "ratio": ratio,
        # q-values of Monte Carlo p-values are exact fractions: one that equals alpha
        # is significant, whatever the last bit of its floating-point rounding
        "significant": q <= alpha * (1 + 1e-9),
    })  # fmt: skip


def _compared_tests(
    snaps: Snapshots,
    statistic: Statistic,
    values: np.ndarray,
    thinned_values: Callable[[Snapshots], np.ndarray],
    name: str,
    params: SignificanceParams,
    run: RunParams,
    progress: bool,
) -> pd.DataFrame:
    """Return :func:`summary_table` of ``statistic`` against its null replicates.

    With ``params.null_step`` above the step, observed and null values are
    compared on every k-th snapshot: the observed statistic is then
    ``thinned_values`` of the thinned snapshots, not ``values`` (of all).
    """
    every = params.thinning(snaps.step_s)
    compared = snaps.thinned(every)
    if every > 1:  # the observed statistic on the snapshots the replicates use
        values = thinned_values(compared)
    null = null_distribution(NullModel(compared, params), statistic, params, run, progress,
                             label=f"{params.null} replicates")  # fmt: skip
    return summary_table(values, null, params.alpha, name, compared.step_s)


# --------------------------------------------------------------------------- statistics


@dataclass(frozen=True)
class RoleSetStatistic:
    """Statistic: the mean participation index or time prevalence of fixed role sets.

    Parameters
    ----------
    colocation : ColocationParams
        Radius, participation threshold and largest size.
    tested : tuple of ndarray
        Role-code rows of the tested sets, one array per size (2, 3, ...); a
        family closed under subsets, as the sets with a prevalent snapshot are.
    statistic : {"continuous", "count"}
        Mean participation index, or time prevalence.
    """

    colocation: Any
    tested: tuple[np.ndarray, ...]
    statistic: str = "continuous"

    def __call__(self, model: NullModel, rng: np.random.Generator) -> np.ndarray:
        """Return the tested sets' statistic in one null replicate.

        Only the tested sets are mined beyond pairs; for the mean every set
        with a row instance is extended, so that a tested set whose subsets
        were never prevalent in the replicate still gets its mean.
        """
        from comove.roles.chain import role_chain

        snaps, _ = model.draw(rng)
        n_roles = len(snaps.roles)
        continuous = self.statistic == "continuous"
        tally = role_chain(snaps, self.colocation, min_prevalent_snapshots=0 if continuous else 1,
                           only=self.only(n_roles))  # fmt: skip
        return role_set_values(tally.levels, self.tested, n_roles, self.statistic)

    def only(self, n_roles: int) -> dict[int, np.ndarray]:
        """Return size -> codes of the tested sets (what a replicate mines beyond pairs)."""
        return {sets.shape[1]: encode_role_sets(sets, n_roles) for sets in self.tested}


def role_set_values(
    levels: list, tested: tuple[np.ndarray, ...], n_roles: int, statistic: str = "count"
) -> np.ndarray:
    """Return each tested role set's statistic in ``levels`` (0 where absent).

    ``"count"``: time prevalence, prevalent / present snapshots.
    ``"continuous"``: mean participation index over the present snapshots
    (the snapshots without a row instance count as 0).
    """
    by_size = {lv.size: lv for lv in levels}
    out = []
    for sets in tested:
        values = np.zeros(sets.shape[0])
        level = by_size.get(sets.shape[1]) if sets.size else None
        if level is not None and level.roles.shape[0]:
            have = encode_role_sets(level.roles, n_roles)
            order = np.argsort(have)
            want = encode_role_sets(sets, n_roles)
            pos = np.searchsorted(have[order], want)
            pos = np.minimum(pos, have.size - 1)
            hit = have[order][pos] == want
            rows = order[pos]
            if statistic == "continuous":
                total = np.bincount(level.set_id, weights=level.pi, minlength=level.roles.shape[0])
            else:
                total = level.prevalent.astype(np.float64)
            with np.errstate(invalid="ignore", divide="ignore"):
                value = np.where(level.present > 0, total / np.maximum(level.present, 1), 0.0)
            values[hit] = value[rows[hit]]
        out.append(values)
    return np.concatenate(out) if out else np.empty(0)


# --------------------------------------------------------------------------- families of tests


def pattern_tests(
    snaps: Snapshots,
    observed: Any,
    colocation: Any,
    params: SignificanceParams,
    run: RunParams,
    progress: bool = False,
) -> pd.DataFrame:
    """Return Monte Carlo tests of the time prevalence of every role set mined.

    The family tested is every role set with at least one prevalent snapshot
    (any other has time prevalence 0 and cannot be significant).

    Parameters
    ----------
    snaps : Snapshots
        The observed aligned snapshots.
    observed : RoleTally
        The observed tally from :func:`comove.roles.chain.role_chain`; its
        counts are the observed statistic (nothing is mined twice).
    colocation : ColocationParams
        The miner's settings, reused for every replicate.
    params : SignificanceParams
        Null model and replicates.
    run : RunParams
        Seed (resolved) and engine.
    progress : bool, default False
        Show a progress bar.

    Returns
    -------
    DataFrame
        ``roles``, ``size``, ``time_prevalence``, ``mean_participation_index``
        and the columns of :func:`summary_table` (``statistic`` names the one
        tested), sorted by p-value.
    """
    from comove.roles.chain import role_chain
    from comove.roles.persistence import role_label

    n_roles = len(snaps.roles)
    tested = tuple(lv.roles[lv.prevalent >= 1] for lv in observed.levels)
    prevalence = role_set_values(observed.levels, tested, n_roles, "count")
    mean_pi = role_set_values(observed.levels, tested, n_roles, "continuous")
    labels = [role_label(row, snaps.roles) for sets in tested for row in sets]
    sizes = [sets.shape[1] for sets in tested for _ in sets]
    statistic = RoleSetStatistic(colocation, tested, params.statistic)

    def thinned_values(compared: Snapshots) -> np.ndarray:
        mined = role_chain(compared, colocation, min_prevalent_snapshots=0,
                           only=statistic.only(n_roles))  # fmt: skip
        return role_set_values(mined.levels, tested, n_roles, params.statistic)

    name = "mean_participation_index" if params.statistic == "continuous" else "time_prevalence"
    table = _compared_tests(snaps, statistic, mean_pi if params.statistic == "continuous"
                            else prevalence, thinned_values, name, params, run,
                            progress)  # fmt: skip
    table.insert(0, "roles", pd.Series(labels, dtype=object))
    table.insert(1, "size", np.asarray(sizes, dtype=np.int64))
    table.insert(2, "time_prevalence", prevalence)
    table.insert(3, "mean_participation_index", mean_pi)
    return table.sort_values(["p_value", "roles"], kind="stable").reset_index(drop=True)


@dataclass(frozen=True)
class GroupStatistic:
    """Statistic: time together of fixed pairs, and episode counts of fixed role sets.

    Parameters
    ----------
    grouping : GroupParams
        Link and group settings.
    episodes : EpisodeParams
        Episode settings.
    pair_keys : ndarray of int64
        ``object_a * n_objects + object_b`` of each tested pair.
    labels : tuple of str
        Tested role sets of episodes (see :func:`comove.groups.summary.episode_role_sets`).
    vx, vy : ndarray
        Observed velocity of every entry, carried along with the entries.
    """

    grouping: Any
    episodes: Any
    pair_keys: np.ndarray
    labels: tuple[str, ...]
    vx: np.ndarray
    vy: np.ndarray
    statistic: str = "continuous"

    def __call__(self, model: NullModel, rng: np.random.Generator) -> np.ndarray:
        """Return [time together of each pair, episodes of each role set] in one replicate."""
        from comove.groups.chain import group_chain
        from comove.tracks.motion import Motion

        snaps, order = model.draw(rng)
        vx = self.vx if order is None else self.vx[order]
        vy = self.vy if order is None else self.vy[order]
        tally = group_chain(snaps, self.grouping, self.episodes, motion=Motion(vx=vx, vy=vy))
        return group_statistics(snaps, tally, self.pair_keys, self.labels, self.statistic)


def group_statistics(
    snaps: Snapshots,
    tally: Any,
    pair_keys: np.ndarray,
    labels: tuple[str, ...],
    statistic: str = "count",
) -> np.ndarray:
    """Return [snapshots together per tested pair, a value per tested role set].

    Per role set of episodes: with ``"count"`` the number of its episodes,
    with ``"continuous"`` the snapshots together summed over its episodes.
    """
    from comove.groups.summary import episode_role_sets

    together = tally.together(snaps, pair_keys)
    found = pd.Series(episode_role_sets(snaps, tally.episodes), dtype=object)
    if statistic == "continuous":
        weights = np.asarray(tally.episodes.together, dtype=np.float64)
        by_label = pd.Series(weights, index=found.to_numpy()).groupby(level=0).sum()
    else:
        by_label = found.value_counts()
    per_set = by_label.reindex(list(labels), fill_value=0).to_numpy(np.float64)
    return np.concatenate([together, per_set])


def group_tests(
    snaps: Snapshots,
    observed: Any,
    dyads: pd.DataFrame,
    episode_roles: pd.Series,
    grouping: Any,
    episodes: Any,
    params: SignificanceParams,
    run: RunParams,
    progress: bool = False,
) -> tuple[pd.DataFrame | None, pd.DataFrame]:
    """Return Monte Carlo tests of pairs' time together and role sets' episode counts.

    Pairs are tested only under the time shift: a role shuffle leaves every
    pair's time together unchanged, so it says nothing about pairs.

    Parameters
    ----------
    snaps : Snapshots
        The observed aligned snapshots.
    observed : GroupTally
        The observed result of :func:`comove.groups.chain.group_chain`.
    dyads : DataFrame
        The observed dyad table (its ``object_a``, ``object_b`` pairs are tested).
    episode_roles : Series
        The observed episodes' role sets (the episode table's ``roles``); the
        family tested is every role set with an observed episode.
    grouping, episodes : GroupParams, EpisodeParams
        The chain's settings, reused for every replicate.
    params : SignificanceParams
        Null model and replicates.
    run : RunParams
        Seed (resolved) and engine.
    progress : bool, default False
        Show a progress bar.

    Returns
    -------
    pair_tests : DataFrame or None
        ``object_a``, ``object_b`` and the columns of :func:`summary_table`;
        None under the role shuffle.
    role_tests : DataFrame
        ``roles``, ``episodes`` (observed count), ``together_s`` (time
        together in them) and the columns of :func:`summary_table`.
    """
    index = {str(name): k for k, name in enumerate(snaps.objects)}
    n_obj = len(snaps.objects)
    pair_keys = np.asarray(
        [index[a] * n_obj + index[b] for a, b in zip(dyads["object_a"], dyads["object_b"],
                                                      strict=True)],
        dtype=np.int64,
    )  # fmt: skip
    labels = tuple(sorted(set(episode_roles.astype(str))))
    stat = GroupStatistic(grouping, episodes, pair_keys, labels, observed.motion.vx,
                          observed.motion.vy, params.statistic)  # fmt: skip
    values = group_statistics(snaps, observed, pair_keys, labels, params.statistic)
    counts = group_statistics(snaps, observed, pair_keys[:0], labels, "count")
    times = group_statistics(snaps, observed, pair_keys[:0], labels, "continuous")
    null = null_distribution(NullModel(snaps, params), stat, params, run, progress,
                             label=f"{params.null} replicates")  # fmt: skip
    k = pair_keys.size
    name = "together_snapshots" if params.statistic == "continuous" else "episodes"
    role_tests = summary_table(values[k:], null[:, k:], params.alpha, name, snaps.step_s)
    role_tests.insert(0, "roles", pd.Series(list(labels), dtype=object))
    role_tests.insert(1, "episodes", counts.astype(np.int64))
    role_tests.insert(2, "together_s", times * snaps.step_s)
    if params.null != "time-shift":
        return None, role_tests
    pair_tests = summary_table(values[:k], null[:, :k], params.alpha, "together_snapshots",
                               snaps.step_s)  # fmt: skip
    pair_tests.insert(0, "object_a", dyads["object_a"].to_numpy(dtype=object))
    pair_tests.insert(1, "object_b", dyads["object_b"].to_numpy(dtype=object))
    return pair_tests, role_tests


@dataclass(frozen=True)
class FocalStatistic:
    """Statistic: the mean share or time prevalence of fixed role sets around the focal role.

    Parameters
    ----------
    params : FocalParams
        Focal role, radius and share threshold.
    tested : tuple of ndarray
        Role-code rows of the tested sets, one array per size (1, 2, ...).
    statistic : {"continuous", "count"}
        Mean share over present(S), or time prevalence.
    """

    params: Any
    tested: tuple[np.ndarray, ...]
    statistic: str = "continuous"

    def __call__(self, model: NullModel, rng: np.random.Generator) -> np.ndarray:
        """Return the tested sets' statistic in one null replicate (0 where absent)."""
        from comove.roles.focal import focal_chain, focal_values, surrounding_sets

        snaps, _ = model.draw(rng)
        tally = focal_chain(snaps, self.params)
        levels = surrounding_sets(tally, self.params, only=self.tested)
        return focal_values(levels, self.tested, self.statistic)


def focal_tests(
    snaps: Snapshots,
    observed: Any,
    levels: list,
    focal: Any,
    params: SignificanceParams,
    run: RunParams,
    progress: bool = False,
) -> pd.DataFrame:
    """Return Monte Carlo tests of every role set that surrounds the focal role at a snapshot.

    Parameters
    ----------
    snaps : Snapshots
        The observed aligned snapshots.
    observed : FocalTally
        The observed neighbourhoods (:func:`comove.roles.focal.focal_chain`).
    levels : list of FocalLevel
        The observed sets (:func:`comove.roles.focal.surrounding_sets`); the
        family tested is every one with a snapshot at which it surrounds the
        focal role.
    focal : FocalParams
        Focal role, radius and threshold, reused for every replicate.
    params : SignificanceParams
        Null model, replicates and statistic (``continuous``: mean share;
        ``count``: time prevalence).
    run : RunParams
        Seed (resolved) and engine.
    progress : bool, default False
        Show a progress bar.

    Returns
    -------
    DataFrame
        ``around``, ``size``, ``time_prevalence``, ``mean_share`` and the
        columns of :func:`summary_table`, sorted by p-value.
    """
    from comove.roles.focal import focal_chain, focal_values, surrounding_sets
    from comove.roles.persistence import role_label

    tested = tuple(lv.roles[lv.prevalent >= 1] for lv in levels)
    counted = surrounding_sets(observed, focal, only=tested)
    prevalence = focal_values(counted, tested, "count")
    mean_share = focal_values(counted, tested, "continuous")
    statistic = FocalStatistic(focal, tested, params.statistic)

    def thinned_values(compared: Snapshots) -> np.ndarray:
        thinned = focal_chain(compared, focal)
        return focal_values(surrounding_sets(thinned, focal, only=tested), tested,
                            params.statistic)  # fmt: skip

    name = "mean_share" if params.statistic == "continuous" else "time_prevalence"
    table = _compared_tests(snaps, statistic, mean_share if params.statistic == "continuous"
                            else prevalence, thinned_values, name, params, run,
                            progress)  # fmt: skip
    table.insert(0, "around", pd.Series([role_label(row, snaps.roles) for sets in tested
                                         for row in sets], dtype=object))  # fmt: skip
    table.insert(1, "size", np.asarray([sets.shape[1] for sets in tested for _ in sets],
                                       dtype=np.int64))  # fmt: skip
    table.insert(2, "time_prevalence", prevalence)
    table.insert(3, "mean_share", mean_share)
    return table.sort_values(["p_value", "around"], kind="stable").reset_index(drop=True)


#: Spawn key of the swap test's random stream (apart from the replicates' streams).
LEAD_STREAM = 0x1EAD


def lead_tests(
    blocks: Any,
    leaders: pd.DataFrame,
    snaps: Snapshots,
    params: SignificanceParams,
    seed: int,
) -> pd.DataFrame:
    """Return the leadership table with a Monte Carlo test of each pair's lead.

    The statistic is the lead asymmetry A = C(τ̂) − C(−τ̂): how much better
    the headings agree at the lead delay τ̂ than at the mirrored one
    (:func:`comove.groups.leadership.lead_asymmetry`). The null hypothesis is
    that neither object leads: at any time the pair is the same in law either
    way round. Each replicate swaps a and b in each block of 2 lags + 1
    snapshots with probability 1/2, independently (a block keeps the heading
    products' dependence over the delays looked at, as blocks do in the
    block bootstrap); a swapped block contributes u_b(t) · u_a(t + τ) in place
    of u_a(t) · u_b(t + τ). A true lead of a over b becomes a mixture of leads
    both ways, with a smaller asymmetry; a pair with no lead is unchanged in
    law. Few blocks give few distinct swaps: a pair together for k blocks
    cannot reach p below about 2^(1 − k).

    Parameters
    ----------
    blocks : LeadBlocks
        The judged pairs' sums per block (:func:`comove.groups.leadership.lead_blocks`).
    leaders : DataFrame
        The leadership table of those pairs (``leader``, ``follower``, ...).
    snaps : Snapshots
        The run (names and step).
    params : SignificanceParams
        ``replicates`` and ``alpha``.
    seed : int
        The run's seed; the swaps draw from its own stream (``LEAD_STREAM``),
        so they are the same whatever the engine.

    Returns
    -------
    DataFrame
        ``leaders`` with the columns of :func:`summary_table` (``statistic``
        ``lead_asymmetry``), row for row.

    References
    ----------
    .. [1] M. Nagy, Z. Ákos, D. Biro, T. Vicsek, "Hierarchical group dynamics in
       pigeon flocks", Nature 464, 890-893, 2010. doi:10.1038/nature08891
    .. [2] H. R. Künsch, "The jackknife and the bootstrap for general
       stationary observations", Annals of Statistics 17(3), 1217-1241, 1989.
       (blocks that keep short-range dependence; from memory, not checked)
    .. [3] P. Good, "Permutation, Parametric, and Bootstrap Tests of
       Hypotheses", 3rd ed., Springer, 2005. (randomisation under
       exchangeability; from memory, not checked)
    """
    from comove.groups.leadership import lead_asymmetry, table_keys

    lags, n_blocks = blocks.lags, blocks.forward.shape[0]
    observed = lead_asymmetry(*blocks.swapped(np.zeros(n_blocks, dtype=bool)), lags)
    rng = np.random.default_rng(np.random.SeedSequence(seed, spawn_key=(LEAD_STREAM,)))
    null = np.empty((int(params.replicates), blocks.key.size))
    for r in range(null.shape[0]):
        null[r] = lead_asymmetry(*blocks.swapped(rng.random(n_blocks) < 0.5), lags)
    table = summary_table(observed, null, params.alpha, "lead_asymmetry", snaps.step_s)
    keys = table_keys(leaders, snaps)
    row = np.searchsorted(blocks.key, keys)
    if keys.size and not np.array_equal(blocks.key[np.minimum(row, blocks.key.size - 1)], keys):
        raise ValueError("the blocks hold other pairs than the leadership table")
    return pd.concat([leaders.reset_index(drop=True), table.iloc[row].reset_index(drop=True)],
                     axis=1)  # fmt: skip


@dataclass(frozen=True)
class CrossLStatistic:
    """Statistic: the cross-L values of a cross-K table in one replicate."""

    params: Any
    role_pairs: tuple[tuple[int, int], ...]

    def __call__(self, model: NullModel, rng: np.random.Generator) -> np.ndarray:
        """Return the ``l`` column of the replicate's cross-K table."""
        from comove.roles.crossk import cross_k

        snaps, _ = model.draw(rng)
        return cross_k(snaps, self.params, list(self.role_pairs))["l_m"].to_numpy(np.float64)


def cross_k_tests(
    snaps: Snapshots,
    kparams: Any,
    params: SignificanceParams,
    run: RunParams,
    progress: bool = False,
) -> pd.DataFrame:
    """Return the cross-K table with pointwise envelopes from time-shift replicates.

    The envelopes always come from the time shift (each role's tracks keep
    their own space use; only their timing relative to each other is broken),
    whatever ``params.null`` says, because role shuffles leave the pooled
    point pattern of all objects unchanged.
    """
    from comove.roles.crossk import cross_k, envelopes

    observed = cross_k(snaps, kparams)
    if params.replicates == 0 or observed.empty:
        return observed
    codes = {str(name): k for k, name in enumerate(snaps.roles)}
    pairs = tuple(dict.fromkeys(
        (codes[a], codes[b]) for a, b in zip(observed["role_a"], observed["role_b"], strict=True)
    ))  # fmt: skip
    shift = replace(params, null="time-shift")
    null = null_distribution(NullModel(snaps, shift), CrossLStatistic(kparams, pairs), shift, run,
                             progress, label="time-shift replicates (cross-K)")  # fmt: skip
    replicates = [observed.assign(l=row) for row in null]
    return envelopes(observed, replicates, level=1 - params.alpha)

"""Participant-level DP statistics a recommender can be trained from.

In the spirit of McSherry and Mironov, "Differentially Private Recommender
Systems" (KDD 2009, cited from memory): noisy per-item weights and sums give
item means (shrunk towards the global mean, their beta), then a noisy
item-item covariance of weighted, centred ratings and its noisy co-rating
weights give a covariance estimate. The weights, grids and bounds below are
our own choices and derivations.

Neighbouring datasets. Each statistic's noise is calibrated to adding or
removing one participant with all their ratings (epsilon, rho below). The
release also publishes the exact cohort size, and add/remove neighbours have
different sizes, so that claim would not hold for the release as a whole. What
holds is replace-one neighbouring (same size, one participant's ratings swapped
for any other's): by group privacy (a swap is a removal and an addition) at
2 epsilon for discrete Laplace and 4 rho for discrete Gaussian (zCDP: k^2 rho for
groups of k; Bun and Steinke 2016, from memory). `Guarantee` states that, and
that is what the vault charges. (Noising the cohort size instead would cost a
budget share too and leave every other statistic's scale tied to it.)

Contribution bound and weights. A participant who rated more than
`max_items_per_participant` (m) items keeps a uniformly random m of them.
Each participant u with n ratings then gets one weight a_u on the grid 1/Q,
Q = 64 m (so a weight is never rounded by more than 1/64 of itself):
- discrete Laplace (epsilon, L1): a_u = floor(Q / n), so sum_j a_u <= Q,
  i.e. total weight at most 1 however many items were rated;
- discrete Gaussian (rho, L2): a_u = floor(Q / sqrt(n)), so n a_u^2 <= Q^2,
  i.e. a weight vector of L2 norm at most 1.
Why these: one participant's whole contribution to every statistic is the
weighted vector x_u = a_u d_u (d_u their centred ratings, 0 where unrated) or
its outer product, and the matching norm of x_u is bounded by the weight
norm times the largest deviation, whatever n is. A heavy rater thus counts
as much as a light one, no more, and no rating has to be discarded to bound
the sensitivity (unlike a plain count, whose sensitivity would be m).

The four statistics (each in exact integers, each with its share of the budget):
1. weights   W_j  = sum_u a_u [u rated j]                 L1 <= Q,        L2^2 <= Q^2
2. sums      S_j  = sum_u a_u (v_uj - c0)                  L1 <= Q B,      L2^2 <= (Q B)^2
3. covariance X_jk = sum_u a_u^2 d_uj d_uk (j <= k)        L1 <= (Q B)^2,  L2^2 <= (Q B)^4
4. co-weights V_jk = sum_u a_u^2 [rated j][rated k] (j<=k) L1 <= Q^2,      L2^2 <= Q^4
Scores are clipped to [low, high] and quantised to 1/k; c0 is the grid point
floor((low + high)/2) and B = ceil(span/2) grid units, so |v - c0| <= B. For
the covariance, d_uj = clip(v_uj - c_j, -B, B) with c_j the *released* noisy
item mean (a function of already-released outputs, so adaptive composition
covers it; any fixed centre has the same bound). Only the upper triangle is
noised; its norms are at most those of the full outer product.
Where a statistic's exact bound is too large for the exact samplers, each
participant's contribution is divided by an integer D with truncation towards
zero, which never increases a norm: the released step is D fine grid units
and the bound becomes floor(bound / D) (L1) or floor(bound / D^2) (L2^2).
D is the smallest that fits, so most releases use D = 1.

Everything after the noise (shrinkage, clipping, PSD projection, prediction)
is post-processing of released values, which keeps the guarantee. Released
means lie in [low, high]; the covariance estimate is positive semi-definite
with variances in [0, ((high - low)/2)^2] (Popoviciu's bound for a variable in
[low, high], common practice) and correlations in [-1, 1].
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass
from fractions import Fraction

import numpy as np

from vault.crypto import random_bytes
from vault.errors import InvalidInput, UsageError
from vault.privacy import noise
from vault.privacy.accountant import (
    GAUSSIAN,
    LAPLACE,
    NOT_PROTECTED_ALWAYS,
    Component,
    Exact,
    Guarantee,
    Mechanism,
    PrivacyUnit,
    as_ratings,
    check_delta,
    choose_mechanism,
    draw,
    exact,
    make_grid,
)

WEIGHT_RESOLUTION = 64
STATISTICS = ("weights", "sums", "covariance", "co_weights")
_SAMPLER_LIMIT = 1 << 48
_GAUSSIAN_DEN_LIMIT = 1 << 24
_INT_LIMIT = 1 << 61


@dataclass(frozen=True)
class StatisticPlan:
    name: str
    divisor: int  # per-participant contributions are divided by this (towards zero)
    l1: int | None  # released-unit sensitivity (Laplace)
    l2_squared: int | None  # (Gaussian)
    budget: Fraction  # its epsilon or rho share
    noise: Fraction  # Laplace scale or Gaussian sigma^2, in released units
    step: Fraction  # one released unit, in `step_unit`
    step_unit: str


@dataclass(frozen=True)
class AggregatePlan:
    """Every public constant of one aggregate release (no data in here)."""

    mechanism: Mechanism
    grid: noise.FixedPointGrid
    max_items: int
    weight_units: int  # Q
    centre: int  # c0, grid units
    deviation: int  # B, grid units
    stats: dict[str, StatisticPlan]

    def weight(self, n: int) -> int:
        """a_u for a participant with n (<= max_items) kept ratings; 0 if none."""
        if n == 0:
            return 0
        q = self.weight_units
        return q // n if self.mechanism == LAPLACE else math.isqrt(q * q // n)


def _fit(mech: Mechanism, name: str, fine: int, part: Fraction, n_people: int,
         step: Fraction, step_unit: str) -> StatisticPlan:
    """The smallest divisor D whose released bound fits the exact samplers."""
    if part.numerator > (_SAMPLER_LIMIT if mech == LAPLACE else _GAUSSIAN_DEN_LIMIT // 2):
        raise UsageError("epsilon or rho has too large a numerator for the exact samplers")
    cap = _SAMPLER_LIMIT // part.denominator
    if cap < 1:
        raise UsageError("epsilon or rho has too large a denominator for the exact samplers")
    if mech == LAPLACE:
        divisor = max(1, -(-fine // cap))
        bound = fine // divisor
        param = Fraction(bound) / part
        largest = bound
    else:
        divisor = max(1, math.isqrt(fine // cap))
        while fine // (divisor * divisor) > cap:
            divisor += 1
        bound = fine // (divisor * divisor)
        param = Fraction(bound) / (2 * part)
        largest = math.isqrt(bound)
    if bound < 1:
        raise UsageError("epsilon or rho has too large a denominator for the exact samplers")
    if n_people * largest >= _INT_LIMIT:
        raise UsageError("too many participants for the integer grid; lower grid_k or max_items")
    return StatisticPlan(name, divisor, bound if mech == LAPLACE else None,
                         bound if mech == GAUSSIAN else None, part, param, step * divisor, step_unit)


def plan_aggregate(n_participants: int, grid: noise.FixedPointGrid, mechanism: Mechanism,
                   budget: Fraction, max_items: int, split: Sequence[Exact]) -> AggregatePlan:
    if isinstance(max_items, bool) or not isinstance(max_items, int) or max_items < 1:
        raise UsageError("max_items_per_participant must be a positive integer")
    shares = [exact(s, "split") for s in split]
    if len(shares) != len(STATISTICS) or any(s <= 0 for s in shares):
        raise UsageError("split needs four positive shares (weights, sums, covariance, co_weights)")
    parts = [budget * s / sum(shares) for s in shares]
    q = WEIGHT_RESOLUTION * max_items
    b = grid.span_units - grid.span_units // 2
    k = grid.k
    if (q * b) ** 2 >= _INT_LIMIT:
        raise UsageError("grid_k or max_items_per_participant too large for the integer grid")
    power = 1 if mechanism == LAPLACE else 2  # L1 bounds, or squared L2 bounds
    fine = {"weights": q, "sums": q * b, "covariance": (q * b) ** 2, "co_weights": q * q}
    steps = {"weights": (Fraction(1, q), "participant weight"),
             "sums": (Fraction(1, q * k), "score x participant weight"),
             "covariance": (Fraction(1, q * q * k * k), "score^2 x participant weight^2"),
             "co_weights": (Fraction(1, q * q), "participant weight^2")}
    stats = {name: _fit(mechanism, name, fine[name] ** power, part, n_participants, *steps[name])
             for name, part in zip(STATISTICS, parts, strict=True)}
    centre = (grid.low_units + grid.high_units) // 2
    return AggregatePlan(mechanism, grid, max_items, q, centre, b, stats)


# --------------------------------------------------------------------------- contributions


def bound_contributions(rated: np.ndarray, max_items: int,
                        source: noise.ByteSource | None = None) -> np.ndarray:
    """The rated mask with at most `max_items` per row: a uniformly random subset where more.

    Each row's choice uses its own fresh random bytes, so it depends on that
    participant alone (which is all the sensitivity argument needs).
    """
    take = random_bytes if source is None else source
    kept = np.array(rated, dtype=bool)
    for row in np.flatnonzero(kept.sum(axis=1) > max_items):
        cells = np.flatnonzero(kept[row])
        keys = np.frombuffer(take(8 * cells.size), dtype="<u8")
        kept[row] = False
        kept[row, cells[np.argsort(keys, kind="stable")[:max_items]]] = True
    return kept


def _truncate(values: np.ndarray, divisor: int) -> np.ndarray:
    if divisor == 1:
        return values
    return np.sign(values) * (np.abs(values) // divisor)


def first_moments(plan: AggregatePlan, units: np.ndarray,
                  kept: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Per-participant (weights, sums) contributions in released units (rows = participants)."""
    a = np.array([plan.weight(int(n)) for n in kept.sum(axis=1)], dtype=np.int64)[:, None]
    w = _truncate(a * kept, plan.stats["weights"].divisor)
    s = _truncate(a * np.where(kept, units - plan.centre, 0), plan.stats["sums"].divisor)
    return w, s


def second_moments(plan: AggregatePlan, units_row: np.ndarray, kept_row: np.ndarray,
                   centres: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """One participant's (covariance, co_weights) upper-triangle contributions, released units."""
    a = plan.weight(int(kept_row.sum()))
    b = plan.deviation
    d = np.where(kept_row, np.clip(units_row - centres, -b, b), 0) * a
    e = kept_row.astype(np.int64) * a
    upper = np.triu_indices(units_row.size)
    cov = _truncate(np.outer(d, d)[upper], plan.stats["covariance"].divisor)
    co = _truncate(np.outer(e, e)[upper], plan.stats["co_weights"].divisor)
    return cov, co


# --------------------------------------------------------------------------- the release


@dataclass(frozen=True, eq=False)
class AggregateRelease:
    """Released statistics (items in column order; all post-processing of noisy values)."""

    item_ids: tuple[str, ...] | None
    weights: np.ndarray  # noisy total participant weight per item
    sums: np.ndarray  # noisy weighted sums of (score - centre), score x weight
    means: np.ndarray  # item means, shrunk towards the global mean, clipped to the range
    co_weights: np.ndarray  # noisy co-rating weights (items x items, symmetric)
    covariance_sums: np.ndarray  # noisy weighted centred products (symmetric)
    covariance: np.ndarray  # estimate: shrunk ratio, projected to positive semi-definite
    value_range: tuple[float, float]

    def similarities(self) -> np.ndarray:
        """Item-item correlations from `covariance` (0 where a variance is 0)."""
        sd = np.sqrt(np.clip(np.diag(self.covariance), 0, None))
        scale = np.outer(sd, sd)
        return np.divide(self.covariance, scale, out=np.zeros_like(scale), where=scale > 0)

    def predict(self, ratings: np.ndarray, *, ridge: float = 0.1) -> np.ndarray:
        """Best linear predictor of every cell from a row's own ratings (NaN = unknown).

        mean_U + C_UR (C_RR + ridge * avg var * I)^-1 (r_R - mean_R), clipped to
        the range. Caution: it reads the rows' raw ratings, so its output is not
        private with respect to those participants: compute it on their side or
        inside the vault, never publish it as part of the release.
        """
        rows = as_ratings(ratings)
        if rows.shape[1] != self.means.size:
            raise InvalidInput("ratings must have one column per released item")
        if not (math.isfinite(ridge) and ridge > 0):
            raise UsageError("ridge must be a positive number")
        cov, mu = self.covariance, self.means
        lam = ridge * max(float(np.mean(np.diag(cov))), 1e-12)
        out = np.tile(mu, (rows.shape[0], 1))
        for i, row in enumerate(rows):
            seen = np.flatnonzero(~np.isnan(row))
            if seen.size:
                system = cov[np.ix_(seen, seen)] + lam * np.eye(seen.size)
                out[i] += cov[:, seen] @ np.linalg.solve(system, row[seen] - mu[seen])
        return np.clip(out, *self.value_range)


def _noise_std(stat: StatisticPlan) -> float:
    """Standard deviation of the noise in score units (continuous approximation)."""
    spread = math.sqrt(2) * float(stat.noise) if stat.l1 is not None else math.sqrt(stat.noise)
    return spread * float(stat.step)


def _symmetric(upper: np.ndarray, n: int) -> np.ndarray:
    full = np.zeros((n, n))
    full[np.triu_indices(n)] = upper
    return full + np.triu(full, 1).T


def release_aggregate(
    values: np.ndarray,
    *,
    low: Exact,
    high: Exact,
    grid_k: int,
    max_items_per_participant: int,
    epsilon: Exact | None = None,
    rho: Exact | None = None,
    split: Sequence[Exact] = (1, 1, 1, 1),
    item_ids: Sequence[str] | None = None,
    delta: Exact = Fraction(1, 10**6),
    source: noise.ByteSource | None = None,
) -> tuple[AggregateRelease, Guarantee]:
    """Noisy item weights, sums, means and covariance under participant-level DP.

    `epsilon` (discrete Laplace, pure DP) or `rho` (discrete Gaussian, zCDP)
    is split over the four statistics in proportion to `split` (exactly:
    the shares add up to the total). `delta` is only for the displayed
    (epsilon, delta) conversion of rho. The noise is calibrated to add/remove
    neighbours at `epsilon` (`rho`); the returned guarantee is replace-one at
    2 epsilon (4 rho), since the cohort size is released exactly.
    """
    mech, budget = choose_mechanism(epsilon, rho, None)
    grid = make_grid(low, high, grid_k)
    arr = as_ratings(values)
    n_people, n_items = arr.shape
    if item_ids is not None and len(item_ids) != n_items:
        raise InvalidInput("item_ids must name every column")
    plan = plan_aggregate(n_people, grid, mech, budget, max_items_per_participant, split)
    kept = bound_contributions(~np.isnan(arr), plan.max_items, source)
    units = grid.quantise(np.where(kept, arr, float(grid.low)))
    st = plan.stats

    def noisy(name: str, exact_sum: np.ndarray) -> np.ndarray:
        stat = st[name]
        return (exact_sum + draw(mech, stat.noise, exact_sum.size, source)) * float(stat.step)

    w_parts, s_parts = first_moments(plan, units, kept)
    weights = noisy("weights", w_parts.sum(axis=0))
    sums = noisy("sums", s_parts.sum(axis=0))
    lo, hi = float(grid.low), float(grid.high)
    centre = plan.centre / grid.k
    beta = _noise_std(st["weights"])  # pseudo-weight: a count at noise level is pulled halfway
    pos = np.clip(weights, 0, None)
    overall = float(np.clip(sums.sum() / max(pos.sum(), beta), lo - centre, hi - centre))
    means = np.clip(centre + (sums + beta * overall) / (pos + beta), lo, hi)

    centres = grid.quantise(means)
    upper_size = n_items * (n_items + 1) // 2
    cov_sum = np.zeros(upper_size, np.int64)
    co_sum = np.zeros(upper_size, np.int64)
    for row in np.flatnonzero(kept.any(axis=1)):
        cov, co = second_moments(plan, units[row], kept[row], centres)
        cov_sum += cov
        co_sum += co
    cov_sums = _symmetric(noisy("covariance", cov_sum), n_items)
    co_weights = _symmetric(noisy("co_weights", co_sum), n_items)
    covariance = _covariance(cov_sums, co_weights, _noise_std(st["co_weights"]),
                             ((hi - lo) / 2) ** 2)
    release = AggregateRelease(
        item_ids=None if item_ids is None else tuple(item_ids),
        weights=weights, sums=sums, means=means, co_weights=co_weights,
        covariance_sums=cov_sums, covariance=covariance, value_range=(lo, hi),
    )
    for a in (weights, sums, means, co_weights, cov_sums, covariance):
        a.setflags(write=False)
    return release, _guarantee(plan, mech, budget, delta, n_items)


def _covariance(cov_sums: np.ndarray, co_weights: np.ndarray, beta: float,
                max_var: float) -> np.ndarray:
    """(X + beta prior) / (V + beta), prior = pooled variance on the diagonal, 0 off it; then PSD."""
    pos = np.clip(co_weights, 0, None)
    diag_w = max(float(np.diag(pos).sum()), beta)
    prior_var = float(np.clip(np.diag(cov_sums).sum() / diag_w, 0, max_var))
    prior = np.diag(np.full(cov_sums.shape[0], prior_var))
    ratio = (cov_sums + beta * prior) / (pos + beta)
    return feasible_covariance(ratio, max_var)


def feasible_covariance(matrix: np.ndarray, max_var: float) -> np.ndarray:
    """The nearest-in-spirit valid covariance of variables bounded to a range of half-width
    sqrt(max_var): positive semi-definite (negative eigenvalues clipped), variances clamped to
    [0, max_var], correlations kept (so |c_jk| <= sqrt(c_jj c_kk)). Post-processing only."""
    sym = (np.asarray(matrix, float) + np.asarray(matrix, float).T) / 2
    vals, vecs = np.linalg.eigh(sym)
    psd = (vecs * np.clip(vals, 0, None)) @ vecs.T
    sd = np.sqrt(np.clip(np.diag(psd), 0, None))
    scale = np.outer(sd, sd)
    corr = np.divide(psd, scale, out=np.zeros_like(psd), where=scale > 0)
    np.fill_diagonal(corr, 1.0)
    corr = np.clip((corr + corr.T) / 2, -1.0, 1.0)
    target = np.sqrt(np.clip(np.diag(psd), 0, max_var))
    out = corr * np.outer(target, target)
    np.fill_diagonal(out, target**2)
    return out


def _guarantee(plan: AggregatePlan, mech: Mechanism, budget: Fraction, delta: Exact,
               n_items: int) -> Guarantee:
    entries = {"weights": n_items, "sums": n_items, "covariance": n_items * (n_items + 1) // 2,
               "co_weights": n_items * (n_items + 1) // 2}
    components = tuple(
        Component(name=s.name, mechanism=mech, entries=entries[s.name], step=s.step,
                  step_unit=s.step_unit, l1_sensitivity=s.l1, l2_sensitivity_squared=s.l2_squared,
                  noise=s.noise, epsilon=s.budget if mech == LAPLACE else None,
                  rho=s.budget if mech == GAUSSIAN else None)
        for s in plan.stats.values()
    )
    norm = "total weight at most 1 (weights 1/n, L1)" if mech == LAPLACE else \
        "weight vector of L2 norm at most 1 (weights 1/sqrt(n))"
    m = plan.max_items
    bound = (f"each participant: at most {m} ratings (a random {m} kept from anyone with more), "
             f"each clipped to the range, with {norm} on the grid 1/{plan.weight_units}; "
             f"deviations from the item means clamped to +-{Fraction(plan.deviation, plan.grid.k)}")
    lost = (
        "That a participant took part: the exact cohort size is released, so adding or removing "
        "one participant is not what is bounded; the stated epsilon (rho) is for replacing one "
        "participant's ratings by another's.",
        "Predictions made from a participant's own ratings (AggregateRelease.predict) read those raw "
        "ratings and are not private with respect to that participant.",
    )
    notes = (
        "Budget split over weights, sums, covariance, co_weights (add/remove shares): "
        + ", ".join(str(s.budget) for s in plan.stats.values()) + ".",
        "Each statistic's noise is calibrated to adding or removing one participant at its share "
        f"of {budget} ({'epsilon' if mech == LAPLACE else 'rho'}); replacing one participant is "
        f"bounded by {'twice' if mech == LAPLACE else 'four times'} that, by group privacy, "
        "which is the stated and charged guarantee.",
        "Item means are shrunk towards the global mean with a pseudo-weight equal to the noise's "
        "standard deviation and clipped to the range; the covariance estimate is shrunk likewise, "
        "made positive semi-definite, its variances clamped to [0, ((high - low)/2)^2] and its "
        "correlations to [-1, 1] (post-processing).",
    )
    replace_one = budget * (2 if mech == LAPLACE else 4)  # group privacy for a swap
    return Guarantee(
        release="aggregate", mechanism=mech, unit=PrivacyUnit.PARTICIPANT,
        neighbours="replace-one: one participant's ratings replaced by any other's (the cohort "
                   "size is public)",
        epsilon=replace_one if mech == LAPLACE else None,
        rho=replace_one if mech == GAUSSIAN else None,
        delta=check_delta(delta) if mech == GAUSSIAN else None,
        grid_step=Fraction(1, plan.grid.k), value_range=(plan.grid.low, plan.grid.high),
        contribution_bound=bound, components=components,
        not_protected=lost + NOT_PROTECTED_ALWAYS, notes=notes,
    )

"""vault.privacy.accountant / vault.privacy.aggregate against outside references.

Outside sources:
- scipy.stats.dlaplace: variance and kurtosis of the discrete Laplace (our
  scale t is scipy's a = 1/t, from memory of scipy's docs).
- The discrete Gaussian's moments from its definition, P(x) ~ exp(-x^2/(2 s2))
  (Canonne, Kamath, Steinke 2020), summed numerically (scipy has none).
- scipy.stats.binomtest: the exact conditional test of P_a(bin) <= e^eps P_b(bin)
  in the empirical privacy checks; scipy.stats.chisquare for uniform subsets.
- numpy.average / numpy.cov: weighted item means and the covariance that the
  aggregate release approaches when its noise is negligible.
- OpenDP 0.16 (opendp.prelude): privacy maps of its Laplace and Gaussian
  measurements at our sensitivities, its composition and its zCDP ->
  approximate-DP conversion (a tighter one than ours, so ours must not be lower).
- Bun and Steinke 2016, Prop. 1.3 (from memory): rho + 2 sqrt(rho ln(1/delta)).
Seeded tests use a numpy PCG64 generator as the byte source (test-only, never a
source of real noise), so their outcome is fixed.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from decimal import Decimal
from fractions import Fraction as F
from types import ModuleType

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy import stats

from tests.privacy.ratio_test import worst_ratio_pvalue
from vault.errors import InvalidInput, VaultError
from vault.privacy import noise
from vault.privacy.accountant import (
    Budget,
    Cost,
    Ledger,
    PrivacyUnit,
    exact,
    matrix_sensitivity,
    release_matrix,
    remaining_epsilon,
    spent_epsilon,
    within,
    zcdp_epsilon,
)
from vault.privacy.aggregate import (
    bound_contributions,
    first_moments,
    plan_aggregate,
    release_aggregate,
    second_moments,
)

P, R = PrivacyUnit.PARTICIPANT, PrivacyUnit.RATING


def seeded(seed: int) -> Callable[[int], bytes]:
    """Deterministic test byte source (numpy PCG64); tests only."""
    return np.random.default_rng(seed).bytes


# --------------------------------------------------------------------------- reference moments


def laplace_moments(scale: F) -> tuple[float, float]:
    """(variance, fourth moment) from scipy.stats.dlaplace with a = 1/t."""
    var, kurt = stats.dlaplace.stats(1 / float(scale), moments="vk")
    return float(var), float((kurt + 3) * var**2)


def gaussian_moments(sigma2: F) -> tuple[float, float]:
    """(variance, fourth moment) of the discrete Gaussian from its definition (CKS 2020).

    Summed over |x| <= 40 sigma where that is cheap; for sigma^2 > 10^4 the sums
    equal the continuous moments sigma^2 and 3 sigma^4 to within a relative
    exp(-2 pi^2 sigma^2) (Poisson summation, a fact of the trade, no source),
    which `test_discrete_gaussian_moments_reach_the_continuous_ones` checks at the switch.
    """
    s2 = float(sigma2)
    if s2 > 1e4:
        return s2, 3 * s2 * s2
    return _gaussian_moments_by_sum(s2)


def _gaussian_moments_by_sum(s2: float) -> tuple[float, float]:
    half = int(40 * math.sqrt(s2)) + 40
    x = np.arange(-half, half + 1, dtype=float)
    w = np.exp(-(x**2) / (2 * s2))
    w /= w.sum()
    return float((w * x**2).sum()), float((w * x**4).sum())


def test_discrete_gaussian_moments_reach_the_continuous_ones() -> None:
    var, m4 = _gaussian_moments_by_sum(1e4)
    assert var == pytest.approx(1e4, rel=1e-12) and m4 == pytest.approx(3e8, rel=1e-12)
    small, _ = _gaussian_moments_by_sum(0.1)
    assert small < 0.1 * 0.5  # far from continuous at small sigma: the sums matter there


def variance_z(noise_units: np.ndarray, moments: tuple[float, float]) -> float:
    """z-score of the mean square of zero-mean noise against the reference variance."""
    var, m4 = moments
    x2 = noise_units.astype(float) ** 2
    return float((x2.mean() - var) / math.sqrt((m4 - var**2) / x2.size))


# --------------------------------------------------------------------------- sensitivities by hand


def test_hand_worked_matrix_sensitivities() -> None:
    # scores 1..5 on a 1/2 grid: span 8 units; 5 items
    assert matrix_sensitivity(P, 5, 8) == (40, 320)  # 5 * 8, 5 * 8^2
    assert matrix_sensitivity(R, 5, 8) == (8, 64)
    values = np.array([[1, 2.5, np.nan, 5, 3], [np.nan] * 5])
    _, g = release_matrix(values, low=1, high=5, grid_k=2, epsilon=F(1, 2), source=seeded(1))
    c = g.components[0]
    assert (c.l1_sensitivity, c.noise, c.entries) == (40, F(80), 10)  # scale 40 / (1/2)
    _, g = release_matrix(values, low=1, high=5, grid_k=2, rho=F(1, 2), source=seeded(2))
    c = g.components[0]
    assert (c.l2_sensitivity_squared, c.noise) == (320, F(320))  # sigma^2 = 320 / (2 * 1/2)
    _, g = release_matrix(values, low=1, high=5, grid_k=2, unit=R, epsilon=2, source=seeded(3))
    c = g.components[0]
    assert (c.l1_sensitivity, c.noise, c.entries) == (8, F(4), 4)


def test_hand_worked_aggregate_sensitivities() -> None:
    # scores 0..3, k=1: span 3, B = 2, centre 1; m = 2 so Q = 128
    grid = noise.FixedPointGrid(F(0), F(3), 1)
    plan = plan_aggregate(10, grid, "discrete-laplace", F(4), 2, (1, 1, 1, 1))
    assert (plan.weight_units, plan.deviation, plan.centre) == (128, 2, 1)
    got = {n: s.l1 for n, s in plan.stats.items()}
    assert got == {"weights": 128, "sums": 256, "covariance": 256**2, "co_weights": 128**2}
    assert all(s.budget == 1 and s.divisor == 1 for s in plan.stats.values())
    assert plan.stats["sums"].noise == 256  # scale = 256 / 1
    assert plan.weight(1) == 128 and plan.weight(2) == 64
    gplan = plan_aggregate(10, grid, "discrete-gaussian", F(4), 2, (1, 1, 1, 1))
    assert gplan.weight(2) == 90  # floor(128 / sqrt 2) = 90.5..
    assert gplan.stats["sums"].l2_squared == 256**2
    assert gplan.stats["covariance"].l2_squared == 256**4 // gplan.stats["covariance"].divisor ** 2


# --------------------------------------------------------------------------- calibration


@pytest.mark.parametrize(("unit", "mechanism"), [(P, "laplace"), (P, "gaussian"),
                                                 (R, "laplace"), (R, "gaussian")])
def test_noise_variance_matches_the_reference(unit: PrivacyUnit, mechanism: str) -> None:
    n_rows, n_items = 60_000, 3
    rng = np.random.default_rng(7)
    values = rng.integers(0, 5, (n_rows, n_items)).astype(float) / 2  # on the 1/2 grid, 0..2
    values[rng.random(values.shape) < 0.3] = np.nan
    budget = {"epsilon": F(3, 2)} if mechanism == "laplace" else {"rho": F(1, 3)}
    out, _ = release_matrix(values, low=0, high=2, grid_k=2, unit=unit, source=seeded(11),
                            **budget)
    rated = ~np.isnan(values)
    truth = np.where(rated, values * 2, 2)  # midpoint 1 = 2 units where unrated
    if unit is R:
        assert np.array_equal(np.isnan(out), ~rated)
        errors = (out[rated] * 2 - truth[rated])
    else:
        assert not np.isnan(out).any()
        errors = (out * 2 - truth).ravel()
    units = np.rint(errors).astype(np.int64)
    assert np.array_equal(units, errors)  # noise stays on the grid
    l1, l2sq = matrix_sensitivity(unit, n_items, 4)
    if mechanism == "laplace":
        expected = laplace_moments(F(l1) / F(3, 2))
        wrong = laplace_moments(F(l1 - 4 if unit is P else l1 + 2) / F(3, 2))
    else:
        expected = gaussian_moments(F(l2sq) / F(2, 3))
        wrong = gaussian_moments(F(l2sq - 16 if unit is P else l2sq + 12) / F(2, 3))
    assert abs(variance_z(units, expected)) < 4.5
    assert abs(variance_z(units, wrong)) > 8  # the check has power: one item more or less
    assert abs(units.mean()) < 5 * math.sqrt(expected[0] / units.size)


def test_values_are_clipped_before_noise() -> None:
    base = np.array([[4.0, 0.0], [1.5, np.nan]])
    wild = np.array([[400.0, -9e9], [1.5, np.nan]])
    for unit in (P, R):
        a, _ = release_matrix(base, low=0, high=4, grid_k=2, unit=unit, epsilon=1, source=seeded(5))
        b, _ = release_matrix(wild, low=0, high=4, grid_k=2, unit=unit, epsilon=1, source=seeded(5))
        np.testing.assert_array_equal(a, b)


def test_missingness_pattern_is_hidden_for_the_participant_unit() -> None:
    # the same noise bytes: a row that rated item 0 at the midpoint and one that did
    # not rate it at all give bit-identical outputs, and every cell is released
    rated = np.array([[2.0, 3.5, 0.0], [1.0, 4.0, 2.0]])
    missing = np.array([[np.nan, 3.5, 0.0], [1.0, 4.0, np.nan]])
    a, ga = release_matrix(rated, low=0, high=4, grid_k=2, epsilon=1, source=seeded(9))
    b, gb = release_matrix(missing, low=0, high=4, grid_k=2, epsilon=1, source=seeded(9))
    np.testing.assert_array_equal(a, b)
    assert not np.isnan(a).any() and a.shape == rated.shape
    assert ga == gb  # nor does the guarantee depend on the pattern
    many = np.full((3, 3), np.nan)
    c, _ = release_matrix(many, low=0, high=4, grid_k=2, epsilon=1, source=seeded(9))
    assert not np.isnan(c).any()
    # the rating unit, by contrast, says plainly that the pattern is released
    d, gr = release_matrix(missing, low=0, high=4, grid_k=2, unit=R, epsilon=1, source=seeded(9))
    assert np.array_equal(np.isnan(d), np.isnan(missing))
    assert any("missingness pattern is not protected" in s for s in gr.not_protected)
    assert any("not protected; only single ratings are" in s for s in gr.not_protected)
    assert not any("missingness" in s for s in ga.not_protected)


# --------------------------------------------------------------------------- empirical privacy


def row_codes(out: np.ndarray, lo: int, hi: int) -> np.ndarray:
    """Each released row (in grid units, k = 1) as one bin code; coordinates clipped to [lo, hi]."""
    units = np.clip(np.rint(out).astype(np.int64), lo, hi) - lo
    width = hi - lo + 1
    return (units * width ** np.arange(units.shape[1])).sum(axis=1)


def repeated(row: list[float], n: int) -> np.ndarray:
    """n copies of one participant's row: n independent draws of that row's release."""
    return np.tile(np.array(row, dtype=float), (n, 1))


@pytest.mark.parametrize(("row_a", "row_b"), [
    ([0.0, np.nan], [2.0, 2.0]),  # a different rating and a different set of rated items
    ([0.0, 0.0], [2.0, 2.0]),  # the worst case: every cell from one end to the other
])
def test_participant_unit_neighbours_stay_within_e_to_the_epsilon(row_a: list, row_b: list) -> None:
    n, eps = 300_000, F(1)
    kw = dict(low=0, high=2, grid_k=1, unit=P)
    a, _ = release_matrix(repeated(row_a, n), epsilon=eps, source=seeded(21), **kw)
    b, _ = release_matrix(repeated(row_b, n), epsilon=eps, source=seeded(22), **kw)
    assert worst_ratio_pvalue(row_codes(a, -6, 8), row_codes(b, -6, 8), float(eps), 300) > 1e-3
    # power: half the noise scale (as if calibrated for 2 epsilon) is caught
    a2, _ = release_matrix(repeated(row_a, n), epsilon=2 * eps, source=seeded(23), **kw)
    b2, _ = release_matrix(repeated(row_b, n), epsilon=2 * eps, source=seeded(24), **kw)
    assert worst_ratio_pvalue(row_codes(a2, -6, 8), row_codes(b2, -6, 8), float(eps), 300) < 1e-6


def test_rating_unit_neighbours_stay_within_e_to_the_epsilon() -> None:
    n, eps = 300_000, F(1, 2)
    kw = dict(low=0, high=2, grid_k=1, unit=R)
    a, _ = release_matrix(repeated([0.0, np.nan], n), epsilon=eps, source=seeded(31), **kw)
    b, _ = release_matrix(repeated([2.0, np.nan], n), epsilon=eps, source=seeded(32), **kw)
    assert np.isnan(a[:, 1]).all()
    codes = [np.rint(x[:, 0]).astype(np.int64) for x in (a, b)]
    assert worst_ratio_pvalue(*codes, float(eps), 500) > 1e-3
    a2, _ = release_matrix(repeated([0.0, np.nan], n), epsilon=2 * eps, source=seeded(33), **kw)
    b2, _ = release_matrix(repeated([2.0, np.nan], n), epsilon=2 * eps, source=seeded(34), **kw)
    codes = [np.rint(x[:, 0]).astype(np.int64) for x in (a2, b2)]
    assert worst_ratio_pvalue(*codes, float(eps), 500) < 1e-6


# --------------------------------------------------------------------------- aggregate


ratings_matrices = st.integers(1, 6).flatmap(lambda items: st.lists(
    st.lists(st.one_of(st.none(), st.integers(0, 8)), min_size=items, max_size=items),
    min_size=1, max_size=6))


@settings(max_examples=200, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(rows=ratings_matrices, m=st.integers(1, 5), gaussian=st.booleans(),
       centres_seed=st.integers(0, 2**32 - 1), seed=st.integers(0, 2**32 - 1),
       extreme=st.booleans(), high=st.sampled_from([F(4), F(9, 2)]), k=st.sampled_from([2, 64]),
       budget=st.sampled_from([F(1, 3), F(1, 10**6 + 3)]))
def test_one_participant_moves_each_statistic_by_at_most_its_sensitivity(
    rows: list, m: int, gaussian: bool, centres_seed: int, seed: int, extreme: bool,
    high: F, k: int, budget: F,
) -> None:
    # add/remove neighbours: a statistic moves by exactly one participant's contribution.
    # Odd spans (high 9/2 at k 2), fine grids and budgets with large denominators make
    # the samplers' limits force divisors D > 1; `extreme` puts ratings at the range ends.
    values = np.array([[np.nan if v is None else v / 2 for v in r] for r in rows])
    if extreme:
        values = np.where(np.isnan(values), np.nan, np.where(values > 2, float(high), 0.0))
    grid = noise.FixedPointGrid(F(0), high, k)
    plan = plan_aggregate(len(rows), grid, "discrete-gaussian" if gaussian else "discrete-laplace",
                          budget, m, (1, 2, 3, 4))
    kept = bound_contributions(~np.isnan(values), m, seeded(seed))
    assert (kept.sum(axis=1) <= m).all() and not (kept & np.isnan(values)).any()
    units = grid.quantise(np.where(kept, values, 0.0))
    centres = np.random.default_rng(centres_seed).integers(0, grid.span_units + 1, values.shape[1])
    w, s = first_moments(plan, units, kept)
    for row in range(values.shape[0]):
        cov, co = second_moments(plan, units[row], kept[row], centres)
        for name, part in (("weights", w[row]), ("sums", s[row]), ("covariance", cov),
                           ("co_weights", co)):
            stat = plan.stats[name]
            if gaussian:
                assert int((part.astype(object) ** 2).sum()) <= stat.l2_squared
            else:
                assert int(np.abs(part).sum()) <= stat.l1


def test_large_denominators_force_coarser_released_grids() -> None:
    # the hypothesis test above exercises D > 1 (truncation) with these parameters
    grid = noise.FixedPointGrid(F(0), F(9, 2), 64)
    for mech in ("discrete-laplace", "discrete-gaussian"):
        plan = plan_aggregate(6, grid, mech, F(1, 10**6 + 3), 5, (1, 2, 3, 4))
        assert plan.stats["covariance"].divisor > 1
        assert plan.stats["covariance"].step == F(plan.stats["covariance"].divisor, (320 * 64) ** 2)
        for stat in plan.stats.values():  # and every noise parameter fits the exact samplers
            assert stat.noise.numerator <= noise.LAPLACE_MAX_PART
            if mech == "discrete-gaussian":
                assert stat.noise.denominator <= noise.GAUSSIAN_MAX_DENOMINATOR


def test_the_weight_bounds_are_attained() -> None:
    # not vacuous: a one-item participant at the end of the range uses the whole bound
    grid = noise.FixedPointGrid(F(0), F(4), 1)
    plan = plan_aggregate(1, grid, "discrete-laplace", F(1), 4, (1, 1, 1, 1))
    w, s = first_moments(plan, np.array([[4, 0]]), np.array([[True, False]]))
    assert int(w.sum()) == plan.stats["weights"].l1 and int(s.sum()) == plan.stats["sums"].l1
    cov, co = second_moments(plan, np.array([4, 0]), np.array([True, False]), np.array([0, 0]))
    assert int(cov.sum()) == plan.stats["covariance"].l1 and int(co.sum()) == plan.stats["co_weights"].l1


def test_contribution_bound_keeps_a_uniform_subset() -> None:
    rated = np.ones((4000, 6), bool)
    rated[:, 5] = False
    kept = bound_contributions(rated, 2, seeded(41))
    assert (kept.sum(axis=1) == 2).all() and not kept[:, 5].any()
    # every one of the 5 rated items is equally likely to be kept (scipy.stats.chisquare)
    assert stats.chisquare(kept[:, :5].sum(axis=0)).pvalue > 1e-4
    light = np.array([[True, False, True, False, False, False]])
    np.testing.assert_array_equal(bound_contributions(light, 2, seeded(42)), light)


def test_a_heavy_rater_carries_total_weight_one() -> None:
    values = np.full((1, 10), 3.0)  # one participant rated all 10 items; the bound is 3
    rel, g = release_aggregate(values, low=0, high=4, grid_k=1, max_items_per_participant=3,
                               epsilon=10**6, source=seeded(43))
    assert rel.weights.sum() == pytest.approx(1.0, abs=1e-3)
    assert int((rel.weights > 0.1).sum()) == 3
    assert "at most 3 ratings" in g.contribution_bound
    rel, _ = release_aggregate(values, low=0, high=4, grid_k=1, max_items_per_participant=3,
                               rho=10**6, source=seeded(44))
    # Gaussian: L2 norm 1 (weights floor(192 / sqrt 3) / 192, rounded down by < 1/64)
    assert (1 - 1 / 64) ** 2 - 0.01 < (rel.weights**2).sum() < 1.01


def test_aggregate_means_approach_weighted_means_at_large_epsilon() -> None:
    rng = np.random.default_rng(45)
    n_people, n_items = 30, 5
    values = rng.integers(0, 9, (n_people, n_items)) / 2.0
    # each participant rates 1, 2 or 4 items, so weights 1/n are exact on the grid 1/(64*4)
    for row, n in zip(values, rng.choice([1, 2, 4], n_people), strict=True):
        row[rng.permutation(n_items)[n:]] = np.nan
    values[0] = [1.0, 2.0, 3.0, 4.0, np.nan]  # every item rated at least once
    rated = ~np.isnan(values)
    for budget, power in (({"epsilon": 10**6}, 1.0), ({"rho": 10**6}, 0.5)):
        w = rated.sum(axis=1) ** -power  # 1/n for Laplace, 1/sqrt(n) for Gaussian
        expected = [np.average(values[rated[:, j], j], weights=w[rated[:, j]])
                    for j in range(n_items)]
        rel, _ = release_aggregate(values, low=0, high=4, grid_k=2, max_items_per_participant=4,
                                   source=seeded(46), **budget)
        np.testing.assert_allclose(rel.means, expected, atol=2e-3)  # numpy.average
        np.testing.assert_allclose(rel.weights, (rated * w[:, None]).sum(axis=0), atol=2e-3)


def test_aggregate_covariance_approaches_numpy_cov_at_large_epsilon() -> None:
    # complete data, column means exactly on the grid (2), deviations within B = 2
    cols = [[0, 1, 2, 3, 4, 2], [4, 3, 2, 1, 0, 2], [2, 4, 0, 3, 1, 2]]
    values = np.array(cols, dtype=float).T
    rel, _ = release_aggregate(values, low=0, high=4, grid_k=1, max_items_per_participant=3,
                               epsilon=10**6, source=seeded(47))
    np.testing.assert_allclose(rel.means, 2.0, atol=1e-3)
    np.testing.assert_allclose(rel.covariance, np.cov(values.T, bias=True), atol=1e-3)
    assert np.allclose(rel.similarities()[0, 1], -1.0, atol=1e-3)


def test_aggregate_predictions_beat_item_means() -> None:
    rng = np.random.default_rng(48)
    taste = rng.normal(size=(400, 1))
    truth = np.clip(np.rint(2 + 1.5 * taste @ rng.normal(size=(1, 8))), 0, 4)
    train = truth.copy()
    hide = rng.random(truth.shape) < 0.3
    train[hide] = np.nan
    rel, _ = release_aggregate(train, low=0, high=4, grid_k=1, max_items_per_participant=8,
                               epsilon=10**4, source=seeded(49))
    pred = rel.predict(train)
    rmse = math.sqrt(np.mean((pred[hide] - truth[hide]) ** 2))
    baseline = math.sqrt(np.mean((np.broadcast_to(rel.means, truth.shape)[hide] - truth[hide]) ** 2))
    assert rmse < 0.8 * baseline


def test_aggregate_noise_matches_the_reference_distribution() -> None:
    # released minus exact second moments, in released units, against the references
    rng = np.random.default_rng(50)
    n_items = 300  # 45150 upper-triangle entries per statistic
    values = np.full((3, n_items), np.nan)
    values[:, :3] = rng.integers(0, 5, (3, 3))
    grid = noise.FixedPointGrid(F(0), F(4), 1)
    kept = ~np.isnan(values)
    units = grid.quantise(np.nan_to_num(values))
    for budget, moments in (({"epsilon": F(2)}, laplace_moments), ({"rho": F(1, 2)}, gaussian_moments)):
        rel, g = release_aggregate(values, low=0, high=4, grid_k=1, max_items_per_participant=3,
                                   source=seeded(51), **budget)
        comp = {c.name: c for c in g.components}
        centres = grid.quantise(rel.means)
        parts = [second_moments(
            plan_aggregate(3, grid, g.mechanism, F(2) if g.epsilon else F(1, 2), 3, (1, 1, 1, 1)),
            units[i], kept[i], centres) for i in range(3)]
        upper = np.triu_indices(n_items)
        for index, name, released in ((0, "covariance", rel.covariance_sums),
                                      (1, "co_weights", rel.co_weights)):
            exact_sum = sum(p[index] for p in parts)
            diff = np.rint(released[upper] / float(comp[name].step) - exact_sum).astype(np.int64)
            assert abs(variance_z(diff, moments(comp[name].noise))) < 4.5, name
            wrong = moments(comp[name].noise * F(11, 10))  # power: 10% off is told apart
            assert abs(variance_z(diff, wrong)) > 6, name


def test_budget_split_sums_to_the_request() -> None:
    values = np.array([[1.0, np.nan, 3.0], [2.0, 2.0, np.nan]])
    _, g = release_aggregate(values, low=0, high=4, grid_k=2, max_items_per_participant=2,
                             epsilon=0.3, split=(1, 2, 3, 4), source=seeded(52))
    parts = [c.epsilon for c in g.components]
    assert sum(parts) == F(3, 10) and g.epsilon == 2 * F(3, 10)  # replace-one: twice add/remove
    assert parts == [F(3, 100), F(6, 100), F(9, 100), F(12, 100)]
    _, g = release_aggregate(values, low=0, high=4, grid_k=2, max_items_per_participant=2,
                             rho=F(1, 7), source=seeded(53))
    assert sum(c.rho for c in g.components) == F(1, 7) and all(c.epsilon is None for c in g.components)
    assert "Budget split" in g.notes[0] and g.neighbours.startswith("replace-one")


# --------------------------------------------------------------------------- accountant

fractions = st.builds(F, st.integers(1, 1000), st.integers(1, 1000))


@given(eps=fractions, rho=fractions, n=st.integers(1, 20))
def test_spending_twice_costs_twice(eps: F, rho: F, n: int) -> None:
    cost = Cost(eps, rho)
    twice = Ledger().spend(cost).spend(cost)
    assert twice == Ledger(2 * eps, 2 * rho, releases=2)
    ledger = Ledger()
    for _ in range(n):
        ledger = ledger.spend(cost)
    assert (ledger.epsilon, ledger.rho, ledger.releases) == (n * eps, n * rho, n)
    budget = Budget(100 * eps)
    pure = Ledger().spend(Cost(eps)).spend(Cost(eps))
    assert remaining_epsilon(pure, budget) == 98 * eps


def fits(ledgers: dict[str, Ledger], cost: Cost | dict[str, Cost], budget: Budget) -> dict[str, bool]:
    """The per-participant verdict exactly as the product's ledger computes it
    (`vault.services.budget.affordable`: does the ledger after this spend stay within?)."""
    return {pid: within(led.spend(cost[pid] if isinstance(cost, dict) else cost), budget)
            for pid, led in ledgers.items()}


@given(budget=fractions, costs=st.lists(fractions, max_size=30))
def test_spending_never_goes_below_zero(budget: F, costs: list[F]) -> None:
    ledger, left = Ledger(), budget
    for c in costs:
        fits_now = fits({"p1": ledger}, Cost(c), Budget(budget))["p1"]
        assert fits_now == (c <= left)  # refused exactly when it would overspend
        if fits_now:
            ledger, left = ledger.spend(Cost(c)), left - c
        assert within(ledger, Budget(budget))  # an included participant stays within
        assert remaining_epsilon(ledger, Budget(budget)) == left >= 0


def test_exact_arithmetic_a_tenth_ten_times_is_one() -> None:
    assert exact(0.1) == F(1, 10) and exact(np.float64(0.1)) == F(1, 10)
    ledger = Ledger()
    for _ in range(10):
        assert fits({"p": ledger}, Cost(0.1), Budget(1.0)) == {"p": True}
        ledger = ledger.spend(Cost(0.1))
    assert ledger.epsilon == 1
    assert within(ledger, Budget(1.0)) and remaining_epsilon(ledger, Budget(1)) == 0
    assert fits({"p": ledger}, Cost(F(1, 10**30)), Budget(1)) == {"p": False}  # exactly full
    assert sum([0.1] * 10) != 1.0  # what floats would have done


def test_who_fits_a_release() -> None:
    budget = Budget(1)
    ledgers = {"a": Ledger(F(1, 2)), "b": Ledger(F(9, 10)), "c": Ledger(), "d": Ledger(F(1, 2))}
    assert fits(ledgers, Cost(F(1, 2)), budget) == {"a": True, "b": False, "c": True, "d": True}
    assert all(fits(ledgers, Cost(F(1, 10)), budget).values())
    # per-participant costs (rating unit: n ratings cost n times)
    per = {"a": Cost(F(1, 10)), "b": Cost(F(2, 10)), "c": Cost(F(3, 10)), "d": Cost(F(6, 10))}
    assert fits(ledgers, per, budget) == {"a": True, "b": False, "c": True, "d": False}
    # whether the refused are excluded or the whole release refused is the purpose's rule,
    # decided by vault.policy.decide (tests/policy: test_budget_exclude_and_refuse)


def test_same_request_twice_spends_twice() -> None:
    values = np.array([[1.0, 2.0], [3.0, np.nan]])
    ledgers = {"p1": Ledger(), "p2": Ledger()}
    budget = Budget(F(1))
    for _ in range(2):
        _, g = release_matrix(values, low=0, high=4, grid_k=1, epsilon=F(2, 5), source=seeded(60))
        assert all(fits(ledgers, g.cost, budget).values())
        ledgers = {pid: led.spend(g.cost) for pid, led in ledgers.items()}
    assert all(lg.epsilon == F(4, 5) and lg.releases == 2 for lg in ledgers.values())
    assert not any(fits(ledgers, g.cost, budget).values())  # a third would exceed 1
    # rating unit: a participant's cost is n ratings times the per-rating epsilon
    _, gr = release_matrix(values, low=0, high=4, grid_k=1, unit=R, epsilon=F(1, 10), source=seeded(61))
    assert gr.cost_for(2) == Cost(F(1, 5)) and g.cost_for(2) == g.cost


def test_equal_amounts_are_equal_keys() -> None:
    # the ledger memoises by value: equal costs, budgets and ledgers must be one key, and
    # different ones never
    assert Cost(0.1) == Cost(F(1, 10)) and hash(Cost(0.1)) == hash(Cost(F(1, 10)))
    assert Ledger(F(1, 2), 0, 1) == Ledger(0.5, F(0), 1) and hash(Ledger(0.5, 0, 1)) == hash(
        Ledger(F(1, 2), 0, 1))
    assert Budget(3, F(1, 10**6)) == Budget(F(3), 1e-6)
    memo = {(Ledger(F(1, 2)), Cost(F(1, 2)), Budget(1)): True}
    assert memo[(Ledger(0.5), Cost(0.5), Budget(1.0))] is True
    assert (Ledger(F(1, 2), releases=1), Cost(F(1, 2)), Budget(1)) not in memo
    assert (Ledger(F(1, 2)), Cost(rho=F(1, 2)), Budget(1)) not in memo


@given(rho=fractions, delta_exp=st.integers(2, 12), eps=st.integers(0, 20))
def test_mixed_ledger_matches_the_conversion_formula(rho: F, delta_exp: int, eps: int) -> None:
    rho = rho / 100
    delta = F(1, 10**delta_exp)
    # Bun and Steinke 2016, Prop. 1.3 (from memory), in floating point
    formula = eps + float(rho) + 2 * math.sqrt(float(rho) * math.log(1 / float(delta)))
    ledger = Ledger(F(eps), rho)
    bound = spent_epsilon(ledger, delta)
    assert formula * (1 - 1e-12) <= float(bound) <= formula * (1 + 1e-12)
    assert within(ledger, Budget(bound, delta))  # exactly at the bound: still within
    assert not within(ledger, Budget(F(formula) * (1 - F(1, 10**9)), delta))
    assert not within(ledger, Budget(bound))  # rho spent, delta = 0: no (eps, 0) budget holds


def test_bad_inputs_are_refused_without_values_in_messages() -> None:
    good = np.array([[1.0, 2.0]])
    calls: list[Callable[[], object]] = [
        lambda: release_matrix(good, low=0, high=4, grid_k=1),  # no budget
        lambda: release_matrix(good, low=0, high=4, grid_k=1, epsilon=1, rho=1),
        lambda: release_matrix(good, low=0, high=4, grid_k=1, epsilon=1, mechanism="discrete-gaussian"),
        lambda: release_matrix(good, low=0, high=4, grid_k=1, epsilon=-1),
        lambda: release_matrix(good, low=4, high=0, grid_k=1, epsilon=1),
        lambda: release_matrix(good, low=0, high=4, grid_k=1, epsilon=float("nan")),
        lambda: release_matrix(np.array([[7.25, np.inf]]), low=0, high=4, grid_k=1, epsilon=1),
        lambda: release_matrix(np.array([7.25, 1.0]), low=0, high=4, grid_k=1, epsilon=1),
        lambda: release_matrix(np.array([["x"]]), low=0, high=4, grid_k=1, epsilon=1),
        lambda: release_matrix(good, low=0, high=4, grid_k=1, unit="session", epsilon=1),  # type: ignore[arg-type]
        lambda: release_aggregate(good, low=0, high=4, grid_k=1, max_items_per_participant=0, epsilon=1),
        lambda: release_aggregate(good, low=0, high=4, grid_k=1, max_items_per_participant=2,
                                  epsilon=1, split=(1, 1, 1)),
        lambda: release_aggregate(good, low=0, high=4, grid_k=1, max_items_per_participant=2,
                                  epsilon=1, item_ids=["a"]),
        lambda: Cost(-1),
        lambda: Budget(0),
        lambda: zcdp_epsilon(1, 0),
        lambda: exact(Decimal("sNaN")),
        lambda: exact(True),
        lambda: release_aggregate(good, low=0, high=4, grid_k=2**40, max_items_per_participant=2,
                                  epsilon=1),  # the integer grid would overflow
        lambda: release_aggregate(good, low=0, high=4, grid_k=1, max_items_per_participant=2,
                                  epsilon=F(1, 2**50)),  # beyond the exact samplers
        lambda: release_matrix(good, low=0, high=4, grid_k=1, rho=F(1, 3), delta=1),
    ]
    for call in calls:
        with pytest.raises((VaultError, ValueError)) as err:
            call()
        assert isinstance(err.value, VaultError), type(err.value)  # ours, never a bare ValueError
        assert "7.25" not in str(err.value)
    with pytest.raises(InvalidInput):
        release_matrix(np.array([[7.25, np.inf]]), low=0, high=4, grid_k=1, epsilon=1)


def test_the_real_csprng_is_the_default() -> None:
    values = np.array([[1.0, 2.0, np.nan]])
    a, _ = release_matrix(values, low=0, high=4, grid_k=4, epsilon=1)
    b, _ = release_matrix(values, low=0, high=4, grid_k=4, epsilon=1)
    assert not np.array_equal(a, b)  # equal by chance with probability < 1e-6
    rel, _ = release_aggregate(values, low=0, high=4, grid_k=1, max_items_per_participant=2, rho=1)
    assert rel.covariance.shape == (3, 3) and not rel.means.flags.writeable


def test_guarantee_manifest_is_plain_json() -> None:
    import json

    _, g = release_matrix(np.array([[1.0, np.nan]]), low=0, high=4, grid_k=2, rho=F(1, 8),
                          source=seeded(70))
    d = json.loads(json.dumps(g.as_dict()))
    assert d["privacy_unit"] == "participant" and d["rho"] == "1/8" and d["epsilon"] is None
    assert d["components"][0]["noise_sigma2"] == "512"  # 2 items * 8^2 / (2 * 1/8)
    assert float(d["approx_dp"]["epsilon_upper_bound"]) >= 1 / 8
    assert any("ethics board" in s for s in d["not_protected"])


# --------------------------------------------------------------------------- OpenDP as reference


@pytest.fixture(scope="module")
def dp() -> ModuleType:
    prelude = pytest.importorskip("opendp.prelude")
    prelude.enable_features("contrib")
    return prelude


@pytest.mark.parametrize(("unit", "n_items", "epsilon"), [(P, 3, F(1, 2)), (P, 7, F(2)), (R, 4, F(1, 3))])
def test_matrix_laplace_calibration_matches_opendp(dp: ModuleType, unit: PrivacyUnit,
                                                   n_items: int, epsilon: F) -> None:
    values = np.full((2, n_items), 1.0)
    _, g = release_matrix(values, low=0, high=5, grid_k=2, unit=unit, epsilon=epsilon, source=seeded(80))
    c = g.components[0]
    # OpenDP make_laplace on integer vectors with the L1 distance: its map at our sensitivity
    meas = dp.m.make_laplace(dp.vector_domain(dp.atom_domain(T="i64")), dp.l1_distance(T="i64"),
                             scale=float(c.noise))
    assert meas.map(c.l1_sensitivity) == pytest.approx(float(epsilon), rel=1e-9)


@pytest.mark.parametrize(("unit", "n_items", "rho"), [(P, 4, F(1, 2)), (P, 9, F(1, 10)), (R, 5, F(2))])
def test_matrix_gaussian_calibration_matches_opendp(dp: ModuleType, unit: PrivacyUnit,
                                                    n_items: int, rho: F) -> None:
    values = np.full((2, n_items), 1.0)
    _, g = release_matrix(values, low=0, high=5, grid_k=2, unit=unit, rho=rho, source=seeded(81))
    c = g.components[0]
    l2 = math.isqrt(c.l2_sensitivity_squared)
    assert l2 * l2 == c.l2_sensitivity_squared  # n_items chosen square for the participant unit
    meas = dp.m.make_gaussian(dp.vector_domain(dp.atom_domain(T="i64")), dp.l2_distance(T="i64"),
                              scale=math.sqrt(c.noise))
    assert meas.map(l2) == pytest.approx(float(rho), rel=1e-9)


def test_aggregate_components_and_composition_match_opendp(dp: ModuleType) -> None:
    values = np.array([[1.0, 2.0, np.nan], [np.nan, 3.0, 4.0]])
    for budget in ({"epsilon": F(3, 4)}, {"rho": F(1, 5)}):
        _, g = release_aggregate(values, low=0, high=4, grid_k=2, max_items_per_participant=2,
                                 split=(1, 2, 2, 1), source=seeded(82), **budget)
        normalised = []
        for c in g.components:
            if c.l1_sensitivity is not None:
                meas = dp.m.make_laplace(dp.atom_domain(T="i64"), dp.absolute_distance(T="i64"),
                                         float(c.noise))
                assert meas.map(c.l1_sensitivity) == pytest.approx(float(c.epsilon), rel=1e-9)
                scale = float(c.noise / c.l1_sensitivity)  # the same mechanism at sensitivity 1
                normalised.append(dp.m.make_laplace(dp.atom_domain(T="f64", nan=False),
                                                    dp.absolute_distance(T="f64"), scale))
            else:  # L2 sensitivity may be irrational: the float-domain map has the same formula
                meas = dp.m.make_gaussian(dp.vector_domain(dp.atom_domain(T="f64", nan=False)),
                                          dp.l2_distance(T="f64"), scale=math.sqrt(c.noise))
                got = meas.map(math.sqrt(c.l2_sensitivity_squared))
                assert got == pytest.approx(float(c.rho), rel=1e-9)
                scale = math.sqrt(c.noise / c.l2_sensitivity_squared)
                normalised.append(dp.m.make_gaussian(dp.atom_domain(T="f64", nan=False),
                                                     dp.absolute_distance(T="f64"), scale))
        # OpenDP's composition of the four adds epsilons (rho) for add/remove neighbours (a
        # contribution of sensitivity 1), as our components do
        total = dp.c.make_composition(normalised).map(1.0)
        assert total == pytest.approx(float(sum((c.epsilon or c.rho) for c in g.components)),
                                      rel=1e-9)
        # replace-one (the cohort size is public) moves each contribution by up to twice that:
        # OpenDP's map at distance 2 gives 2 epsilon (Laplace) or 4 rho (zCDP), what is stated
        swapped = dp.c.make_composition(normalised).map(2.0)
        stated = g.epsilon if g.epsilon is not None else g.rho
        assert swapped == pytest.approx(float(stated), rel=1e-9)
        assert "replace-one" in g.neighbours


@pytest.mark.parametrize(("rho", "delta"),
                         [(F(1, 10), F(1, 10**6)), (F(2), F(1, 10**9)), (F(1, 1000), F(1, 100))])
def test_zcdp_conversion_is_never_below_opendps(dp: ModuleType, rho: F, delta: F) -> None:
    sigma = 1 / math.sqrt(2 * float(rho))  # rho-zCDP at sensitivity 1
    meas = dp.m.make_gaussian(dp.atom_domain(T="i64"), dp.absolute_distance(T="i64"), sigma)
    assert meas.map(1) == pytest.approx(float(rho), rel=1e-9)
    theirs = dp.c.make_zCDP_to_approxDP(meas).map(1).epsilon(float(delta))
    ours = float(zcdp_epsilon(rho, delta))
    assert theirs <= ours < 2 * theirs + 1  # a valid bound: not tighter than the optimal one
    # and OpenDP's composition of zCDP measurements adds rho, as our ledger does
    both = dp.c.make_composition([meas, meas]).map(1)
    assert both == pytest.approx(float(Ledger().spend(Cost(0, rho)).spend(Cost(0, rho)).rho), rel=1e-9)

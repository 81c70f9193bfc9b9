"""vault.privacy.recommend and vault.formats.plot against outside references.

Outside sources:
- scipy.stats.norm.fit: the maximum-likelihood normal fit (loc = mean,
  scale = std with ddof=0) the random baseline must match.
- RMSE from its textbook definition, computed with the `math` module over
  Python floats (no numpy, no sklearn).
- The expected squared error of a N(loc, scale^2) guess against t,
  scale^2 + (loc - t)^2: a fact of the trade (common practice, no source).
- The PNG signature and IHDR layout from the PNG specification (W3C PNG /
  RFC 2083; byte layout from memory), and two independent PNG readers:
  matplotlib.image.imread and Pillow.
- Exactly-low-rank matrices and the demo study's realistic ratings
  (demo_data.study.build_study) as inputs.

TEST-ONLY noise: `standin_laplace` below adds continuous float Laplace noise
per cell from numpy. It is NOT a differential-privacy mechanism (float noise,
per-rating sensitivity, no accounting); the real noise comes from vault.privacy.noise.
"""

from __future__ import annotations

import json
import math
import struct
import subprocess
import sys
from collections.abc import Callable
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy import stats

from demo_data.study import build_study
from vault.errors import InvalidInput, UsageError, VaultError
from vault.formats.plot import plot_utility
from vault.privacy.recommend import (
    fit_normal_mle,
    fit_svd,
    random_baseline,
    rmse,
    train_test_split,
    utility_curve,
)

RANGE = (0.0, 3.0)
SEED = 20260302
PLANTED = 2.7182818  # a distinctive value that must never surface in messages or reports
FEW = settings(max_examples=5, deadline=None, suppress_health_check=[HealthCheck.too_slow])


def standin_laplace(seed: int) -> Callable[[np.ndarray, float], np.ndarray]:
    """TEST-ONLY stand-in for the DP layer: Laplace(scale = range width / epsilon) per cell."""
    gen = np.random.default_rng(seed)
    width = RANGE[1] - RANGE[0]

    def noise(matrix: np.ndarray, epsilon: float) -> np.ndarray:
        return matrix + gen.laplace(0.0, width / epsilon, size=matrix.shape)

    return noise


def demo_ratings(n: int = 30, seed: int = SEED) -> np.ndarray:
    return build_study(n, seed).ratings.astype(float)


def low_rank_matrix(seed: int, observed: float, n: int = 40, m: int = 60, rank: int = 3) -> np.ndarray:
    """mean + biases + rank-`rank` product (exactly the model class), a fraction observed."""
    gen = np.random.default_rng(seed)
    full = (
        1.5
        + gen.normal(0, 0.3, size=(n, 1))
        + gen.normal(0, 0.3, size=(1, m))
        + gen.normal(0, 0.5, size=(n, rank)) @ gen.normal(0, 1.0, size=(rank, m))
    )
    return np.where(gen.random((n, m)) < observed, full, np.nan)


def curve(truth: np.ndarray, noise, *, seed: int = 0, epsilons=(0.01, 1.0, 1000.0), repeats: int = 2):
    return utility_curve(
        truth, epsilons, noise, rng=np.random.default_rng(seed), value_range=RANGE,
        rank=3, test_fraction=0.2, repeats=repeats, baseline_draws=10,
    )


def reference_rmse(pred: np.ndarray, truth: np.ndarray, mask: np.ndarray) -> float:
    """Textbook RMSE with Python floats and `math` only."""
    pairs = [
        (float(p), float(t))
        for p, t, keep in zip(pred.ravel().tolist(), truth.ravel().tolist(), mask.ravel().tolist(),
                              strict=True)
        if keep
    ]
    return math.sqrt(math.fsum((p - t) ** 2 for p, t in pairs) / len(pairs))


# ------------------------------------------------------------------ the split


@FEW
@given(seed=st.integers(0, 2**32 - 1), observed=st.floats(0.05, 1.0), fraction=st.floats(0.05, 0.6))
def test_split_partitions_observed_cells(seed: int, observed: float, fraction: float) -> None:
    matrix = low_rank_matrix(seed, observed, n=25, m=30)
    before = matrix.copy()
    seen = ~np.isnan(matrix)
    per_row = seen.sum(axis=1)
    target = np.minimum(np.floor(fraction * per_row + 0.5), np.maximum(per_row - 1, 0))
    rng = np.random.default_rng(seed)
    if target.sum() == 0:  # nothing can be held out: refused, not an empty test set
        with pytest.raises(InvalidInput):
            train_test_split(matrix, test_fraction=fraction, rng=rng)
        return
    train, test = train_test_split(matrix, test_fraction=fraction, rng=rng)
    kept = ~np.isnan(train)
    np.testing.assert_array_equal(matrix, before)  # input untouched
    assert not (kept & test).any()
    np.testing.assert_array_equal(kept | test, seen)
    np.testing.assert_array_equal(train[kept], matrix[kept])
    # every row with a rating keeps one in train; so does every column
    assert (kept.any(axis=1) == seen.any(axis=1)).all()
    assert (kept.any(axis=0) == seen.any(axis=0)).all()
    # per row, about `fraction` held out (column repairs may return a few cells)
    assert (test.sum(axis=1) <= target).all()
    assert test.sum() >= target.sum() - seen.shape[1]


def test_split_refuses_bad_input() -> None:
    with pytest.raises(UsageError):
        train_test_split(demo_ratings(), test_fraction=1.0, rng=np.random.default_rng(0))
    with pytest.raises(InvalidInput):
        train_test_split(np.full((3, 1), 1.0), test_fraction=0.5, rng=np.random.default_rng(0))
    with pytest.raises(InvalidInput):
        train_test_split(np.ones(5), test_fraction=0.5, rng=np.random.default_rng(0))


# ----------------------------------------------------------- the recommender


@FEW
@given(seed=st.integers(0, 2**32 - 1), observed=st.floats(0.3, 0.5))
def test_svd_recovers_low_rank_far_better_than_random(seed: int, observed: float) -> None:
    truth = low_rank_matrix(seed, observed)
    rng = np.random.default_rng(seed)
    train, test = train_test_split(truth, test_fraction=0.2, rng=rng)
    model = fit_svd(train, rank=3, n_iter=500, reg=0.01)
    fitted = rmse(model.predict(), truth, test)
    baseline = random_baseline(train, test, truth, rng, n_draws=10)
    assert fitted < 0.3 * baseline.rmse, (fitted, baseline.rmse)


def test_svd_clips_and_is_deterministic() -> None:
    truth = demo_ratings()
    train, _ = train_test_split(truth, test_fraction=0.2, rng=np.random.default_rng(3))
    # a stretched copy forces raw predictions outside the range
    stretched = (train - 1.5) * 4 + 1.5
    model = fit_svd(stretched, rank=3, value_range=RANGE)
    pred = model.predict()
    assert pred.shape == truth.shape
    assert pred.min() >= RANGE[0] and pred.max() <= RANGE[1]
    assert pred.min() == RANGE[0] and pred.max() == RANGE[1]  # clipping actually happened
    np.testing.assert_array_equal(pred, fit_svd(stretched, rank=3, value_range=RANGE).predict())
    copy = train.copy()
    fit_svd(train, rank=3)
    np.testing.assert_array_equal(train, copy)  # input untouched


def test_svd_fits_complete_low_rank_data_exactly() -> None:
    truth = low_rank_matrix(7, 1.0)
    model = fit_svd(truth, rank=3, n_iter=500, reg=0.0)
    assert rmse(model.predict(), truth, np.ones(truth.shape, bool)) < 1e-6


def test_svd_beats_random_on_the_demo_ratings() -> None:
    truth = demo_ratings()
    rng = np.random.default_rng(11)
    train, test = train_test_split(truth, test_fraction=0.2, rng=rng)
    fitted = rmse(fit_svd(train, rank=3, value_range=RANGE).predict(), truth, test)
    assert fitted < 0.6 * random_baseline(train, test, truth, rng).rmse


@pytest.mark.parametrize(
    ("kwargs", "error"),
    [({"rank": 0}, UsageError), ({"rank": 61}, UsageError), ({"rank": 3, "n_iter": 0}, UsageError),
     ({"rank": 3, "reg": -1.0}, UsageError), ({"rank": 3, "value_range": (3.0, 0.0)}, UsageError)],
)
def test_svd_refuses_bad_parameters(kwargs: dict, error: type[VaultError]) -> None:
    with pytest.raises(error):
        fit_svd(demo_ratings(), **kwargs)


def test_errors_carry_no_values() -> None:
    bad = demo_ratings()
    bad[0, 0] = PLANTED
    bad[1, 1] = np.inf
    for call in (lambda: fit_svd(bad, rank=3), lambda: fit_svd(np.full((4, 4), np.nan), rank=1)):
        with pytest.raises(InvalidInput) as err:
            call()
        assert "2.71" not in str(err.value) and "inf" not in str(err.value).replace("infinite", "")


# ------------------------------------------------------------ the evaluation


@FEW
@given(seed=st.integers(0, 2**32 - 1))
def test_rmse_matches_the_textbook_formula(seed: int) -> None:
    gen = np.random.default_rng(seed)
    truth, pred = gen.normal(size=(2, 13, 17))
    mask = gen.random((13, 17)) < 0.4
    mask[0, 0] = True
    assert rmse(pred, truth, mask) == pytest.approx(reference_rmse(pred, truth, mask), rel=1e-12)


def test_rmse_refuses_empty_mismatched_or_missing() -> None:
    a = np.zeros((3, 4))
    with pytest.raises(InvalidInput):
        rmse(a, a, np.zeros((3, 4), bool))
    with pytest.raises(InvalidInput):
        rmse(a, np.zeros((4, 3)), np.ones((4, 3), bool))
    with pytest.raises(InvalidInput):
        rmse(np.full((3, 4), np.nan), a, np.ones((3, 4), bool))
    with pytest.raises(InvalidInput):
        rmse(a, a, np.ones((3, 4)))  # not boolean


@FEW
@given(seed=st.integers(0, 2**32 - 1), observed=st.floats(0.2, 1.0))
def test_baseline_fit_equals_scipy_norm_fit(seed: int, observed: float) -> None:
    truth = low_rank_matrix(seed, observed, n=24, m=60)
    train, test = train_test_split(truth, test_fraction=0.2, rng=np.random.default_rng(seed))
    # scipy.stats.norm.fit is the maximum-likelihood fit (reference)
    loc, scale = stats.norm.fit(train[~np.isnan(train)])
    assert fit_normal_mle(train) == pytest.approx((loc, scale), rel=1e-10)
    base = random_baseline(train, test, truth, np.random.default_rng(seed), n_draws=3)
    assert (base.loc, base.scale) == pytest.approx((loc, scale), rel=1e-10)


def test_baseline_rmse_matches_its_expectation() -> None:
    truth = demo_ratings()
    train, test = train_test_split(truth, test_fraction=0.3, rng=np.random.default_rng(5))
    base = random_baseline(train, test, truth, np.random.default_rng(6), n_draws=400)
    # E[(X - t)^2] = scale^2 + (loc - t)^2 for X ~ N(loc, scale^2) (common practice, no source)
    expected_mse = base.scale**2 + np.mean((base.loc - truth[test]) ** 2)
    assert base.rmse == pytest.approx(math.sqrt(expected_mse), rel=0.01)
    assert 0 < base.rmse_std < 0.2 * base.rmse
    assert base.n_draws == 400


def test_baseline_is_not_the_model() -> None:
    """A broken baseline that predicts the mean would score sqrt(scale^2) lower; ours adds the draw spread."""
    truth = demo_ratings()
    train, test = train_test_split(truth, test_fraction=0.3, rng=np.random.default_rng(5))
    base = random_baseline(train, test, truth, np.random.default_rng(6), n_draws=50)
    mean_only = rmse(np.full(truth.shape, base.loc), truth, test)
    assert base.rmse > 1.25 * mean_only


# ---------------------------------------------------------- the utility curve


def test_curve_worse_at_small_epsilon_and_approaches_no_noise() -> None:
    report = curve(demo_ratings(), standin_laplace(1), epsilons=(0.01, 0.3, 3.0, 1000.0))
    small, *_, large = report.noisy_rmse
    assert small > 1.5 * report.no_noise_rmse
    assert small > large + 0.3
    assert large == pytest.approx(report.no_noise_rmse, abs=0.02)
    # roughly monotone: each step down in noise does not make things clearly worse
    assert all(b <= a + 0.05 for a, b in zip(report.noisy_rmse, report.noisy_rmse[1:], strict=False))
    assert report.no_noise_rmse < 0.6 * report.random_rmse


def test_noise_never_sees_held_out_cells_and_only_training_cells_count() -> None:
    truth = demo_ratings()
    seen: list[np.ndarray] = []

    def fill_missing_with_top(matrix: np.ndarray, epsilon: float) -> np.ndarray:
        seen.append(~np.isnan(matrix))
        return np.where(np.isnan(matrix), RANGE[1], matrix)  # garbage only in non-training cells

    report = curve(truth, fill_missing_with_top, seed=9)
    # the same rng seed reproduces the split utility_curve drew first
    train, _ = train_test_split(truth, test_fraction=0.2, rng=np.random.default_rng(9))
    assert len(seen) == 3 * 2  # epsilons x repeats
    for mask in seen:
        np.testing.assert_array_equal(mask, ~np.isnan(train))
    assert report.noisy_rmse == pytest.approx([report.no_noise_rmse] * 3, abs=1e-12)


def test_noised_values_are_clipped_to_the_range() -> None:
    truth = demo_ratings()
    even = np.zeros(truth.shape, bool)
    even[:, ::2] = True

    def push_even_columns_up(matrix: np.ndarray, epsilon: float) -> np.ndarray:
        return np.where(even, matrix + 1000.0, matrix)

    report = curve(truth, push_even_columns_up, seed=4, repeats=1)
    train, test = train_test_split(truth, test_fraction=0.2, rng=np.random.default_rng(4))
    # reference: the same training matrix clipped by hand (even columns all at the top)
    clipped = np.where(even & ~np.isnan(train), RANGE[1], train)
    expected = rmse(fit_svd(clipped, rank=3, value_range=RANGE).predict(), truth, test)
    assert report.noisy_rmse == pytest.approx([expected] * 3, rel=1e-12)
    assert expected > report.no_noise_rmse + 0.2


@pytest.mark.parametrize(
    "noise",
    [lambda m, e: m[:, :-1], lambda m, e: m * np.nan, lambda m, e: m + np.inf],
    ids=["wrong-shape", "nan", "inf"],
)
def test_curve_refuses_a_broken_noise_function(noise) -> None:
    with pytest.raises(InvalidInput):
        curve(demo_ratings(), noise)


def test_curve_refuses_bad_arguments() -> None:
    ratings = demo_ratings()
    with pytest.raises(UsageError):
        curve(ratings, standin_laplace(0), epsilons=())
    with pytest.raises(UsageError):
        curve(ratings, standin_laplace(0), epsilons=(1.0, 0.0))
    with pytest.raises(UsageError):
        curve(ratings, standin_laplace(0), epsilons=(1.0, math.inf))
    out_of_range = ratings.copy()
    out_of_range[2, 2] = PLANTED + 1
    with pytest.raises(InvalidInput) as err:
        curve(out_of_range, standin_laplace(0))
    assert "3.71" not in str(err.value)


def test_report_is_aggregate_only_and_json_serialisable() -> None:
    small = curve(demo_ratings(24), standin_laplace(2)).as_dict()
    planted = demo_ratings(40)
    planted[5] = np.clip(planted[5] + 0.0123456, *RANGE)  # distinctive per-participant values
    large_report = curve(planted, standin_laplace(2))
    large = large_report.as_dict()
    text = json.dumps(large, allow_nan=False)
    assert json.loads(text) == large
    # same shape whatever the cohort size: nothing scales with participants or items
    assert small.keys() == large.keys()
    for key in large:
        if isinstance(large[key], list):
            assert len(large[key]) == len(small[key]) <= 3
        else:
            assert isinstance(large[key], (int, float, str))
    assert "0123456" not in text and "0123456" not in large_report.table()
    numbers = [v for v in large.values() if isinstance(v, (int, float))]
    numbers += [x for v in large.values() if isinstance(v, list) for x in v]
    assert len(numbers) <= 20


def test_table_lists_every_epsilon_and_the_baselines() -> None:
    report = curve(demo_ratings(), standin_laplace(3))
    table = report.table()
    assert f"{report.no_noise_rmse:.4f}" in table and f"{report.random_rmse:.4f}" in table
    for value in report.noisy_rmse:
        assert f"{value:.4f}" in table
    assert "ethics board" in table


def test_curve_is_deterministic_with_fixed_randomness() -> None:
    first = curve(demo_ratings(), standin_laplace(8), seed=8).as_dict()
    again = curve(demo_ratings(), standin_laplace(8), seed=8).as_dict()
    other = curve(demo_ratings(), standin_laplace(8), seed=81).as_dict()
    assert first == again
    assert first != other


# ------------------------------------------------------------------ the plot


def test_plot_writes_a_valid_png(tmp_path: Path) -> None:
    import matplotlib.image
    from PIL import Image

    report = curve(demo_ratings(), standin_laplace(4), epsilons=(0.05, 0.5, 5.0, 50.0))
    out = plot_utility(report, tmp_path / "utility.png")
    data = out.read_bytes()
    # PNG signature and IHDR width/height, big-endian after the 8-byte signature (PNG spec)
    assert data[:8] == b"\x89PNG\r\n\x1a\n"
    assert data[12:16] == b"IHDR"
    assert struct.unpack(">II", data[16:24]) == (800, 500)
    image = matplotlib.image.imread(out)  # independent reader 1
    assert image.shape[:2] == (500, 800)
    assert image.std() > 0.05  # not blank
    with Image.open(out) as pil:  # independent reader 2 (Pillow)
        pil.verify()
    with Image.open(out) as pil:
        assert pil.size == (800, 500) and pil.format == "PNG"


def test_plot_refuses_other_formats(tmp_path: Path) -> None:
    report = curve(demo_ratings(), standin_laplace(4))
    with pytest.raises(UsageError):
        plot_utility(report, tmp_path / "utility.svg")
    assert not list(tmp_path.iterdir())


def test_plot_leaves_global_matplotlib_state_alone(tmp_path: Path) -> None:
    """In a fresh interpreter: no pyplot import, no backend switch, rcParams untouched."""
    script = """
import sys, numpy as np, matplotlib
from pathlib import Path
from vault.privacy.recommend import UtilityReport
from vault.formats.plot import plot_utility
# raw values via _get: get_backend() or a plain copy would resolve the backend via pyplot
def raw():
    return {k: matplotlib.rcParams._get(k) for k in matplotlib.rcParams}
rc = raw()
r = UtilityReport((0.1, 1.0), (1.2, 0.7), (0.1, 0.0), 0.6, 1.3, 3, 0.2, 1, 5, (0.0, 3.0))
plot_utility(r, Path(sys.argv[1]))
assert "matplotlib.pyplot" not in sys.modules
assert raw() == rc
"""
    root = Path(__file__).resolve().parents[2]
    done = subprocess.run([sys.executable, "-c", script, str(tmp_path / "p.png")], cwd=root,
                          capture_output=True, text=True, timeout=60)
    assert done.returncode == 0, done.stderr
    assert (tmp_path / "p.png").stat().st_size > 1000

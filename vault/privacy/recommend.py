"""A plain recommender and the privacy-utility curve of a noised export.

Pure numpy, no I/O, no clock; every random choice comes from a generator the
caller passes in. Matrices are (participants x items) floats with NaN for
"not rated".

The recommender (`fit_svd`) is matrix completion: global mean + participant and
item biases + a rank-capped low-rank residual, fitted by iterative soft-impute
(each step fills the missing cells with the current estimate, takes a truncated
SVD and soft-thresholds its singular values; Mazumder, Hastie and Tibshirani
2010, cited from memory), warm-started along a decreasing threshold path as
they suggest. Biases are re-estimated inside the loop, so the bias terms and
the low-rank part are fitted jointly.

Why this one and no item-kNN: the demo preferences are low rank by design (a
taste vector over three dish attributes plus biases), the matrices are tiny
(24-40 x 60, one SVD is microseconds), and kNN would have to estimate item
similarities from noisy co-ratings of only a few dozen people, which amplifies
exactly the noise the curve is meant to measure. Low-rank truncation instead
averages noise over all participants.

`utility_curve` answers "how much does the noise cost the recommender?": one
held-out split of the *true* ratings; for each epsilon the training part is
passed through the caller's noise function (the DP layer), clipped to the
value range, and a model is trained on it; every model is scored by RMSE on
the same held-out true ratings, next to the no-noise model and a random
baseline. The report keeps only aggregate RMSE figures.

Caution: those RMSE figures are computed from raw (un-noised) held-out ratings
and are NOT themselves differentially private. They are aggregates, but
whether to release them, and to whom, is for the local ethics board, the
data-protection officer and the law to decide.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass

import numpy as np

from vault.errors import InvalidInput, UsageError

NoiseFn = Callable[[np.ndarray, float], np.ndarray]
ValueRange = tuple[float, float]

DEFAULT_N_ITER = 300
DEFAULT_PATH_STEPS = 6
DEFAULT_REG = 1.0
DEFAULT_TOL = 1e-7
DEFAULT_BASELINE_DRAWS = 20


# ----------------------------------------------------------------- validation


def _as_matrix(matrix: np.ndarray, name: str) -> np.ndarray:
    """A float copy of a 2-D matrix whose values are finite or NaN (never +-inf)."""
    arr = np.array(matrix, dtype=float)
    if arr.ndim != 2 or 0 in arr.shape:
        raise InvalidInput(f"{name} must be a non-empty 2-D matrix (participants x items)")
    if np.isinf(arr).any():
        raise InvalidInput(f"{name} contains infinite values")
    return arr


def _check_range(value_range: ValueRange | None) -> ValueRange | None:
    if value_range is None:
        return None
    if len(value_range) != 2:
        raise UsageError("value_range must be a (low, high) pair")
    low, high = float(value_range[0]), float(value_range[1])
    if not (math.isfinite(low) and math.isfinite(high) and low < high):
        raise UsageError("value_range must be finite with low < high")
    return low, high


def _check_mask(mask: np.ndarray, shape: tuple[int, ...], name: str) -> np.ndarray:
    arr = np.asarray(mask)
    if arr.dtype != bool or arr.shape != shape:
        raise InvalidInput(f"{name} must be a boolean matrix of the same shape")
    if not arr.any():
        raise InvalidInput(f"{name} selects no cells")
    return arr


# ------------------------------------------------------------------ splitting


def train_test_split(
    matrix: np.ndarray, *, test_fraction: float, rng: np.random.Generator
) -> tuple[np.ndarray, np.ndarray]:
    """Hold out `test_fraction` of each participant's observed ratings.

    Returns `(train, test_mask)`: `train` is a copy with the held-out cells set
    to NaN, `test_mask` marks them. Per row, round(fraction x observed) cells go
    to the test set, but a row always keeps at least one training rating; then
    every column that lost all its training ratings gets one back (drawn at
    random), so no item is unseen in training where that is possible.
    """
    full = _as_matrix(matrix, "matrix")
    if not 0.0 < test_fraction < 1.0:
        raise UsageError("test_fraction must be strictly between 0 and 1")
    observed = ~np.isnan(full)
    test_mask = np.zeros_like(observed)
    for row in range(full.shape[0]):
        cells = np.flatnonzero(observed[row])
        n_test = min(math.floor(test_fraction * cells.size + 0.5), cells.size - 1)
        if n_test > 0:
            test_mask[row, rng.permutation(cells)[:n_test]] = True
    train_mask = observed & ~test_mask
    for col in np.flatnonzero(~train_mask.any(axis=0) & test_mask.any(axis=0)):
        back = rng.choice(np.flatnonzero(test_mask[:, col]))
        test_mask[back, col] = False
    if not test_mask.any():
        raise InvalidInput("too few observed ratings to hold any out")
    train = np.where(test_mask, np.nan, full)
    return train, test_mask


# --------------------------------------------------------------- the recommender


@dataclass(frozen=True)
class Model:
    """Fitted completion: mean + biases + user_factors @ item_factors.T."""

    mean: float
    user_bias: np.ndarray
    item_bias: np.ndarray
    user_factors: np.ndarray  # (participants, rank)
    item_factors: np.ndarray  # (items, rank)
    value_range: ValueRange | None
    iterations: int
    converged: bool

    def predict(self) -> np.ndarray:
        """The full completed matrix, clipped to `value_range` if one was given."""
        full = (
            self.mean
            + self.user_bias[:, None]
            + self.item_bias[None, :]
            + self.user_factors @ self.item_factors.T
        )
        if self.value_range is not None:
            full = np.clip(full, *self.value_range)
        return full


def _biases(
    train: np.ndarray, observed: np.ndarray, mean: float, low_rank: np.ndarray,
    item_bias: np.ndarray, reg: float,
) -> tuple[np.ndarray, np.ndarray]:
    """One alternating ridge step for the biases (reg acts as a pseudo-count)."""
    counts_u = observed.sum(axis=1)
    counts_i = observed.sum(axis=0)
    resid = np.where(observed, train - mean - low_rank - item_bias[None, :], 0.0)
    user_bias = resid.sum(axis=1) / (counts_u + reg + (counts_u == 0))
    resid = np.where(observed, train - mean - low_rank - user_bias[:, None], 0.0)
    item_bias = resid.sum(axis=0) / (counts_i + reg + (counts_i == 0))
    return user_bias, item_bias


def _shrink_path(start: float, reg: float, steps: int) -> np.ndarray:
    """Soft thresholds from `start` down to `reg`, geometric (warm-started stages)."""
    if start <= reg or steps == 1:
        return np.array([reg])
    path = np.geomspace(start, max(reg, start * 1e-4), steps)
    path[-1] = reg
    return path


def fit_svd(
    train: np.ndarray,
    *,
    rank: int,
    n_iter: int = DEFAULT_N_ITER,
    reg: float = DEFAULT_REG,
    value_range: ValueRange | None = None,
    tol: float = DEFAULT_TOL,
    path_steps: int = DEFAULT_PATH_STEPS,
) -> Model:
    """Soft-impute matrix completion with global mean and user/item biases.

    `rank` caps the low-rank residual; `reg` >= 0 is both the pseudo-count that
    shrinks the biases towards zero and the final soft threshold subtracted from
    the residual's singular values. The threshold starts at half the residual's
    top singular value and falls geometrically to `reg` over `path_steps` warm-
    started stages: with a hard rank cap, starting at `reg` directly can stall in
    a poor fixed point when few cells are observed. `n_iter` is the budget of SVD
    steps over all stages; a stage ends early when the relative change of the
    low-rank part falls below `tol`. Deterministic (no randomness).
    """
    data = _as_matrix(train, "train")
    observed = ~np.isnan(data)
    if not observed.any():
        raise InvalidInput("train has no observed ratings")
    if not 1 <= rank <= min(data.shape):
        raise UsageError("rank must be between 1 and min(participants, items)")
    if n_iter < 1 or path_steps < 1:
        raise UsageError("n_iter and path_steps must be at least 1")
    if not (math.isfinite(reg) and reg >= 0):
        raise UsageError("reg must be a finite number >= 0")
    value_range = _check_range(value_range)

    mean = float(data[observed].mean())
    low_rank = np.zeros_like(data)
    user_bias, item_bias = _biases(data, observed, mean, low_rank, np.zeros(data.shape[1]), reg)
    resid = np.where(observed, data - mean - user_bias[:, None] - item_bias[None, :], 0.0)
    top = float(np.linalg.svd(resid, compute_uv=False)[0])
    path = _shrink_path(0.5 * top, reg, min(path_steps, n_iter))
    per_stage = math.ceil(n_iter / len(path))
    u = s = vt = None
    converged = False
    iterations = 0
    for shrink in path:
        converged = False
        for _ in range(min(per_stage, n_iter - iterations)):
            iterations += 1
            user_bias, item_bias = _biases(data, observed, mean, low_rank, item_bias, reg)
            base = mean + user_bias[:, None] + item_bias[None, :]
            filled = np.where(observed, data - base, low_rank)
            u, s, vt = np.linalg.svd(filled, full_matrices=False)
            s = np.maximum(s[:rank] - shrink, 0.0)
            new = (u[:, :rank] * s) @ vt[:rank]
            change = float(np.sum((new - low_rank) ** 2))
            scale = max(float(np.sum(low_rank**2)), 1e-12)
            low_rank = new
            if change / scale < tol:
                converged = True
                break
    assert u is not None and s is not None and vt is not None
    user_bias, item_bias = _biases(data, observed, mean, low_rank, item_bias, reg)
    root = np.sqrt(s)
    return Model(
        mean=mean,
        user_bias=user_bias,
        item_bias=item_bias,
        user_factors=u[:, :rank] * root,
        item_factors=vt[:rank].T * root,
        value_range=value_range,
        iterations=iterations,
        converged=converged,
    )


# ------------------------------------------------------------------ evaluation


def rmse(pred: np.ndarray, truth: np.ndarray, mask: np.ndarray) -> float:
    """Root mean squared error over the cells selected by `mask`."""
    p = np.asarray(pred, dtype=float)
    t = np.asarray(truth, dtype=float)
    if p.shape != t.shape:
        raise InvalidInput("pred and truth must have the same shape")
    m = _check_mask(mask, t.shape, "mask")
    diff = p[m] - t[m]
    if not np.isfinite(diff).all():
        raise InvalidInput("pred or truth is missing or non-finite in a masked cell")
    return float(np.sqrt(np.mean(diff**2)))


def fit_normal_mle(train: np.ndarray) -> tuple[float, float]:
    """Maximum-likelihood normal fit to the observed cells: (mean, std with ddof=0)."""
    values = _as_matrix(train, "train")
    values = values[~np.isnan(values)]
    if values.size == 0:
        raise InvalidInput("train has no observed ratings")
    return float(values.mean()), float(values.std(ddof=0))


@dataclass(frozen=True)
class RandomBaseline:
    """Held-out RMSE of ratings drawn at random from N(loc, scale**2)."""

    loc: float
    scale: float
    rmse: float  # mean over draws of each draw's RMSE
    rmse_std: float  # spread of the per-draw RMSEs (ddof=0)
    n_draws: int


def random_baseline(
    train: np.ndarray,
    test_mask: np.ndarray,
    truth: np.ndarray,
    rng: np.random.Generator,
    *,
    n_draws: int = DEFAULT_BASELINE_DRAWS,
) -> RandomBaseline:
    """A recommender that knows only the rating distribution.

    Fits a normal distribution to the training ratings by maximum likelihood
    (mean, and the std with ddof=0), draws one rating per held-out cell from it,
    unclipped, and scores it against `truth`; repeated `n_draws` times and the
    per-draw RMSEs averaged, so the figure is the expected RMSE of one random
    recommender rather than of a lucky draw.
    """
    if n_draws < 1:
        raise UsageError("n_draws must be at least 1")
    loc, scale = fit_normal_mle(train)
    t = _as_matrix(truth, "truth")
    m = _check_mask(test_mask, t.shape, "test_mask")
    scores = []
    for _ in range(n_draws):
        pred = np.full(t.shape, np.nan)
        pred[m] = rng.normal(loc, scale, size=int(m.sum()))
        scores.append(rmse(pred, t, m))
    arr = np.array(scores)
    return RandomBaseline(loc, scale, float(arr.mean()), float(arr.std(ddof=0)), n_draws)


# --------------------------------------------------------------- utility curve


@dataclass(frozen=True)
class UtilityReport:
    """Aggregate held-out RMSE figures only: nothing per participant or per item."""

    epsilons: tuple[float, ...]  # ascending
    noisy_rmse: tuple[float, ...]  # mean over `repeats` noise draws, per epsilon
    noisy_rmse_std: tuple[float, ...]  # spread over the repeats (ddof=0)
    no_noise_rmse: float
    random_rmse: float
    rank: int
    test_fraction: float
    repeats: int
    baseline_draws: int
    value_range: ValueRange

    def as_dict(self) -> dict[str, object]:
        """JSON-ready: plain floats, ints and lists."""
        return {
            "metric": "held-out RMSE on true ratings",
            "epsilons": list(self.epsilons),
            "noisy_rmse": list(self.noisy_rmse),
            "noisy_rmse_std": list(self.noisy_rmse_std),
            "no_noise_rmse": self.no_noise_rmse,
            "random_baseline_rmse": self.random_rmse,
            "rank": self.rank,
            "test_fraction": self.test_fraction,
            "repeats": self.repeats,
            "baseline_draws": self.baseline_draws,
            "value_range": list(self.value_range),
        }

    def table(self) -> str:
        """A plain-text table for the terminal."""
        head = f"{'epsilon':>10}  {'RMSE':>7}  {'+/-':>6}  {'/ no-noise':>10}  {'/ random':>8}"
        lines = [head, "-" * len(head)]
        for eps, value, spread in zip(self.epsilons, self.noisy_rmse, self.noisy_rmse_std, strict=True):
            lines.append(
                f"{eps:>10.4g}  {value:>7.4f}  {spread:>6.4f}  "
                f"{value / self.no_noise_rmse:>10.2f}  {value / self.random_rmse:>8.2f}"
            )
        lines += [
            "-" * len(head),
            f"no-noise model (rank {self.rank}):      RMSE {self.no_noise_rmse:.4f}",
            f"random baseline (normal, MLE fit): RMSE {self.random_rmse:.4f}",
            f"held-out fraction {self.test_fraction:g}, {self.repeats} noise draw(s) per epsilon.",
            "Caution: these figures come from raw held-out ratings and are not themselves",
            "differentially private; releasing them is for your ethics board and DPO to decide.",
        ]
        return "\n".join(lines)


def utility_curve(
    truth_matrix: np.ndarray,
    epsilons: Sequence[float],
    noise_fn: NoiseFn,
    *,
    rng: np.random.Generator,
    value_range: ValueRange,
    rank: int,
    test_fraction: float,
    n_iter: int = DEFAULT_N_ITER,
    reg: float = DEFAULT_REG,
    repeats: int = 1,
    baseline_draws: int = DEFAULT_BASELINE_DRAWS,
) -> UtilityReport:
    """Held-out RMSE of a recommender trained on noised data, per epsilon.

    `noise_fn(train, epsilon)` receives a copy of the training matrix (NaN for
    missing and held-out cells; it never sees the held-out ratings) and returns
    a noised matrix of the same shape. Its values are clipped to `value_range`
    (post-processing) and only the training cells are kept: which cells exist is
    not hidden by this curve. `rng` drives the split and the random baseline;
    the noise function brings its own randomness.
    """
    truth = _as_matrix(truth_matrix, "truth_matrix")
    bounds = _check_range(value_range)
    if bounds is None:
        raise UsageError("value_range is required")
    observed = ~np.isnan(truth)
    if ((truth[observed] < bounds[0]) | (truth[observed] > bounds[1])).any():
        raise InvalidInput("truth_matrix has ratings outside value_range")
    eps = sorted(float(e) for e in epsilons)
    if not eps or not all(math.isfinite(e) and e > 0 for e in eps):
        raise UsageError("epsilons must be a non-empty list of finite positive numbers")
    if repeats < 1:
        raise UsageError("repeats must be at least 1")

    train, test_mask = train_test_split(truth, test_fraction=test_fraction, rng=rng)
    train_mask = ~np.isnan(train)

    def score(matrix: np.ndarray) -> float:
        model = fit_svd(matrix, rank=rank, n_iter=n_iter, reg=reg, value_range=bounds)
        return rmse(model.predict(), truth, test_mask)

    no_noise = score(train)
    baseline = random_baseline(train, test_mask, truth, rng, n_draws=baseline_draws)
    means: list[float] = []
    spreads: list[float] = []
    for epsilon in eps:
        runs = []
        for _ in range(repeats):
            noised = np.asarray(noise_fn(train.copy(), epsilon), dtype=float)
            if noised.shape != train.shape:
                raise InvalidInput("noise_fn returned a matrix of the wrong shape")
            if not np.isfinite(noised[train_mask]).all():
                raise InvalidInput("noise_fn returned missing or non-finite training cells")
            noised = np.where(train_mask, np.clip(noised, *bounds), np.nan)
            runs.append(score(noised))
        means.append(float(np.mean(runs)))
        spreads.append(float(np.std(runs)))
    return UtilityReport(
        epsilons=tuple(eps),
        noisy_rmse=tuple(means),
        noisy_rmse_std=tuple(spreads),
        no_noise_rmse=no_noise,
        random_rmse=baseline.rmse,
        rank=rank,
        test_fraction=float(test_fraction),
        repeats=repeats,
        baseline_draws=baseline_draws,
        value_range=bounds,
    )

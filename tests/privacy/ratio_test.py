"""The empirical e^epsilon check both sampler and mechanism tests use."""

from __future__ import annotations

import math

import numpy as np
from scipy import stats


def worst_ratio_pvalue(a: np.ndarray, b: np.ndarray, epsilon: float, min_count: int) -> float:
    """Smallest Bonferroni-corrected p-value of H0: P_a(bin) <= e^eps P_b(bin) (and back).

    Given c_a + c_b = m (equal sample sizes), c_a ~ Binomial(m, pi) with
    pi <= e^eps / (1 + e^eps) under H0: an exact conditional test
    (scipy.stats.binomtest, one-sided). Any binning is a valid event set (pooled tails included).
    """
    assert a.size == b.size
    lo = int(min(a.min(), b.min()))
    ca = np.bincount(a - lo)
    cb = np.bincount(b - lo, minlength=ca.size)
    ca = np.pad(ca, (0, cb.size - ca.size))
    bins = np.flatnonzero((ca >= min_count) & (cb >= min_count))
    pi0 = math.exp(epsilon) / (1 + math.exp(epsilon))
    worst = 1.0
    for j in bins:
        m = int(ca[j] + cb[j])
        for count in (int(ca[j]), int(cb[j])):
            p = stats.binomtest(count, m, pi0, alternative="greater").pvalue
            worst = min(worst, p * 2 * bins.size)
    return worst

"""Exact integer noise for differentially private exports.

What this module guarantees
---------------------------
`discrete_laplace(t)` draws integers with P(x) proportional to exp(-|x|/t) and
`discrete_gaussian(s2)` integers with P(x) proportional to exp(-x^2/(2*s2)),
*exactly*: assuming the byte source is uniform, the output distribution is the
stated one, with no floating-point rounding anywhere in the sampling decisions.
The algorithms are Canonne, Kamath and Steinke, "The Discrete Gaussian for
Differential Privacy" (NeurIPS 2020, arXiv:2004.00010), Algorithms 1-3:
Bernoulli(exp(-gamma)) from uniform integers, discrete Laplace from a geometric
variate, discrete Gaussian by rejection from discrete Laplace. Every decision is
a comparison between uniform integers and integer thresholds. Textbook
floating-point Laplace noise leaks through its low bits (Mironov, "On
significance of the least significant bits for differential privacy", CCS 2012),
which is why there is none here. Randomness comes from the operating system's
CSPRNG (`vault.crypto.random_bytes`); tests may inject a byte source.
(All references here are cited from memory, without theorem numbers.)

Privacy statements these samplers support (the caller must do the accounting):
- pure epsilon-DP: adding discrete Laplace noise of scale Delta/epsilon to each
  coordinate of an integer-valued query of L1 sensitivity Delta
  (`laplace_scale_for`; the geometric mechanism of Ghosh, Roughgarden and
  Sundararajan 2009, restated by CKS 2020);
- rho-zCDP: adding discrete Gaussian noise of variance parameter
  sigma^2 = Delta^2/(2 rho) to each coordinate of an integer-valued query of L2
  sensitivity Delta (`vault.privacy.accountant.noise_parameter`; CKS 2020, the discrete analogue
  of Bun and Steinke 2016).

What it does NOT do, and what stays the caller's concern
--------------------------------------------------------
- The privacy unit (a participant, a session, a rating) and hence the
  sensitivity are the caller's choice and responsibility. A sensitivity
  computed for "one rating" protects nothing about a participant who gave many.
- Values must be bounded *before* noise with data-independent bounds (see
  `FixedPointGrid`); noise on unbounded data has no guarantee.
- Every release spends budget; repeated exports compose and this module keeps
  no ledger. Budget accounting, the choice of epsilon or rho and the decision
  to release at all are the caller's (and the ethics board's).
- Post-processing is free: clipping the noisy result back into the range,
  rounding or rescaling it never weakens the guarantee. Anything that looks at
  the data again after the noise (choosing what to publish from the noisy
  values and the raw ones together) is not post-processing.
- Not protected: side channels. Sampling time depends on the random values
  drawn, so sampling is not constant-time; run exports where nobody can time
  them. Also not protected: metadata such as which participants or cells exist,
  the number of rows, or anything released outside these samplers.
- Differential privacy bounds what one unit changes in the output; it does not
  make small groups anonymous in the everyday sense, and a weak epsilon (large)
  protects little. Whether an export is lawful and acceptable is for the local
  ethics board, the data-protection officer and the law to decide, not for this
  module.

Supported parameters (refused with UsageError outside; rationals in lowest
terms; give a `Fraction`, an `int` or a `(numerator, denominator)` pair, never a
float - convert with `Fraction(str(x))` if you must):
- discrete Laplace scale t = a/b with 1 <= a, b <= 2**48;
- discrete Gaussian sigma^2 = a/b with 1 <= a <= 2**48 and 1 <= b <= 2**24;
- Bernoulli(exp(-gamma)) with gamma = a/b, 0 <= a <= 2**62, 1 <= b <= 2**48.
Inside these ranges all intermediate integers fit in int64; the few Gaussian
lanes whose acceptance test would not (events of probability below exp(-60) or
so) are finished exactly with Python integers. The sampling loops are unbounded
in principle; each gives up with VaultError after a run whose probability is
below 10**-400 (e.g. 4096 steps of one Bernoulli loop), which in practice
means a broken byte source: a stuck source (all zero bytes, say) raises instead
of hanging. No check can recognise every non-uniform source; the guarantee
assumes the CSPRNG.
"""

from __future__ import annotations

import math
import numbers
import operator
from collections.abc import Callable
from dataclasses import dataclass
from fractions import Fraction

import numpy as np

from vault.crypto import random_bytes
from vault.errors import InvalidInput, UsageError, VaultError

ByteSource = Callable[[int], bytes]
RationalLike = Fraction | int | tuple[int, int]

LAPLACE_MAX_PART = 1 << 48
GAUSSIAN_MAX_NUMERATOR = 1 << 48
GAUSSIAN_MAX_DENOMINATOR = 1 << 24
BERNOULLI_MAX_NUMERATOR = 1 << 62
BERNOULLI_MAX_DENOMINATOR = 1 << 48
GRID_MAX_UNITS = 1 << 48

# Gaussian acceptance terms above this are computed in Python ints instead.
_GAMMA_LIMIT = 1 << 62
# Give-up points of the loops (see the module docstring); with denominators
# <= 2**49, den * _MAX_K stays below 2**62 and t * _MAX_V below 2**61.
_MAX_K = 4096  # steps of one Bernoulli(exp(-gamma)) loop: P <= 1/4095!
_MAX_V = 4096  # consecutive Bernoulli(exp(-1)) successes: P = exp(-4096)
_MAX_REDRAWS = 1000  # rejection rounds of one uniform draw: P <= 4**-1000
_MAX_STALLS = 100  # batches of >= 64 candidates without one accepted: P <= 0.72**6400
_BROKEN = "the random byte source is broken or not uniform (a run of probability < 1e-400)"
# Bernoulli(exp(-1)) takes its first _E1_DIGITS steps of CKS Algorithm 1 from one
# uniform integer in [0, _E1_DIGITS!) (7! = 5040 fits 16-bit words).
_E1_DIGITS = 7
_CHUNK = 1 << 18  # samples per vectorised batch
_BLOCK = 1 << 16  # bytes fetched from the source at a time


# --------------------------------------------------------------------------- validation


def _rational(value: RationalLike, name: str) -> Fraction:
    if isinstance(value, bool | float):
        raise UsageError(f"{name} must be an exact rational (Fraction, int or a pair), not a float")
    if isinstance(value, Fraction):
        return value
    if isinstance(value, numbers.Integral):
        return Fraction(int(value))
    if (
        isinstance(value, tuple)
        and len(value) == 2
        and all(isinstance(x, numbers.Integral) and not isinstance(x, bool) for x in value)
    ):
        if int(value[1]) == 0:
            raise UsageError(f"{name} has a zero denominator")
        return Fraction(int(value[0]), int(value[1]))
    raise UsageError(f"{name} must be a Fraction, an int or a (numerator, denominator) pair")


def _size(size: int) -> int:
    if isinstance(size, bool):
        raise UsageError("size must be a non-negative integer")
    try:
        n = operator.index(size)
    except TypeError:
        raise UsageError("size must be a non-negative integer") from None
    if n < 0:
        raise UsageError("size must be a non-negative integer")
    return n


def _positive_int(value: int, name: str) -> int:
    if isinstance(value, bool) or not isinstance(value, numbers.Integral) or value < 1:
        raise UsageError(f"{name} must be a positive integer")
    return int(value)


# --------------------------------------------------------------------------- randomness


def _word_width(b: int) -> int:
    """Smallest word size whose rejection rate for a uniform in [0, b) is at most 1/16."""
    for width in (8, 16, 32):
        span = 1 << width
        if b <= span and (span % b) * 16 <= span:
            return width
    return 64


class _Random:
    """Uniform integers and exact Bernoulli trials drawn from a byte source.

    Lanes of a batch consume disjoint fresh bytes; which lanes are still pending
    depends only on bytes already consumed, so every lane behaves as if it read
    its own independent uniform stream (the usual rejection-sampling argument).
    """

    def __init__(self, source: ByteSource | None) -> None:
        self._source: ByteSource = random_bytes if source is None else source
        self._buf = memoryview(b"")
        self._pos = 0

    def _fetch(self, n: int) -> memoryview:
        data = self._source(n)
        if not isinstance(data, bytes | bytearray) or len(data) != n:
            got = len(data) if isinstance(data, bytes | bytearray) else "no"
            raise UsageError(f"the random byte source returned {got} bytes instead of {n}")
        return memoryview(data)

    def take(self, n: int) -> memoryview:
        if n >= _BLOCK:
            return self._fetch(n)
        if self._pos + n > len(self._buf):
            self._buf, self._pos = self._fetch(_BLOCK), 0
        out = self._buf[self._pos : self._pos + n]
        self._pos += n
        return out

    def bits(self, count: int) -> np.ndarray:
        raw = np.frombuffer(self.take((count + 7) // 8), dtype=np.uint8)
        return np.unpackbits(raw, count=count).astype(bool)

    def below(self, b: int, count: int) -> np.ndarray:
        """`count` independent uniform integers in [0, b), 1 <= b <= 2**62, as int64."""
        if b == 1 or count == 0:
            return np.zeros(count, np.int64)
        width = _word_width(b)
        vals, bad = self._below_once(b, count, width)
        redo = np.flatnonzero(bad)
        for _ in range(_MAX_REDRAWS):
            if redo.size == 0:
                return vals
            again, bad = self._below_once(b, redo.size, width)
            vals[redo] = again
            redo = redo[bad]
        raise VaultError(_BROKEN)

    def _below_once(self, b: int, count: int, width: int) -> tuple[np.ndarray, np.ndarray]:
        """Candidates in [0, b) and the mask of those to draw again."""
        raw = np.frombuffer(self.take(count * width // 8), dtype=f"<u{width // 8}")
        if width == 64:
            # Reject the incomplete last block of [0, 2**64), then reduce.
            rem = (1 << 64) % b
            bad = raw >= np.uint64((1 << 64) - rem) if rem else np.zeros(count, bool)
            return (raw % np.uint64(b)).astype(np.int64), bad
        # Lemire's multiply-shift: the high half of u*b, rejecting low halves below
        # 2**width mod b (Lemire 2019, "Fast random integer generation in an
        # interval", ACM TOMACS). Products fit 32 bits for 8/16-bit words.
        wide = np.uint32 if width <= 16 else np.uint64
        m = raw.astype(wide) * wide(b)
        bad = (m & wide((1 << width) - 1)) < wide((1 << width) % b)
        return (m >> wide(width)).astype(np.int64), bad

    # ------------------------------------------------------------- CKS Algorithm 1

    def bern_exp_unit(self, num: np.ndarray, den: int, start_k: int = 1) -> np.ndarray:
        """Bernoulli(exp(-num/den)) per lane, 0 <= num <= den (CKS Algorithm 1, gamma <= 1).

        Loop: K = start_k; while Bernoulli(gamma/K): K += 1; answer "K is odd".
        All pending lanes share K, so each round is one uniform in [0, den*K).
        """
        k = start_k
        go_on = self.below(den * k, num.size) < num
        out = np.full(num.size, bool(k & 1))
        lanes = np.flatnonzero(go_on)
        nums = num[lanes]
        while lanes.size:
            k += 1
            if k > _MAX_K:
                raise VaultError(_BROKEN)
            out[lanes] = bool(k & 1)
            go_on = self.below(den * k, lanes.size) < nums
            lanes, nums = lanes[go_on], nums[go_on]
        return out

    def bern_e1(self, count: int) -> np.ndarray:
        """Bernoulli(exp(-1)): CKS Algorithm 1 with gamma = 1.

        With gamma = 1 the loop reaches K >= k with probability 1/(k-1)!, so one
        uniform W in [0, M!) decides the first M steps at once: K >= k exactly
        when W < M!/(k-1)!. W = 0 (K > M) continues the loop from K = M + 1.
        """
        digits = _E1_DIGITS
        fact = math.factorial(digits)
        thresholds = np.array([fact // math.factorial(j) for j in range(digits, 0, -1)], np.int64)
        w = self.below(fact, count)
        k = 1 + digits - np.searchsorted(thresholds, w, side="right")
        out = (k & 1).astype(bool)
        rest = np.flatnonzero(k > digits)
        if rest.size:
            out[rest] = self.bern_exp_unit(np.ones(rest.size, np.int64), 1, digits + 1)
        return out

    def bern_exp(self, num: np.ndarray, den: int) -> np.ndarray:
        """Bernoulli(exp(-num/den)) per lane for any num >= 0 (CKS Algorithm 1, gamma > 1 too).

        exp(-gamma) = exp(-1)**floor(gamma) * exp(-(gamma - floor(gamma))).
        """
        whole = num // den
        ok = np.ones(num.size, bool)
        idx = np.flatnonzero(whole)
        left = whole[idx]
        for survived in range(_MAX_V + 2):
            if idx.size == 0:
                break
            if survived > _MAX_V:
                raise VaultError(_BROKEN)
            b = self.bern_e1(idx.size)
            ok[idx[~b]] = False
            more = b & (left > 1)
            idx, left = idx[more], left[more] - 1
        live = np.flatnonzero(ok)
        ok[live] = self.bern_exp_unit(num[live] - whole[live] * den, den)
        return ok

    # ------------------------------------------------------------- CKS Algorithm 2

    def geometric_e1(self, count: int) -> np.ndarray:
        """Successes before the first failure of Bernoulli(exp(-1)): P(V >= v) = exp(-v)."""
        first = self.bern_e1(count)
        v = first.astype(np.int64)
        alive = np.flatnonzero(first)
        for _ in range(_MAX_V):
            if alive.size == 0:
                return v
            alive = alive[self.bern_e1(alive.size)]
            v[alive] += 1
        raise VaultError(_BROKEN)

    def laplace(self, t: int, s: int, count: int) -> np.ndarray:
        """`count` discrete Laplace draws of scale t/s (CKS Algorithm 2).

        U uniform in [0, t) kept with probability exp(-U/t), V geometric as above,
        X = U + t*V is geometric with P(X = x) proportional to exp(-x/t); Y = X // s
        with a random sign, rejecting "-0" so zero is not counted twice.
        Candidates are generated in batches; keeping the first accepted ones in
        index order is still exact rejection sampling.
        """
        out = np.empty(count, np.int64)
        filled = stalls = 0
        while filled < count:
            need = count - filled
            u = self.below(t, need + need // 2 + 64)
            u = u[self.bern_exp_unit(u, t)]
            y = u + t * self.geometric_e1(u.size)
            if s > 1:
                y //= s
            negative = self.bits(y.size)
            z = np.where(negative, -y, y)[~(negative & (y == 0))]
            filled, stalls = _fill(out, filled, z, stalls)
        return out

    # ------------------------------------------------------------- CKS Algorithm 3

    def gaussian(self, plan: _GaussianPlan, count: int) -> np.ndarray:
        """`count` discrete Gaussian draws: Laplace(t) candidates Y kept with
        probability exp(-(|Y| - sigma2/t)**2 / (2 sigma2)) = exp(-(|Y|p - q)**2 c / D)."""
        p, q, c, den = plan.p, plan.q, plan.c, plan.den
        y_safe = _GAMMA_LIMIT // p
        a_safe = math.isqrt(_GAMMA_LIMIT // c)
        out = np.empty(count, np.int64)
        filled = stalls = 0
        while filled < count:
            need = count - filled
            y = self.laplace(plan.t_num, plan.t_den, need + need // 2 + 64)
            ay = np.abs(y)
            fast = ay <= y_safe
            a = np.where(fast, ay, 0) * p - q
            fast &= np.abs(a) <= a_safe
            a = np.where(fast, a, 0)
            accept = np.empty(y.size, bool)
            if fast.all():
                accept[:] = self.bern_exp(a * a * c, den)
            else:  # lanes whose gamma overflows int64: exact in Python ints
                lanes = np.flatnonzero(fast)
                accept[lanes] = self.bern_exp(a[lanes] * a[lanes] * c, den)
                for lane in np.flatnonzero(~fast).tolist():
                    gamma_num = (int(ay[lane]) * p - q) ** 2 * c
                    accept[lane] = _bern_exp_int(gamma_num, den, self)
            filled, stalls = _fill(out, filled, y[accept], stalls)
        return out


def _fill(out: np.ndarray, filled: int, accepted: np.ndarray, stalls: int) -> tuple[int, int]:
    """Copy accepted samples into `out`; count batches that accepted nothing."""
    take = min(accepted.size, out.size - filled)
    out[filled : filled + take] = accepted[:take]
    if take:
        return filled + take, 0
    if stalls + 1 > _MAX_STALLS:
        raise VaultError(_BROKEN)
    return filled, stalls + 1


# --------------------------------------------------------------------------- Python-int fallbacks


def _below_int(b: int, rng: _Random) -> int:
    """A uniform integer in [0, b) for any b >= 1 (rejection of the last partial block)."""
    nbytes = (b.bit_length() + 7) // 8 + 1
    span = 1 << (8 * nbytes)
    limit = span - span % b
    for _ in range(_MAX_REDRAWS):
        u = int.from_bytes(rng.take(nbytes), "little")
        if u < limit:
            return u % b
    raise VaultError(_BROKEN)


def _bern_exp_unit_int(num: int, den: int, k: int, rng: _Random) -> bool:
    """CKS Algorithm 1 for gamma = num/den <= 1, continued from step k."""
    while _below_int(den * k, rng) < num:
        k += 1
        if k > _MAX_K:
            raise VaultError(_BROKEN)
    return bool(k & 1)


def _bern_exp_int(num: int, den: int, rng: _Random) -> bool:
    """CKS Algorithm 1 for any gamma = num/den >= 0, in Python integers."""
    whole, rem = divmod(num, den)
    for done in range(whole):  # stops at the first failure, whatever `whole` is
        if done > _MAX_V:
            raise VaultError(_BROKEN)
        if not _bern_exp_unit_int(1, 1, 1, rng):
            return False
    return _bern_exp_unit_int(rem, den, 1, rng)


@dataclass(frozen=True)
class _GaussianPlan:
    """Constants of CKS Algorithm 3 for sigma^2 = n/d.

    Any Laplace scale t > 0 gives the exact discrete Gaussian; efficiency needs
    t near sigma. With sigma^2 >= 1 we take t = sigma^2/m, m = floor(sigma), so
    that sigma^2/t = m is an integer and gamma = (|Y| - m)^2 d / (2n) has small
    terms; with sigma^2 < 1 we take t = 1 as CKS do.
    gamma = (|Y| p - q)^2 c / den.
    """

    t_num: int
    t_den: int
    p: int
    q: int
    c: int
    den: int

    @classmethod
    def for_sigma2(cls, n: int, d: int) -> _GaussianPlan:
        if n >= d:
            m = math.isqrt(n // d)  # = floor(sqrt(n/d))
            t = Fraction(n, d * m)
            g = math.gcd(d, 2 * n)
            return cls(t.numerator, t.denominator, 1, m, d // g, 2 * n // g)
        return cls(1, 1, d, n, 1, 2 * n * d)


# --------------------------------------------------------------------------- public samplers


def _batches(size: int) -> list[int]:
    return [min(_CHUNK, size - start) for start in range(0, size, _CHUNK)]


def discrete_laplace(
    scale: RationalLike, size: int, *, source: ByteSource | None = None
) -> np.ndarray:
    """`size` independent draws with P(x) proportional to exp(-|x|/scale), x integer (int64).

    `scale` = numerator/denominator with both in [1, 2**48] in lowest terms.
    """
    t = _rational(scale, "scale")
    n = _size(size)
    if t <= 0:
        raise UsageError("the Laplace scale must be positive")
    if t.numerator > LAPLACE_MAX_PART or t.denominator > LAPLACE_MAX_PART:
        raise UsageError("the Laplace scale's numerator and denominator must be at most 2**48")
    rng = _Random(source)
    parts = [rng.laplace(t.numerator, t.denominator, m) for m in _batches(n)]
    return np.concatenate(parts) if parts else np.zeros(0, np.int64)


def discrete_gaussian(
    sigma2: RationalLike, size: int, *, source: ByteSource | None = None
) -> np.ndarray:
    """`size` independent draws with P(x) proportional to exp(-x**2/(2*sigma2)) (int64).

    `sigma2` = numerator/denominator, numerator in [1, 2**48], denominator in [1, 2**24].
    """
    s2 = _rational(sigma2, "sigma2")
    n = _size(size)
    if s2 <= 0:
        raise UsageError("sigma2 must be positive")
    if s2.numerator > GAUSSIAN_MAX_NUMERATOR or s2.denominator > GAUSSIAN_MAX_DENOMINATOR:
        raise UsageError("sigma2 needs numerator <= 2**48 and denominator <= 2**24")
    plan = _GaussianPlan.for_sigma2(s2.numerator, s2.denominator)
    rng = _Random(source)
    parts = [rng.gaussian(plan, m) for m in _batches(n)]
    return np.concatenate(parts) if parts else np.zeros(0, np.int64)


def bernoulli_exp(
    gamma: RationalLike, size: int, *, source: ByteSource | None = None
) -> np.ndarray:
    """`size` independent exact Bernoulli(exp(-gamma)) trials (bool array)."""
    g = _rational(gamma, "gamma")
    n = _size(size)
    if g < 0:
        raise UsageError("gamma must be non-negative")
    if g.numerator > BERNOULLI_MAX_NUMERATOR or g.denominator > BERNOULLI_MAX_DENOMINATOR:
        raise UsageError("gamma needs numerator <= 2**62 and denominator <= 2**48")
    rng = _Random(source)
    parts = [rng.bern_exp(np.full(m, g.numerator, np.int64), g.denominator) for m in _batches(n)]
    return np.concatenate(parts) if parts else np.zeros(0, bool)


# --------------------------------------------------------------------------- calibration


def laplace_scale_for(epsilon: RationalLike, sensitivity: int) -> Fraction:
    """Discrete Laplace scale Delta/epsilon for epsilon-DP (pure DP).

    For an integer-valued query (or vector) of L1 sensitivity `sensitivity` under
    the caller's privacy unit.
    """
    eps = _rational(epsilon, "epsilon")
    delta = _positive_int(sensitivity, "sensitivity")
    if eps <= 0:
        raise UsageError("epsilon must be positive")
    return Fraction(delta) / eps


# --------------------------------------------------------------------------- fixed-point data


@dataclass(frozen=True)
class FixedPointGrid:
    """Real-valued scores in [low, high] on a grid of step 1/k, as integer units.

    Noise is added to integer units; `span_units` is the L1 sensitivity of one
    quantised value moving anywhere in the range. Quantisation rounds in floating point (it is data
    preparation, not a sampling decision) and then clips in integers, so the
    bound holds whatever the input. Both range ends must lie on the grid.
    """

    low: Fraction
    high: Fraction
    k: int

    def __post_init__(self) -> None:
        low = _rational(self.low, "low")
        high = _rational(self.high, "high")
        k = _positive_int(self.k, "k")
        if low >= high:
            raise UsageError("the grid needs low < high")
        if (low * k).denominator != 1 or (high * k).denominator != 1:
            raise UsageError("low and high must be multiples of the grid step 1/k")
        if max(abs(low * k), abs(high * k)) > GRID_MAX_UNITS:
            raise UsageError("the grid range exceeds 2**48 units")
        object.__setattr__(self, "low", low)
        object.__setattr__(self, "high", high)
        object.__setattr__(self, "k", k)

    @property
    def low_units(self) -> int:
        return int(self.low * self.k)

    @property
    def high_units(self) -> int:
        return int(self.high * self.k)

    @property
    def span_units(self) -> int:
        return self.high_units - self.low_units

    def quantise(self, values: np.ndarray) -> np.ndarray:
        """Clip to [low, high] and round to the nearest grid point, as int64 units."""
        arr = np.asarray(values, dtype=np.float64)
        if not np.isfinite(arr).all():
            raise InvalidInput("values to quantise must be finite numbers")
        scaled = np.clip(arr, float(self.low), float(self.high)) * self.k
        return self.clip_units(np.rint(scaled).astype(np.int64))

    def clip_units(self, units: np.ndarray) -> np.ndarray:
        """Clip integer units into the range (also fine as post-processing after noise)."""
        return np.clip(np.asarray(units, dtype=np.int64), self.low_units, self.high_units)

    def dequantise(self, units: np.ndarray) -> np.ndarray:
        """Units back to scores (float64); post-processing, never touches privacy."""
        return np.asarray(units, dtype=np.int64) / self.k

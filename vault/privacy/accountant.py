"""Differentially private release of preference scores, and the privacy accountant.

Pure: arrays in, noisy arrays and a stated `Guarantee` out; no I/O, no clock,
no storage. Randomness comes from `vault.privacy.noise` (exact discrete Laplace and
discrete Gaussian samplers on integer grids) through its byte `source`
(default: `vault.crypto.random_bytes`, the operating system's CSPRNG). The caller persists
the ledger and writes the manifest (`Guarantee.as_dict`).

The matrix release (`release_matrix`), per privacy unit
--------------------------------------------------------
Scores are clipped to the declared [low, high] and quantised to the grid of
step 1/k (`noise.FixedPointGrid`); noise is added in integer grid units.
`span` = (high - low) * k grid units.

- unit "participant" (the default): the output has a value for EVERY
  (participant, item) cell. Unrated cells are filled with the public constant
  `mid` = floor((low + high) / 2) on the grid before noise, so the set of
  released cells never depends on what was rated and the missingness pattern
  is hidden. Neighbouring datasets replace one participant's row by any other
  (values and which items were rated): every one of the n_items cells can move
  by up to `span`, so the sensitivity is n_items * span (L1, discrete Laplace
  of scale n_items * span / epsilon per cell) or sqrt(n_items) * span (L2,
  discrete Gaussian of sigma^2 = n_items * span^2 / (2 rho) per cell). With
  many items that is very noisy; this is the honest price of releasing
  per-participant rows, and the reason the aggregate release exists
  (`vault.privacy.aggregate`).
- unit "rating" (only where the policy allows it): only rated cells are
  released (NaN stays NaN); neighbours change one rating's value, sensitivity
  `span`. The missingness pattern is released in the clear and a participant
  with n ratings is protected at n * epsilon (n * rho) at best.

Accountant
----------
Each participant has a `Ledger` per purpose: the pure-DP epsilon and the zCDP
rho spent so far. Pure releases compose by adding epsilons (basic
composition); zCDP releases by adding rho (Bun and Steinke 2016, from memory).
A ledger holding both is compared with the policy's epsilon budget at the
policy's delta: an (eps, 0)-DP and a (eps', delta)-DP mechanism compose to
(eps + eps', delta)-DP (basic composition), and rho-zCDP implies
(rho + 2 sqrt(rho ln(1/delta)), delta)-DP (Bun and Steinke 2016, Prop. 1.3,
cited from memory). Arithmetic is exact: every amount is a `Fraction` (floats
enter through their shortest decimal form, so 0.1 is exactly 1/10 and ten
spends of 0.1 are exactly 1); ln(1/delta) is the only irrational term and is
replaced by a 60-digit upper bound, which can only make the check stricter.
"""

from __future__ import annotations

import math
import numbers
from dataclasses import dataclass, field
from decimal import Decimal, localcontext
from enum import StrEnum
from fractions import Fraction
from typing import Literal

import numpy as np

from vault.errors import InvalidInput, UsageError
from vault.privacy import noise

Exact = Fraction | int | float | str | Decimal | tuple[int, int]
Mechanism = Literal["discrete-laplace", "discrete-gaussian"]
LAPLACE: Mechanism = "discrete-laplace"
GAUSSIAN: Mechanism = "discrete-gaussian"
DEFAULT_DELTA = Fraction(1, 10**6)  # display only, for zCDP releases

NOT_PROTECTED_ALWAYS = (
    "Sampling time depends on the noise drawn (it is not constant-time): run exports where "
    "nobody can time them.",
    "The item list, the number of released rows or statistics and every parameter in this "
    "manifest are public.",
    "Differential privacy bounds what one privacy unit can change in the output, no more; a large "
    "epsilon protects little. Whether this release is acceptable is for the local ethics board, "
    "the data-protection officer and the law to decide.",
)


class PrivacyUnit(StrEnum):
    PARTICIPANT = "participant"  # everything one person contributed
    RATING = "rating"  # one rating; only where the policy allows it


# --------------------------------------------------------------------------- exact numbers


def exact(value: Exact, name: str = "value") -> Fraction:
    """A Fraction; floats by their shortest decimal form (0.1 -> 1/10), never their binary value."""
    if isinstance(value, bool):
        raise UsageError(f"{name} must be a number")
    if isinstance(value, Fraction):
        return value
    if isinstance(value, numbers.Integral):
        return Fraction(int(value))
    if isinstance(value, Decimal):
        if not value.is_finite():
            raise UsageError(f"{name} must be finite")
        return Fraction(value)
    if isinstance(value, float):
        if not math.isfinite(value):
            raise UsageError(f"{name} must be finite")
        return Fraction(str(float(value)))
    if isinstance(value, str):
        try:
            return Fraction(value)
        except (ValueError, ZeroDivisionError):
            raise UsageError(f"{name} is not a number") from None
    if isinstance(value, tuple) and len(value) == 2 and all(isinstance(v, int) for v in value):
        if value[1] == 0:
            raise UsageError(f"{name} has a zero denominator")
        return Fraction(*value)
    raise UsageError(f"{name} must be a Fraction, int, float, decimal string or (num, den) pair")


def _positive(value: Exact, name: str) -> Fraction:
    f = exact(value, name)
    if f <= 0:
        raise UsageError(f"{name} must be positive")
    return f


def _sqrt_up(x: Fraction, digits: int = 40) -> Fraction:
    """A rational upper bound of sqrt(x) within 10**-digits."""
    scale = 10**digits
    n = math.ceil(x * scale * scale)
    root = math.isqrt(n)
    return Fraction(root if root * root == n else root + 1, scale)


def _ln_inverse_up(delta: Fraction) -> Fraction:
    """An upper bound of ln(1/delta) (60-digit decimal logarithms plus a 1e-40 margin)."""
    with localcontext() as ctx:
        ctx.prec = 60
        value = Decimal(delta.denominator).ln() - Decimal(delta.numerator).ln()
    return Fraction(value) + Fraction(1, 10**40)


def check_delta(delta: Exact) -> Fraction:
    d = exact(delta, "delta")
    if not 0 < d < 1:
        raise UsageError("delta must be strictly between 0 and 1")
    return d


def zcdp_epsilon(rho: Exact, delta: Exact) -> Fraction:
    """Upper bound of rho + 2 sqrt(rho ln(1/delta)): rho-zCDP implies (that, delta)-DP.

    Bun and Steinke 2016, Prop. 1.3 (cited from memory); tighter conversions
    exist (OpenDP uses one), this one is simple and never smaller.
    """
    r = exact(rho, "rho")
    if r < 0:
        raise UsageError("rho must be non-negative")
    if r == 0:
        return Fraction(0)
    return r + 2 * _sqrt_up(r * _ln_inverse_up(check_delta(delta)))


# --------------------------------------------------------------------------- the guarantee

# Frozen values: Cost, Budget and Ledger are equal and hashed by their fields. Their hash is
# computed once, at construction, and kept (as str keeps its own): hashing two Fractions costs
# microseconds, and the budget ledger keys its memo by these values for every participant.


@dataclass(frozen=True)
class Component:
    """One noisy statistic of a release: what was noised, with what, how much."""

    name: str
    mechanism: Mechanism
    entries: int  # number of noisy values
    step: Fraction  # one released integer unit, in `step_unit`
    step_unit: str
    l1_sensitivity: int | None  # in released units (Laplace)
    l2_sensitivity_squared: int | None  # in released units squared (Gaussian)
    noise: Fraction  # Laplace scale t, or Gaussian sigma^2, in released units
    epsilon: Fraction | None = None
    rho: Fraction | None = None

    @property
    def sensitivity(self) -> float:
        if self.l1_sensitivity is not None:
            return float(self.l1_sensitivity)
        return math.sqrt(self.l2_sensitivity_squared or 0)


@dataclass(frozen=True)
class Cost:
    """What a release spends from one participant's budget."""

    epsilon: Fraction = Fraction(0)
    rho: Fraction = Fraction(0)
    _hash: int = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        for name in ("epsilon", "rho"):
            value = exact(getattr(self, name), name)
            if value < 0:
                raise UsageError(f"{name} must be non-negative")
            object.__setattr__(self, name, value)
        object.__setattr__(self, "_hash", hash((self.epsilon, self.rho)))

    def __hash__(self) -> int:
        return self._hash  # computed once (see "frozen values" above)

    def __add__(self, other: Cost) -> Cost:
        return Cost(self.epsilon + other.epsilon, self.rho + other.rho)

    def times(self, n: int) -> Cost:
        return Cost(self.epsilon * n, self.rho * n)


@dataclass(frozen=True)
class Guarantee:
    """What a release protects, at what cost, and what it does not protect."""

    release: Literal["matrix", "aggregate"]
    mechanism: Mechanism
    unit: PrivacyUnit
    neighbours: str
    epsilon: Fraction | None  # pure DP (discrete Laplace)
    rho: Fraction | None  # zCDP (discrete Gaussian)
    delta: Fraction | None  # for the display conversion only
    grid_step: Fraction  # of the clipped scores
    value_range: tuple[Fraction, Fraction]
    contribution_bound: str
    components: tuple[Component, ...]
    not_protected: tuple[str, ...]
    notes: tuple[str, ...] = field(default=())

    @property
    def approx_epsilon(self) -> Fraction | None:
        """For zCDP: the epsilon of the (epsilon, delta)-DP it implies (display)."""
        if self.rho is None or self.delta is None:
            return None
        return zcdp_epsilon(self.rho, self.delta)

    @property
    def cost(self) -> Cost:
        """The cost per privacy unit (per rating for the rating unit)."""
        return Cost(self.epsilon or 0, self.rho or 0)

    def cost_for(self, n_ratings: int) -> Cost:
        """The participant-level cost for someone with `n_ratings` released ratings.

        Participant unit: the stated cost. Rating unit: n times it (each rating
        is its own cell with its own noise; changing all n composes), and even
        that leaves the missingness pattern unprotected.
        """
        if self.unit is PrivacyUnit.PARTICIPANT:
            return self.cost
        return self.cost.times(n_ratings)

    def as_dict(self) -> dict[str, object]:
        """JSON-ready (exact numbers as strings, e.g. "1/10")."""
        approx = self.approx_epsilon
        return {
            "release": self.release,
            "mechanism": self.mechanism,
            "privacy_unit": self.unit.value,
            "neighbouring_datasets": self.neighbours,
            "epsilon": _s(self.epsilon),
            "rho": _s(self.rho),
            "approx_dp": None if approx is None else
            {"epsilon_upper_bound": f"{float(approx):.6g}", "delta": _s(self.delta)},
            "grid_step": _s(self.grid_step),
            "value_range": [_s(v) for v in self.value_range],
            "contribution_bound": self.contribution_bound,
            "components": [
                {"name": c.name, "mechanism": c.mechanism, "entries": c.entries,
                 "step": _s(c.step), "step_unit": c.step_unit,
                 "l1_sensitivity": c.l1_sensitivity,
                 "l2_sensitivity_squared": c.l2_sensitivity_squared,
                 "noise_scale" if c.mechanism == LAPLACE else "noise_sigma2": _s(c.noise),
                 "epsilon": _s(c.epsilon), "rho": _s(c.rho)}
                for c in self.components
            ],
            "not_protected": list(self.not_protected),
            "notes": list(self.notes),
        }


def _s(value: Fraction | None) -> str | None:
    return None if value is None else str(value)


# --------------------------------------------------------------------------- shared helpers


def choose_mechanism(epsilon: Exact | None, rho: Exact | None,
                     mechanism: Mechanism | None) -> tuple[Mechanism, Fraction]:
    """Exactly one of epsilon (discrete Laplace) or rho (discrete Gaussian)."""
    if (epsilon is None) == (rho is None):
        raise UsageError("give exactly one of epsilon (discrete Laplace) or rho (discrete Gaussian)")
    chosen: Mechanism = LAPLACE if epsilon is not None else GAUSSIAN
    if mechanism is not None and mechanism != chosen:
        raise UsageError("discrete-laplace takes epsilon, discrete-gaussian takes rho")
    amount = epsilon if epsilon is not None else rho
    assert amount is not None
    return chosen, _positive(amount, "epsilon" if chosen == LAPLACE else "rho")


def noise_parameter(mechanism: Mechanism, budget: Fraction, l1: int, l2_squared: int) -> Fraction:
    """Laplace scale l1/epsilon, or Gaussian sigma^2 = l2^2/(2 rho), in grid units."""
    if mechanism == LAPLACE:
        return noise.laplace_scale_for(budget, l1)
    if l2_squared < 1:
        raise UsageError("sensitivity must be positive")
    return Fraction(l2_squared) / (2 * budget)


def draw(mechanism: Mechanism, parameter: Fraction, size: int,
         source: noise.ByteSource | None) -> np.ndarray:
    """`size` exact integer noise values."""
    if mechanism == LAPLACE:
        return noise.discrete_laplace(parameter, size, source=source)
    return noise.discrete_gaussian(parameter, size, source=source)


def as_ratings(values: np.ndarray) -> np.ndarray:
    """A float copy of a non-empty 2-D matrix whose entries are finite or NaN."""
    try:
        arr = np.array(values, dtype=np.float64)
    except (TypeError, ValueError):
        raise InvalidInput("values must be a numeric matrix") from None
    if arr.ndim != 2 or arr.size == 0:
        raise InvalidInput("values must be a non-empty 2-D matrix (participants x items)")
    if np.isinf(arr).any():
        raise InvalidInput("values must be finite numbers or NaN (unrated)")
    return arr


def make_grid(low: Exact, high: Exact, grid_k: int) -> noise.FixedPointGrid:
    return noise.FixedPointGrid(exact(low, "low"), exact(high, "high"), grid_k)


# --------------------------------------------------------------------------- the matrix release


def matrix_sensitivity(unit: PrivacyUnit, n_items: int, span_units: int) -> tuple[int, int]:
    """(L1, L2 squared) sensitivity in grid units of one unit's change."""
    if unit is PrivacyUnit.PARTICIPANT:
        return n_items * span_units, n_items * span_units * span_units
    return span_units, span_units * span_units


def release_matrix(
    values: np.ndarray,
    *,
    low: Exact,
    high: Exact,
    grid_k: int,
    unit: PrivacyUnit = PrivacyUnit.PARTICIPANT,
    epsilon: Exact | None = None,
    rho: Exact | None = None,
    mechanism: Mechanism | None = None,
    delta: Exact = DEFAULT_DELTA,
    source: noise.ByteSource | None = None,
) -> tuple[np.ndarray, Guarantee]:
    """Noisy (participants x items) scores and their guarantee (see the module docstring).

    `values` uses NaN for "not rated". Released values are NOT clipped after
    noise (the noise stays unbiased); clipping them is free post-processing.
    """
    mech, budget = choose_mechanism(epsilon, rho, mechanism)
    try:
        unit = PrivacyUnit(unit)
    except ValueError:
        raise UsageError('unit must be "participant" or "rating"') from None
    grid = make_grid(low, high, grid_k)
    arr = as_ratings(values)
    rated = ~np.isnan(arr)
    span = grid.span_units
    l1, l2sq = matrix_sensitivity(unit, arr.shape[1], span)
    param = noise_parameter(mech, budget, l1, l2sq)
    out = np.full(arr.shape, np.nan)
    if unit is PrivacyUnit.PARTICIPANT:
        mid = (grid.low_units + grid.high_units) // 2
        units = np.where(rated, grid.quantise(np.where(rated, arr, 0.0)), mid)
        out[:] = grid.dequantise(units + draw(mech, param, arr.size, source).reshape(arr.shape))
    else:
        units = grid.quantise(arr[rated])
        out[rated] = grid.dequantise(units + draw(mech, param, units.size, source))
    component = Component(
        name="cells", mechanism=mech,
        entries=arr.size if unit is PrivacyUnit.PARTICIPANT else int(rated.sum()),
        step=Fraction(1, grid.k), step_unit="score",
        l1_sensitivity=l1 if mech == LAPLACE else None,
        l2_sensitivity_squared=l2sq if mech == GAUSSIAN else None,
        noise=param, epsilon=budget if mech == LAPLACE else None,
        rho=budget if mech == GAUSSIAN else None,
    )
    return out, _matrix_guarantee(unit, mech, budget, delta, grid, component, arr.shape[1])


def _matrix_guarantee(unit: PrivacyUnit, mech: Mechanism, budget: Fraction, delta: Exact,
                      grid: noise.FixedPointGrid, component: Component, n_items: int) -> Guarantee:
    if unit is PrivacyUnit.PARTICIPANT:
        mid = Fraction((grid.low_units + grid.high_units) // 2, grid.k)
        neighbours = ("replace one participant's row by any other: their values and which items "
                      "they rated")
        bound = (f"one participant's row: all {n_items} cells, each clipped to the range "
                 f"(unrated cells set to {mid} before noise)")
        lost = (
            "That a participant took part: the matrix has one row per included participant, so "
            "cohort membership (under pseudonyms) and the cohort's size are released.",
            f"Unrated cells were set to the public constant {mid} before noise: their released values "
            "are noise around that constant, not ratings, and must not be read as preferences.",
        )
        notes = (f"Every cell carries noise calibrated to a whole row ({n_items} items): with many "
                 "items this is very noisy; the aggregate release is the better choice for "
                 "training a recommender.",)
    else:
        neighbours = "change the value of one rating (the set of rated cells stays the same)"
        bound = "one rating, clipped to the range"
        lost = (
            "A participant's presence and their ratings as a whole are not protected; only single "
            "ratings are: changing all n ratings of one participant is bounded only by n times the "
            "per-rating epsilon (rho).",
            "Which items each participant rated is released in the clear: exactly the rated cells "
            "carry values (the missingness pattern is not protected).",
            "That a participant took part: the matrix has one row per included participant.",
        )
        notes = ()
    return Guarantee(
        release="matrix", mechanism=mech, unit=unit, neighbours=neighbours,
        epsilon=budget if mech == LAPLACE else None, rho=budget if mech == GAUSSIAN else None,
        delta=check_delta(delta) if mech == GAUSSIAN else None,
        grid_step=Fraction(1, grid.k), value_range=(grid.low, grid.high),
        contribution_bound=bound, components=(component,),
        not_protected=lost + NOT_PROTECTED_ALWAYS, notes=notes,
    )


# --------------------------------------------------------------------------- the accountant


@dataclass(frozen=True)
class Budget:
    """A purpose's per-participant budget: (epsilon, delta)-DP over all its releases.

    delta = 0 admits only pure-DP spending (any rho > 0 exceeds it).
    """

    epsilon: Fraction
    delta: Fraction = Fraction(0)

    _hash: int = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        object.__setattr__(self, "epsilon", _positive(self.epsilon, "budget epsilon"))
        d = exact(self.delta, "delta")
        if not 0 <= d < 1:
            raise UsageError("delta must be in [0, 1)")
        object.__setattr__(self, "delta", d)
        object.__setattr__(self, "_hash", hash((self.epsilon, self.delta)))

    def __hash__(self) -> int:
        return self._hash  # computed once (see "frozen values" above)


@dataclass(frozen=True)
class Ledger:
    """What one participant has spent for one purpose (exact)."""

    epsilon: Fraction = Fraction(0)
    rho: Fraction = Fraction(0)
    releases: int = 0
    _hash: int = field(init=False, repr=False, compare=False)

    def __post_init__(self) -> None:
        spent = Cost(self.epsilon, self.rho)  # validates: exact, non-negative
        object.__setattr__(self, "epsilon", spent.epsilon)
        object.__setattr__(self, "rho", spent.rho)
        if self.releases < 0:
            raise UsageError("releases must be non-negative")
        object.__setattr__(self, "_hash", hash((hash(spent), self.releases)))

    def __hash__(self) -> int:
        return self._hash  # computed once (see "frozen values" above)

    def spend(self, cost: Cost) -> Ledger:
        return Ledger(self.epsilon + cost.epsilon, self.rho + cost.rho, self.releases + 1)


def spent_epsilon(ledger: Ledger, delta: Exact) -> Fraction:
    """Upper bound of the total epsilon at `delta` (any delta if nothing was spent as rho)."""
    if ledger.rho == 0:
        return ledger.epsilon
    return ledger.epsilon + zcdp_epsilon(ledger.rho, delta)


def within(ledger: Ledger, budget: Budget) -> bool:
    """Is eps + rho + 2 sqrt(rho ln(1/delta)) <= budget, decided exactly (ln bounded above)."""
    rest = budget.epsilon - ledger.epsilon - ledger.rho
    if rest < 0:
        return False
    if ledger.rho == 0:
        return True
    if budget.delta == 0:
        return False
    return rest * rest >= 4 * ledger.rho * _ln_inverse_up(budget.delta)


def remaining_epsilon(ledger: Ledger, budget: Budget) -> Fraction:
    """Pure epsilon that may still be spent (a lower bound, 0 when spent)."""
    if ledger.rho and budget.delta == 0:
        return Fraction(0)
    return max(Fraction(0), budget.epsilon - spent_epsilon(ledger, budget.delta))

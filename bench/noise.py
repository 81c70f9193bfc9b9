"""Speed of the exact noise samplers against OpenDP's, measured in the same run.

OpenDP is a test-only dependency: it is imported lazily, and its figures are
None when it is not installed.
"""

from __future__ import annotations

import time
from collections.abc import Callable
from fractions import Fraction

from vault.privacy.noise import discrete_gaussian, discrete_laplace


def _rate(draw: Callable[[], object], count: int, clock: Callable[[], float]) -> float:
    start = clock()
    draw()
    return count / max(clock() - start, 1e-9)


def _opendp_measurements(
    scale: Fraction, sigma2: Fraction
) -> tuple[Callable[[list[int]], list[int]], Callable[[list[int]], list[int]], str] | None:
    try:
        import importlib.metadata

        import opendp.prelude as dp
    except ImportError:
        return None
    dp.enable_features("contrib")
    space = dp.vector_domain(dp.atom_domain(T="i64"))
    laplace = dp.m.make_laplace(space, dp.l1_distance(T="i64"), scale=float(scale))
    gaussian = dp.m.make_gaussian(space, dp.l2_distance(T="i64"), scale=float(sigma2) ** 0.5)
    return laplace, gaussian, importlib.metadata.version("opendp")


def bench_samplers(
    *,
    scale: Fraction = Fraction(3),
    sigma2: Fraction = Fraction(25),
    samples: int = 1_000_000,
    opendp_samples: int = 100_000,
    clock: Callable[[], float] = time.perf_counter,
) -> dict[str, object]:
    """Samples per second of our discrete Laplace and Gaussian and of OpenDP's
    integer Laplace and Gaussian on the same parameters, and the ratios.

    OpenDP is driven through its public vector measurement (a list of zeros in,
    a list of noisy ints out), which is how a caller would use it. Prints nothing.
    """
    discrete_laplace(scale, 1000)  # warm up numpy and the byte source
    result: dict[str, object] = {
        "laplace_scale": str(scale),
        "gaussian_sigma2": str(sigma2),
        "samples": samples,
        "laplace_per_s": _rate(lambda: discrete_laplace(scale, samples), samples, clock),
        "gaussian_per_s": _rate(lambda: discrete_gaussian(sigma2, samples), samples, clock),
        "opendp_version": None,
        "opendp_samples": opendp_samples,
        "opendp_laplace_per_s": None,
        "opendp_gaussian_per_s": None,
        "laplace_ratio": None,
        "gaussian_ratio": None,
    }
    reference = _opendp_measurements(scale, sigma2)
    if reference is None:
        return result
    laplace, gaussian, version = reference
    zeros = [0] * opendp_samples
    laplace(zeros[:1000])
    lap_rate = _rate(lambda: laplace(zeros), opendp_samples, clock)
    gauss_rate = _rate(lambda: gaussian(zeros), opendp_samples, clock)
    result.update(
        opendp_version=version,
        opendp_laplace_per_s=lap_rate,
        opendp_gaussian_per_s=gauss_rate,
        laplace_ratio=float(result["laplace_per_s"]) / lap_rate,  # type: ignore[arg-type]
        gaussian_ratio=float(result["gaussian_per_s"]) / gauss_rate,  # type: ignore[arg-type]
    )
    return result

"""The policy engine's decision function on a synthetic cohort (benchmarks only).

`synthetic_cohort` feeds the `decisions_per_s` target of `mindward bench` (bench/run.py);
`bench_decide` times `decide` alone against a bare dict loop.
"""

from __future__ import annotations

import datetime as dt
import time

from vault import crypto
from vault.policy.consent import ConsentTerms, ConsentVersion, record_consent
from vault.policy.decide import Request, decide
from vault.policy.policyset import PolicySet, load_default_policy


def synthetic_cohort(n: int) -> tuple[PolicySet, Request, dict[str, ConsentVersion | None],
                                      dict[str, bool], dt.datetime]:
    """`n` synthetic participants over four shared consent variants, and a release request
    that spends epsilon with every participant able to afford it."""
    policy = load_default_policy()
    at = dt.datetime(2026, 6, 15, 12, tzinfo=dt.UTC)
    variants = []
    for grant_rec in (True, False):
        for expires in (dt.date(2031, 3, 1), dt.date(2026, 6, 1)):
            answers = {
                "primary-analysis": {"granted": ["eeg-raw", "scores-derived", "ratings-explicit",
                                                 "demographics"], "explicit": True},
                "recommender-training": {"granted": ["eeg-raw", "scores-derived",
                                                     "ratings-explicit"] if grant_rec else []},
            }
            terms = ConsentTerms.model_validate({
                "form_version": policy.meta.form_versions[0], "signed": dt.date(2026, 3, 2),
                "expires": expires, "purposes": answers})
            variants.append(record_consent(terms, policy, participant_id=crypto.random_id(16),
                                           recorded_at=at))
    pids = [f"{i:032x}" for i in range(n)]
    consents: dict[str, ConsentVersion | None] = {
        pid: (None if i % 50 == 0 else variants[i % len(variants)]) for i, pid in enumerate(pids)}
    request = Request(actor="bench", role="analyst", purpose="recommender-training/canteen-menu",
                      categories=frozenset({"scores-derived", "ratings-explicit"}), export=True,
                      epsilon=0.25)
    return policy, request, consents, dict.fromkeys(pids, True), at


def bench_decide(n: int = 100_000, *, repeat: int = 3) -> dict[str, float]:
    """Time `decide` for a cohort of `n` synthetic participants against a baseline.

    The baseline is a bare loop doing one dict lookup and one dict store per
    participant (the least any decision needs), measured in the same run.
    Returns seconds (best of `repeat`), decisions per second and the ratio.
    """
    policy, request, consents, affordable, at = synthetic_cohort(n)
    pids = list(consents)
    best, base = float("inf"), float("inf")
    result = None
    for _ in range(repeat):
        t0 = time.perf_counter()
        result = decide(policy, request, consents, now=at, affordable=affordable)
        best = min(best, time.perf_counter() - t0)
        t0 = time.perf_counter()
        out = {}
        for pid in pids:
            out[pid] = consents.get(pid)
        base = min(base, time.perf_counter() - t0)
    assert result is not None
    return {
        "participants": float(n),
        "seconds": best,
        "decisions_per_second": n / best,
        "baseline_seconds": base,
        "ratio_to_baseline": best / base,
        "eligible": float(len(result.eligible)),
        "meets_target": float(n / best >= 100_000),
    }

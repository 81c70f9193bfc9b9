"""The decision benchmark's synthetic cohort and timer run (speed itself is never asserted)."""

from __future__ import annotations

from mindward_bench.decide import bench_decide, synthetic_cohort

from vault.policy.decide import decide


def test_bench_decide_runs_and_reports_without_timing_assertions() -> None:
    result = bench_decide(n=500, repeat=1)
    assert result["participants"] == 500 and result["decisions_per_second"] > 0
    assert 0 < result["eligible"] < 500 and result["baseline_seconds"] > 0


def test_the_synthetic_cohort_mixes_permits_and_refusals() -> None:
    policy, request, consents, affordable, at = synthetic_cohort(200)
    decision = decide(policy, request, consents, now=at, affordable=affordable)
    assert set(affordable) == set(consents) and all(affordable.values())
    refused = {r for d in decision.decisions.values() for r in d.reasons}
    assert decision.eligible and refused  # both branches of the per-participant loop run

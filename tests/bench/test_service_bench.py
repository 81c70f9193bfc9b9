"""The service benchmark runs end to end at a tiny size and reports its fields (speed itself is
never asserted: the figures are in docs/benchmarks.md). It starts a real `mindward serve`."""

from __future__ import annotations

import mindward_bench.service as service_bench
import pytest
from mindward_bench.run import SERVICE_SIZES

TINY = {"participants": 20, "recordings": 1, "record_s": 2, "clients": 3, "local_checks": 2,
        "service_checks": 7, "rounds": 2, "exports": 2}


@pytest.fixture(scope="module")
def figures(tmp_path_factory: pytest.TempPathFactory) -> dict:
    workdir = tmp_path_factory.mktemp("service-bench")
    result = service_bench.bench_service(workdir, **TINY)
    assert not any(workdir.iterdir())  # the bench's vault and exports are gone
    return result


def test_the_service_bench_reports_both_sides_of_each_ratio(figures: dict) -> None:
    # one in ten of the bench's participants did not grant raw EEG (bench/service.py's forms)
    assert figures["service_participants"] == 20 and figures["service_included"] == 18
    # every call answered and counted, each side measured in every round
    assert figures["service_calls"] == TINY["service_checks"] * TINY["rounds"]
    assert len(figures["inprocess_access_runs_per_s"]) == len(figures["service_access_runs_per_s"]) == 2
    assert figures["service_access_per_s"] == max(figures["service_access_runs_per_s"])
    for name in ("inprocess_access_per_s", "service_access_per_s", "vault_thread_per_s",
                 "inprocess_export_mib_s", "service_export_mib_s"):
        assert figures[name] > 0, name
    assert figures["service_access_vs_inprocess"] == pytest.approx(
        figures["service_access_per_s"] / figures["inprocess_access_per_s"])
    assert figures["service_export_vs_inprocess"] == pytest.approx(
        figures["service_export_mib_s"] / figures["inprocess_export_mib_s"])
    assert figures["service_bench_s"] > 0
    assert 0 < figures["service_access_p50_ms"] <= figures["service_access_p99_ms"]
    assert len(figures["service_export_runs_s"]) == len(figures["inprocess_export_runs_s"]) == 2
    parts = figures["service_export_parts_s"]
    assert min(figures["service_export_runs_s"]) == pytest.approx(sum(parts.values()), rel=1e-3)


def test_the_report_prints_the_service_lines(figures: dict) -> None:
    report = "\n".join(service_bench.format_lines(figures))
    assert "through the service with 3 clients" in report and "received and verified" in report


def test_the_full_run_measures_the_cohort_issue_15_states() -> None:
    full = SERVICE_SIZES["full"]
    assert full["participants"] == 1000 and full["clients"] == 16


def test_an_export_that_does_not_verify_gives_no_figure(tmp_path, monkeypatch) -> None:
    """A broken receive (the archive's files changed on the way) must fail the run, not report
    a throughput for an export nobody could use."""
    import vault

    real = vault.verify_export

    def tampered(out, public_key):  # flip a byte of a recording received from the service
        if out.name.startswith("remote-export-"):
            received = sorted(out.rglob("*.edf"))
            assert received
            data = bytearray(received[0].read_bytes())
            data[-1] ^= 1
            received[0].write_bytes(bytes(data))
        return real(out, public_key)

    monkeypatch.setattr(vault, "verify_export", tampered)
    with pytest.raises(RuntimeError, match="from the service does not verify"):
        service_bench.bench_service(tmp_path, **{**TINY, "exports": 1, "rounds": 1, "service_checks": 3})
    assert not any(tmp_path.iterdir())

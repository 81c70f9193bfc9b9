"""`mindward bench --quick` runs end to end (the figures themselves are in docs/benchmarks.md)."""

from __future__ import annotations

import json

import pytest

from vault.cli.app import main


@pytest.mark.slow
def test_quick_bench_reports_every_target(capsys) -> None:
    assert main(["bench", "--quick", "--json"]) == 0
    report = json.loads(capsys.readouterr().out)
    assert set(report["targets"]) >= {"store_vs_raw", "read_vs_raw", "store_1gib_peak_mib",
                                      "audit_single_vs_sqlite", "audit_batch_vs_sqlite",
                                      "audit_verify_vs_hashlib", "decisions_per_s",
                                      "ingest_vs_read_aes", "ingest_peak_mib",
                                      "service_access_vs_inprocess", "service_export_vs_inprocess"}
    for target in report["targets"].values():
        assert isinstance(target["met"], bool) and target["value"] > 0
    # the baselines were really measured in this run
    assert report["raw_write_mib_s"] > 0 and report["hashlib_s"] > 0 and report["edfio_read_aes_s"] > 0

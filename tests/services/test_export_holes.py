"""Holes an attack on the exports found, each closed with a test that fails on the code before:
the utility report is for stewards and takes no seed; a release's columns come from a public
catalogue, never the data; the aggregate states and charges what holds (replace-one) and its
statistics lie in their feasible ranges; export files are private whatever the umask; the
vault keeps no item list in clear in its export records.

Outside sources: numpy (`linalg.eigvalsh`, means, products of deviations) and scipy.stats
(`describe`) are the references for the released statistics; Python's `hashlib` recomputes the
item-list digest; `os.stat` reads the modes; pyarrow reads the released Parquet back.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import os
import stat
from fractions import Fraction
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy import stats

from tests.clock import ManualClock, ctx_at
from tests.conftest import TEST_PASSPHRASE, assert_absent
from tests.services.test_export_matrix import CATALOGUE, EXAMPLES, MENU, RATINGS, REC, make_policy
from vault import InvalidInput, PolicyRefusal, Vault
from vault.privacy.aggregate import release_aggregate
from vault.services.export_matrix import PSEUDONYM_COLUMN

T0 = dt.datetime(2026, 5, 1, 9, 0, tzinfo=dt.UTC)
NOW = dt.datetime(2026, 6, 15, 12, 0, tzinfo=dt.UTC)
ANALYST = "analyst passphrase long enough"


def form(code: str) -> bytes:
    text = (EXAMPLES / "consent-all-granted.toml").read_text()
    return text.replace('code = "TL-', f'code = "{code}-', 1).encode()


def build(root: Path, policy: Path | None, ratings: dict[int, dict[str, int]], *,
          n: int = 5) -> tuple[Vault, list[str], ManualClock]:
    """A vault (clock injected) with `n` participants; participant i rates `ratings[i]`."""
    clock = ManualClock(T0)
    v = Vault.init(root / "vault", TEST_PASSPHRASE, policy_dir=policy, clock=clock)
    pids = [v.enrol(form(f"p{i}"))["participant_id"] for i in range(n)]
    lines = ["participant_id,item_id,value"]
    lines += [f"{pids[i]},{item},{x}" for i, row in ratings.items() for item, x in row.items()]
    csv = root / "ratings.csv"
    csv.write_text("\n".join(lines) + "\n")
    v.ingest_scores(csv, "explicit")
    csv.unlink()
    clock.set(NOW)
    return v, pids, clock


def spent(v: Vault, purpose: str) -> dict[str, tuple[str, str, int]]:
    rows = v._conn.execute("SELECT pid, epsilon, rho, releases FROM budget_ledger WHERE purpose = ?",
                           (purpose,))
    return {pid: (e, r, k) for pid, e, r, k in rows}


@pytest.fixture(scope="module")
def policy_dir(tmp_path_factory: pytest.TempPathFactory) -> Path:
    return make_policy(tmp_path_factory.mktemp("policy"))


EVERYONE = {i: {"dish-00": i % 4, "dish-01": 3 - i % 4, "dish-02": 2} for i in range(5)}
TWENTY = {i: {"dish-00": i % 4, "dish-01": 3 - i % 4} for i in range(20)}  # the shipped minimum


# --------------------------------------------------------------------------- export utility


def test_the_utility_report_is_for_stewards_only_and_takes_no_seed(tmp_path: Path,
                                                                   policy_dir: Path) -> None:
    v, _, clock = build(tmp_path, policy_dir, EVERYONE)
    v.add_member("omar", "analyst", ANALYST)
    with pytest.raises(TypeError):  # a caller-chosen seed would replay one split on two vaults
        v.export_utility(REC, RATINGS, [1.0], tmp_path / "u.png", seed=7)
    v.close()
    with Vault.open(tmp_path / "vault", ANALYST, member="omar", clock=clock) as analyst:
        before = analyst._audit.size
        with pytest.raises(PolicyRefusal, match="stewards only") as err:
            analyst.export_utility(REC, RATINGS, [1.0], tmp_path / "u.png")
        assert err.value.exit_code == 4
        assert not (tmp_path / "u.png").exists()
    with Vault.open(tmp_path / "vault", TEST_PASSPHRASE, clock=clock) as steward:  # reads the log
        refusals = [e for e in steward.audit_entries(before) if e["action"] == "export.utility"]
    assert [(e["decision"], e["reasons"]) for e in refusals] == [("refuse", ["role-not-allowed"])]


# --------------------------------------------------------------------------- the item catalogue


def test_the_columns_and_noise_scale_do_not_depend_on_the_data(tmp_path: Path,
                                                               policy_dir: Path) -> None:
    # one extra rating of an item nobody rated changed the columns and the noise scale before
    v, pids, clock = build(tmp_path, policy_dir, EVERYONE)
    with v:
        first = v.export_matrix(REC, RATINGS, tmp_path / "a", epsilon=0.5)
        clock.set(T0)
        extra = tmp_path / "extra.csv"
        extra.write_text(f"participant_id,item_id,value\n{pids[0]},dish-07,3\n")
        v.ingest_scores(extra, "explicit")
        clock.set(NOW)
        second = v.export_matrix(REC, RATINGS, tmp_path / "b", epsilon=0.5)
    columns = [pq.read_table(tmp_path / k / "matrix.parquet").column_names for k in "ab"]
    assert columns[0] == columns[1] == [PSEUDONYM_COLUMN, *sorted(CATALOGUE)]
    scales = [r["guarantee"]["components"][0]["noise_scale"] for r in (first, second)]
    assert scales[0] == scales[1] == str(len(CATALOGUE) * 3 * 2)  # items x span 3 / epsilon 1/2
    body = json.loads((tmp_path / "b" / "manifest.json").read_text())["body"]
    assert body["items"]["ids"] == sorted(CATALOGUE) and "catalogue" in body["items"]["source"]


def test_without_a_catalogue_a_noised_release_is_refused(tmp_path: Path) -> None:
    v, _, _ = build(tmp_path, None, TWENTY, n=20)  # the shipped policy declares no catalogue
    with v:
        before = v._audit.size
        with pytest.raises(PolicyRefusal, match="item catalogue") as err:
            v.export_matrix(REC, RATINGS, tmp_path / "o", epsilon=0.5)
        assert err.value.exit_code == 4
        entry = [e for e in v.audit_entries(before) if e["action"] == "export.matrix"]
        assert entry and entry[0]["reasons"] == ["no-item-catalogue"]
        assert not (tmp_path / "o").exists() and not spent(v, REC)


def test_requested_items_must_lie_inside_the_declared_catalogue(tmp_path: Path,
                                                                policy_dir: Path) -> None:
    v, _, _ = build(tmp_path, policy_dir, EVERYONE)
    with v, pytest.raises(InvalidInput, match="outside the policy set's catalogue") as err:
        v.export_matrix(REC, RATINGS, tmp_path / "o", epsilon=0.5, items=["dish-00", "pasta-9"])
    assert err.value.exit_code == 8 and not (tmp_path / "o").exists()


def test_ingest_refuses_items_outside_the_catalogue_with_the_row_and_stores_nothing(
        tmp_path: Path, policy_dir: Path) -> None:
    v, pids, clock = build(tmp_path, policy_dir, EVERYONE)
    with v:
        clock.set(T0)
        stored = v._conn.execute("SELECT COUNT(*) FROM score_batches").fetchone()[0]
        bad = tmp_path / "bad.csv"
        bad.write_text(f"participant_id,item_id,value\n{pids[1]},dish-03,1\n{pids[2]},pasta-9,2\n")
        with pytest.raises(InvalidInput, match="row 3: item_id is not in") as err:
            v.ingest_scores(bad, "explicit")
        assert err.value.exit_code == 8
        assert v._conn.execute("SELECT COUNT(*) FROM score_batches").fetchone()[0] == stored
        assert b"pasta-9" not in str(err.value).encode()  # the message names the row, not the id


@pytest.mark.parametrize(("change", "message"), [
    ('items = ["dish-00", "dish-00"]', "listed twice"),
    ('items = ["dish 00"]', "items"),
    ('items = ["' + "d" * 65 + '"]', "items"),
])
def test_a_malformed_catalogue_stops_the_policy_set(tmp_path: Path, change: str,
                                                    message: str) -> None:
    from vault.policy.policyset import load_policy_dir

    target = make_policy(tmp_path)
    path = target / "categories.toml"
    text = path.read_text()
    start = text.index("items = [")
    end = text.index("]\n", start) + 1
    path.write_text(text[:start] + change + text[end:])
    with pytest.raises(InvalidInput, match=message):
        load_policy_dir(target)
    path.write_text(text.replace("[categories.demographics]",
                                 '[categories.demographics]\nitems = ["x"]', 1))
    with pytest.raises(InvalidInput, match="only scores and ratings"):
        load_policy_dir(target)


def test_export_records_keep_no_item_list_in_clear(tmp_path: Path) -> None:
    # items given with a request (no catalogue declared) must not stay in the database
    items = ["dish-00", "dish-01", "dish-02", "zz-requested-only"]
    v, _, _ = build(tmp_path, None, TWENTY, n=20)
    with v:
        result = v.export_matrix(REC, RATINGS, tmp_path / "o", epsilon=0.5, items=items)
        kept = json.loads(v._conn.execute("SELECT manifest FROM exports WHERE export_id = ?",
                                          (result["export_id"],)).fetchone()[0])
        assert "ids" not in kept["body"]["items"]
        # hashlib over the ids joined by newlines, as docs/formats.md says
        digest = hashlib.sha256("\n".join(sorted(items)).encode()).hexdigest()
        assert kept["body"]["items"]["ids_sha256"] == digest
    assert_absent(tmp_path / "vault", b"zz-requested-only")  # DB, WAL, blobs, tmp
    assert b"zz-requested-only" in (tmp_path / "o" / "matrix.parquet").read_bytes()


# --------------------------------------------------------------------------- the aggregate


def test_the_aggregate_states_and_charges_replace_one(tmp_path: Path, policy_dir: Path) -> None:
    v, pids, _ = build(tmp_path, policy_dir, EVERYONE)
    with v:
        v.export_matrix(MENU, RATINGS, tmp_path / "a", epsilon=0.1, release="aggregate")
        body = json.loads((tmp_path / "a" / "manifest.json").read_text())["body"]
        assert body["epsilon"] == "1/5" and "replace-one" in body["privacy"]["neighbouring_datasets"]
        assert spent(v, MENU) == dict.fromkeys(pids, ("1/5", "0", 1))  # 2 x 0.1, exactly
        v.export_matrix(REC, RATINGS, tmp_path / "g", rho=0.001, release="aggregate")
        assert spent(v, REC) == dict.fromkeys(pids, ("1/5", "1/250", 2))  # parent: + 4 x rho
        # the cap is judged on what is charged: 0.3 per release is within the child's 0.5,
        # but twice it is not
        with pytest.raises(PolicyRefusal, match="release-epsilon-exceeds-cap"):
            v.export_matrix(MENU, RATINGS, tmp_path / "c", epsilon=0.3, release="aggregate")


def _check_feasible(rel, lo: float, hi: float) -> None:
    cov = rel.covariance
    assert np.all((rel.means >= lo) & (rel.means <= hi))
    assert np.allclose(cov, cov.T)
    scale = max(1.0, float(np.abs(cov).max()))
    assert np.linalg.eigvalsh(cov).min() >= -1e-9 * scale  # numpy's eigenvalues: PSD
    var = np.diag(cov)
    assert np.all(var >= 0) and np.all(var <= ((hi - lo) / 2) ** 2 + 1e-12)
    sd = np.sqrt(var)
    assert np.all(np.abs(cov) <= np.outer(sd, sd) + 1e-9)  # correlations within [-1, 1]


def test_a_constant_cohort_gets_feasible_means_and_variances() -> None:
    # everyone rates every item 3 on the 0-3 scale: variances of 9-14 came out before
    values = np.full((30, 6), 3.0)
    for _ in range(5):
        rel, _ = release_aggregate(values, low=0, high=3, grid_k=1, max_items_per_participant=6,
                                   epsilon=0.5)
        _check_feasible(rel, 0.0, 3.0)


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(n=st.integers(1, 25), m=st.integers(1, 6), eps=st.sampled_from([0.05, 0.5, 5.0]),
       seed=st.integers(0, 2**16), gaussian=st.booleans())
def test_released_statistics_always_lie_in_their_feasible_ranges(n: int, m: int, eps: float,
                                                                 seed: int, gaussian: bool) -> None:
    rng = np.random.default_rng(seed)
    values = rng.integers(0, 4, (n, m)).astype(float)
    values[rng.random((n, m)) < 0.3] = np.nan
    budget = {"rho": eps / 10} if gaussian else {"epsilon": eps}
    rel, _ = release_aggregate(values, low=0, high=3, grid_k=1, max_items_per_participant=m,
                               **budget)
    _check_feasible(rel, 0.0, 3.0)


def test_with_little_noise_the_statistics_match_numpy() -> None:
    # everyone rates every item (equal weights), values 1-3 on a 0-4 scale (deviations from any
    # centre in [1, 3] stay within the clamp B = 2): the release must approach numpy's figures
    rng = np.random.default_rng(11)
    values = rng.integers(1, 4, (400, 4)).astype(float)
    rel, _ = release_aggregate(values, low=0, high=4, grid_k=1, max_items_per_participant=4,
                               epsilon=2000)
    np.testing.assert_allclose(rel.means, values.mean(axis=0), atol=0.02)
    centres = np.round(rel.means)  # the covariance is centred on the released means' grid points
    dev = values - centres
    reference = dev.T @ dev / len(values)  # numpy: mean products of deviations
    np.testing.assert_allclose(rel.covariance, reference, atol=0.03)
    described = stats.describe(values, ddof=0)  # scipy.stats' variance of each item
    centred_shift = (values.mean(axis=0) - centres) ** 2
    np.testing.assert_allclose(np.diag(rel.covariance), described.variance + centred_shift,
                               atol=0.03)


def test_feasible_covariance_keeps_a_valid_matrix_and_repairs_a_broken_one() -> None:
    from vault.privacy.aggregate import feasible_covariance

    rng = np.random.default_rng(3)
    a = rng.normal(size=(5, 5)) * 0.4
    valid = a @ a.T
    np.testing.assert_allclose(feasible_covariance(valid, 10.0), valid, atol=1e-12)
    broken = np.array([[12.0, 9.0, -20.0], [9.0, -1.0, 0.5], [-20.0, 0.5, 4.0]])
    fixed = feasible_covariance(broken, 2.25)
    assert np.linalg.eigvalsh(fixed).min() >= -1e-12 and np.diag(fixed).max() <= 2.25


# --------------------------------------------------------------------------- file modes


def test_export_files_are_private_whatever_the_umask(tmp_path: Path, policy_dir: Path) -> None:
    v, _, _ = build(tmp_path, policy_dir, EVERYONE)
    old = os.umask(0)
    try:
        with v:
            v.export_matrix(REC, RATINGS, tmp_path / "new" / "deeper" / "m", epsilon=0.5)
    finally:
        os.umask(old)
    root = tmp_path / "new"
    for path in [root, *root.rglob("*")]:
        mode = stat.S_IMODE(path.stat().st_mode)
        assert mode == (0o700 if path.is_dir() else 0o600), (path, oct(mode))
    assert len(list(root.rglob("*.parquet"))) == 1


def test_budget_refund_credits_back_exactly(tmp_path: Path, policy_dir: Path) -> None:
    from vault.privacy.accountant import Cost
    from vault.services import budget
    from vault.storage import db as storage

    v, pids, _ = build(tmp_path, policy_dir, EVERYONE)
    with v:
        budget.charge(ctx_at(v, NOW), MENU, {p: Cost(epsilon=Fraction(1, 10)) for p in pids}, export_id="x-a")
        with storage.transaction(v._conn):
            purposes = budget.charge_in_transaction(
                v._context(), MENU, {p: Cost(epsilon=Fraction(1, 5)) for p in pids}, export_id="x-b",
                at="2026-06-15T12:00:00Z")
        assert purposes == [MENU, REC] and spent(v, REC) == dict.fromkeys(pids, ("3/10", "0", 2))
        with storage.transaction(v._conn):
            budget.refund_in_transaction(v._context(), MENU, purposes,
                                         {p: Cost(epsilon=Fraction(1, 5)) for p in pids},
                                         export_id="x-b", at="2026-06-15T12:00:00Z")
        for purpose in (MENU, REC):
            assert spent(v, purpose) == dict.fromkeys(pids, ("1/10", "0", 1))


def test_an_eeg_export_is_private_whatever_the_umask(tmp_path: Path) -> None:
    from tests.services.test_export_eeg import SOURCE

    clock = ManualClock(NOW)
    with Vault.init(tmp_path / "vault", TEST_PASSPHRASE, clock=clock) as v:
        for i in range(5):  # the primary analysis' minimum cohort
            v.ingest_eeg(v.enrol(form(f"e{i}"))["participant_id"], SOURCE)
        old = os.umask(0)
        try:
            v.export_eeg("primary-analysis", tmp_path / "bids")
        finally:
            os.umask(old)
    paths = [tmp_path / "bids", *(tmp_path / "bids").rglob("*")]
    assert any(p.suffix == ".edf" for p in paths)
    for path in paths:
        mode = stat.S_IMODE(path.stat().st_mode)
        assert mode == (0o700 if path.is_dir() else 0o600), (path, oct(mode))


# --------------------------------------------------------------------------- failures in-process


def test_a_failure_before_any_file_is_refunded_and_after_is_not(tmp_path: Path, policy_dir: Path,
                                                                monkeypatch: pytest.MonkeyPatch
                                                                ) -> None:
    import vault.services.export_matrix as em
    from vault import Conflict
    from vault.services import export_runs

    v, pids, _ = build(tmp_path, policy_dir, EVERYONE)
    with v:
        (tmp_path / "a-file").write_text("x")
        with pytest.raises(Conflict, match="not a folder"):  # checked before anything is charged
            v.export_matrix(REC, RATINGS, tmp_path / "a-file" / "out", epsilon=0.5)
        assert not spent(v, REC)

        def broken(*_: object) -> None:
            raise OSError("disk went away")

        before = v._audit.size
        with monkeypatch.context() as patch:  # charged, nothing written yet: credited back
            patch.setattr(export_runs, "writing", broken)
            with pytest.raises(OSError):
                v.export_matrix(REC, RATINGS, tmp_path / "o", epsilon=0.5)
        assert not spent(v, REC) and not (tmp_path / "o").exists()
        settled = [e["details"] for e in v.audit_entries(before) if e["action"] == "export.settle"]
        assert [(d["state_found"], d["outcome"]) for d in settled] == [("staged", "refunded")]
        assert any(e["action"] == "budget.refund" for e in v.audit_entries(before))
        before = v._audit.size
        with monkeypatch.context() as patch:  # files were being written: the charge stands
            patch.setattr(em, "write_table", broken)
            with pytest.raises(OSError):
                v.export_matrix(REC, RATINGS, tmp_path / "o", epsilon=0.5)
        assert spent(v, REC) == dict.fromkeys(pids, ("1/2", "0", 1))
        settled = [e["details"] for e in v.audit_entries(before) if e["action"] == "export.settle"]
        assert [(d["state_found"], d["outcome"]) for d in settled] == [
            ("writing", "charged-not-released")]
        assert sorted(p.name for p in tmp_path.iterdir()) == ["a-file", "vault"]  # no debris


def test_the_cli_refuses_in_one_line(capsys, monkeypatch: pytest.MonkeyPatch, tmp_path: Path) -> None:
    from vault.cli.app import main

    monkeypatch.setenv("MINDWARD_PASSPHRASE", TEST_PASSPHRASE)
    monkeypatch.setenv("MINDWARD_VAULT", str(tmp_path / "vault"))
    assert main(["init"]) == 0
    capsys.readouterr()
    code = main(["export", "matrix", "--purpose", REC, "--category", RATINGS, "--epsilon", "0.5",
                 "--out", str(tmp_path / "o")])
    _, err = capsys.readouterr()
    assert code == 4 and err.count("\n") == 1 and "item catalogue" in err
    code = main(["export", "utility", "--purpose", REC, "--category", RATINGS, "--plot",
                 str(tmp_path / "u.png"), "--seed", "7"])
    capsys.readouterr()
    assert code == 2  # there is no seed to choose


def test_an_items_file_is_bounded(tmp_path: Path) -> None:
    from vault import UsageError
    from vault.services.export_matrix import MAX_ITEMS_FILE, read_items

    big = tmp_path / "big.txt"
    big.write_bytes(b"dish-00\n" * (MAX_ITEMS_FILE // 8 + 1))
    with pytest.raises(InvalidInput, match="larger than"):
        read_items(big)
    many = tmp_path / "many.txt"
    many.write_text("".join(f"d{j}\n" for j in range(100_001)))
    with pytest.raises(UsageError, match="more than 100000"):
        read_items(many)
    bad = tmp_path / "bad.txt"
    bad.write_bytes(b"dish-00\n\xff\n")
    with pytest.raises(InvalidInput, match="not UTF-8"):
        read_items(bad)

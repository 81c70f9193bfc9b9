"""`mindward export matrix`: a policy-checked, pseudonymised, differentially private
release of preference scores or ratings, and `mindward export utility`.

The flow of one export (every step audited):
1. Candidates are the living participants holding batches of the category
   (metadata only). Their ledgers give each one's remaining budget.
2. The policy engine decides the cohort (consent, roles, expiry, minimum
   cohort, budget, recipient, per-rating units); a refusal names counts per
   reason, never who.
3. Every granted batch is read through the one door (`Context.read_for_release`: plaintext
   only to the release mechanism).
4. The matrix (participants x items) is released with exact discrete Laplace
   or Gaussian noise (`vault.privacy.accountant.release_matrix`), or as participant-level
   DP statistics (`vault.privacy.aggregate.release_aggregate`).
5. The run is recorded and the budget charged in one transaction before any
   file exists, the files are written into a staging folder, the manifest is
   signed and the lineage recorded (`vault.services.exports.sign_and_record`), and the
   folder is renamed into place (`vault.services.export_runs`: a run killed before any
   file was written is refunded at the next open, one killed after the files
   were signed is finished, one killed in between keeps its charge).

Items are public dish ids. The item list is part of the release, so it never
comes from the data (the union of what the cohort rated would say that someone
rated an item): it is the policy set's catalogue for the category, or the
`items` given with the request (inside that catalogue when one is declared);
with neither the release is refused.
"""

from __future__ import annotations

import datetime as dt
import os
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from fractions import Fraction
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np

from vault import crypto
from vault.audit import manifest
from vault.errors import (
    IntegrityError,
    InvalidInput,
    NotFound,
    PolicyRefusal,
    UsageError,
)
from vault.formats import scores
from vault.policy.policyset import ITEM_ID_PATTERN, MAX_CATALOGUE
from vault.privacy.accountant import (
    GAUSSIAN,
    LAPLACE,
    Cost,
    Guarantee,
    Mechanism,
    PrivacyUnit,
    choose_mechanism,
    release_matrix,
    zcdp_epsilon,
)
from vault.privacy.aggregate import AggregateRelease, release_aggregate
from vault.services import budget, export_runs, exports
from vault.storage import recordings
from vault.times import iso_utc

if TYPE_CHECKING:
    from vault.policy.engine import Grant
    from vault.privacy.recommend import UtilityReport
    from vault.services.context import Context

MANIFEST_NAME = "manifest.json"
PSEUDONYM_COLUMN = "_pseudonym"  # item ids start with a letter or digit: no clash possible
ITEM_ID = re.compile(ITEM_ID_PATTERN)  # as vault.formats.scores accepts them
MAX_ITEMS_FILE = 8 << 20  # an --items file: 100,000 ids of up to 64 characters fit
FORMATS = ("parquet", "csv")
RELEASES = ("matrix", "aggregate")
MECHANISMS: Mapping[str, Mechanism] = {"laplace": LAPLACE, "gaussian": GAUSSIAN,
                                       LAPLACE: LAPLACE, GAUSSIAN: GAUSSIAN}
SCORE_KINDS = ("scores", "ratings")
DEFAULT_REAL_GRID = 100  # real-valued scores are released on a grid of step 1/100
UTILITY_CAUTION = (
    "These RMSE figures come from the raw ratings without noise and are NOT differentially "
    "private: they are for the steward only; do not pass them on.")
EXPORT_CAUTIONS = (
    "The exact cohort size and, for matrix releases, one row per included participant are "
    "released: that someone is in the cohort is not protected.",
    "Released values are not clipped after noise and can lie outside the declared range; "
    "clipping them is free post-processing.",
)


# --------------------------------------------------------------------------- helpers


def _candidates(ctx: Context, category: str) -> dict[str, list[tuple[str, int]]]:
    """Living participants with score batches of `category`: pid -> [(blob id, rows)]."""
    rows = recordings.living_batches(ctx.conn, category)
    out: dict[str, list[tuple[str, int]]] = {}
    for pid, blob_id, n in rows:
        out.setdefault(pid, []).append((blob_id, int(n)))
    return out


def _check_items(items: Sequence[str]) -> list[str]:
    if isinstance(items, str | bytes):
        raise UsageError("the item catalogue is a list of item ids")
    listed = list(items)
    if not listed:
        raise UsageError("the item catalogue is empty")
    if len(listed) > MAX_CATALOGUE:
        raise UsageError(f"the item catalogue lists more than {MAX_CATALOGUE} items")
    for item in listed:
        if not isinstance(item, str) or not ITEM_ID.fullmatch(item):
            raise UsageError("item ids are 1-64 letters, digits or . _ : / - (first a letter or digit)")
    return sorted(set(listed))


def declared_items(ctx: Context, category: str) -> list[str] | None:
    """The category's public item catalogue from the policy set (sorted), or None."""
    spec = ctx.policy.categories.get(category)
    return sorted(spec.items) if spec is not None and spec.items is not None else None


def release_items(ctx: Context, category: str, items: Sequence[str] | None) -> tuple[list[str], str]:
    """The columns of a noised release and where they come from; never from the data.

    The policy set's catalogue, or `items` (which must lie inside it when one is
    declared); neither: PolicyRefusal, since the union of what the cohort rated
    would say that someone rated an item.
    """
    spec = ctx.policy.categories.get(category)
    if spec is None or spec.kind not in SCORE_KINDS:
        return [], "none"  # not a scores category: the policy engine and _scale_of refuse it
    declared = declared_items(ctx, category)
    if items is None:
        if declared is None:
            raise PolicyRefusal(
                f"refused: a noised release needs a public item catalogue: declare 'items' for "
                f"category {category} in the policy set or give the items", param="items")
        return declared, f"the policy set's catalogue for {category} (version {ctx.policy.version})"
    chosen = _check_items(items)
    if declared is not None and not set(chosen) <= set(declared):
        raise InvalidInput(f"an item given lies outside the policy set's catalogue for {category}",
                           param="items")
    return chosen, "the public item catalogue given with the request"


def read_items(path: Path) -> list[str]:
    """A public item catalogue file: one item id per line; blank lines and '#' comments skipped."""
    try:
        with open(path, "rb") as fh:
            raw = fh.read(MAX_ITEMS_FILE + 1)
    except OSError as exc:
        raise NotFound(f"cannot read {path}") from exc
    if len(raw) > MAX_ITEMS_FILE:
        raise InvalidInput(f"{path}: larger than {MAX_ITEMS_FILE} bytes")
    try:
        text = raw.decode("utf-8")
    except UnicodeDecodeError:
        raise InvalidInput(f"{path}: not UTF-8 text") from None
    items = [line.strip() for line in text.splitlines()]
    return _check_items([i for i in items if i and not i.startswith("#")])


def _scale_of(ctx: Context, category: str, grid_k: int | None) -> tuple[Fraction, Fraction, int]:
    """The category's declared range and the release grid (1 for integers, 1/100 for reals)."""
    spec = ctx.policy.categories.get(category)
    if spec is None or spec.kind not in SCORE_KINDS or spec.value_range is None:
        raise UsageError(f"category {category} holds no scores or ratings with a declared range")
    if grid_k is not None and (isinstance(grid_k, bool) or not isinstance(grid_k, int) or grid_k < 1):
        raise UsageError("grid_k must be a positive integer")
    k = grid_k or (1 if spec.value_type == "integer" else DEFAULT_REAL_GRID)
    low, high = (Fraction(str(x)) for x in spec.value_range)
    return low, high, k


def _audit_refusal(ctx: Context, purpose: str, reason: str, now: dt.datetime) -> None:
    ctx.audit_batch([{"actor": ctx.member, "action": "export.matrix", "purpose": purpose,
                     "decision": "refuse", "subjects": [], "reasons": [reason]}])


@dataclass(frozen=True)
class CohortRatings:
    """The granted cohort's ratings as flat arrays, read through the one door.

    `pids`: every granted participant (sorted), with ratings or without;
    rating r is `values[r]`, given by `pids[owner[r]]` to `items[codes[r]]`;
    `items` is the union of the items the cohort rated (data-dependent, sorted).
    """

    pids: list[str]
    owner: np.ndarray
    items: list[str]
    codes: np.ndarray
    values: np.ndarray

    def cells(self, order: Sequence[str], items: Sequence[str]
              ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """(row, column, value) arrays: rows follow `order` (a permutation of `pids`),
        columns `items`; ratings of items outside `items` are left out."""
        rank = {pid: i for i, pid in enumerate(order)}
        row_of = np.fromiter(map(rank.__getitem__, self.pids), np.int64, len(self.pids))
        index = {item: j for j, item in enumerate(items)}
        col_of = np.fromiter((index.get(item, -1) for item in self.items), np.int64, len(self.items))
        cols = col_of[self.codes]
        keep = cols >= 0
        return row_of[self.owner][keep], cols[keep], self.values[keep]


def _read_cohort(ctx: Context, grant: Grant, batches: Mapping[str, list[tuple[str, int]]],
                 now: dt.datetime) -> CohortRatings:
    """Every granted participant's ratings, read through the one door and decoded in bulk."""
    pids = sorted(ctx.grant_participants(grant))
    wanted = [blob_id for pid in pids for blob_id, _ in batches.get(pid, ())]
    owners: list[str] = []
    bodies: list[bytes] = []
    for _, pid, chunks in ctx.read_for_release(grant, wanted):  # one live decision, one audit batch
        owners.append(pid)
        bodies.append(b"".join(chunks))
    decoded = scores.decode_many(bodies)
    del bodies
    position = {pid: i for i, pid in enumerate(pids)}
    batch_owner = np.fromiter(map(position.__getitem__, owners), np.int64, len(owners))
    owner = np.repeat(batch_owner, decoded.counts)
    several = np.bincount(batch_owner, minlength=len(pids)) > 1
    if several.any():  # ingest refuses a second value for an item: two mean a damaged vault
        shared = several[owner]
        keys = owner[shared] * max(len(decoded.items), 1) + decoded.codes[shared]
        if np.unique(keys).size != keys.size:
            raise IntegrityError("a participant holds two stored values for one item")
    return CohortRatings(pids, owner, decoded.items, decoded.codes, decoded.values)


def dense(shape: tuple[int, int], rows: np.ndarray, cols: np.ndarray,
          values: np.ndarray) -> np.ndarray:
    """A (participants x items) matrix with NaN where nothing is given."""
    out = np.full(shape, np.nan, order="F")  # column-major: each item's column is contiguous
    out[rows, cols] = values
    return out


def release_cells(rows: np.ndarray, cols: np.ndarray, values: np.ndarray,
                  shape: tuple[int, int], *, unit: PrivacyUnit, low: Fraction, high: Fraction,
                  grid_k: int, epsilon: Fraction | None, rho: Fraction | None
                  ) -> tuple[np.ndarray, Guarantee]:
    """The noise of `release_matrix` for the rated cells (`rows`, `cols`, `values`).

    Rating unit: one noisy value per rated cell, in the cells' order; unrated
    cells stay empty. Each rated cell is noised on its own with sensitivity one
    range span, whatever the matrix shape, so the values are released as one
    1 x n matrix (same mechanism, same guarantee) without a dense copy.
    Participant unit: the whole dense (participants x items) matrix, every
    cell noised (which cells were rated is part of what is protected).
    """
    if unit is PrivacyUnit.RATING:
        if values.size == 0:
            raise NotFound("the granted participants hold no ratings of these items")
        noisy, g = release_matrix(values[None, :], low=low, high=high, grid_k=grid_k, unit=unit,
                                  epsilon=epsilon, rho=rho, delta=budget.ZCDP_DELTA)
        return noisy[0], g
    return release_matrix(dense(shape, rows, cols, values), low=low, high=high, grid_k=grid_k,
                          unit=unit, epsilon=epsilon, rho=rho, delta=budget.ZCDP_DELTA)


# --------------------------------------------------------------------------- files




def _file_entry(root: Path, name: str) -> dict[str, Any]:
    path = root / name
    digest = crypto.StreamingDigest()
    with open(path, "rb") as fh:
        while block := fh.read(1 << 20):
            digest.update(block)
        os.fsync(fh.fileno())
    return {"path": name, "size": path.stat().st_size, "sha256": digest.hexdigest()}


def write_table(root: Path, stem: str, columns: Mapping[str, Any], formats: Sequence[str]
                ) -> list[dict[str, Any]]:
    """Write one table as Parquet and/or CSV (pyarrow); returns the manifest's file entries."""
    import pyarrow as pa
    import pyarrow.csv as pa_csv
    import pyarrow.parquet as pq

    table = pa.table(dict(columns))
    entries = []
    if "parquet" in formats:
        # dictionary pages for the text columns only: noisy numbers rarely repeat, so for them
        # a dictionary costs time (a third of the write) and saves no space
        text = [f.name for f in table.schema if pa.types.is_string(f.type)]
        pq.write_table(table, root / f"{stem}.parquet", use_dictionary=text)
        entries.append(_file_entry(root, f"{stem}.parquet"))
    if "csv" in formats:
        pa_csv.write_csv(table, root / f"{stem}.csv")
        entries.append(_file_entry(root, f"{stem}.csv"))
    return entries


def _matrix_columns(labels: Sequence[str], items: Sequence[str], noisy: np.ndarray
                    ) -> dict[str, Any]:
    """The released table from a dense noisy matrix (participant unit: no empty cell)."""
    columns: dict[str, Any] = {PSEUDONYM_COLUMN: list(labels)}
    by_column = np.ascontiguousarray(noisy.T)
    for j, item in enumerate(items):
        columns[item] = by_column[j]
    return columns


def matrix_table(labels: Sequence[str], items: Sequence[str], rows: np.ndarray, cols: np.ndarray,
                 noisy: np.ndarray, unit: PrivacyUnit) -> dict[str, Any]:
    """The released matrix's columns from `release_cells`' output for `unit`."""
    if unit is PrivacyUnit.RATING:
        return _sparse_columns(labels, items, rows, cols, noisy)
    return _matrix_columns(labels, items, noisy)


def _sparse_columns(labels: Sequence[str], items: Sequence[str], rows: np.ndarray,
                    cols: np.ndarray, noisy: np.ndarray) -> dict[str, Any]:
    """The released table from noisy rated cells: an unrated cell is null (Parquet) or
    empty (CSV), never a number. Arrow columns are built over a validity bitmap, so
    neither a NaN fill nor a scan for NaN is needed."""
    import pyarrow as pa

    n = len(labels)
    data = np.zeros((len(items), n))  # item-major: each item's column is contiguous
    data[cols, rows] = noisy
    rated = np.zeros((len(items), n), dtype=bool)
    rated[cols, rows] = True
    bits = np.packbits(rated, axis=1, bitorder="little")  # Arrow's validity layout
    del rated
    filled = np.bincount(cols, minlength=len(items))
    columns: dict[str, Any] = {PSEUDONYM_COLUMN: list(labels)}
    for j, item in enumerate(items):
        columns[item] = pa.Array.from_buffers(pa.float64(), n, [pa.py_buffer(bits[j]),
                                                                pa.py_buffer(data[j])],
                                              null_count=n - int(filled[j]))
    return columns


def _aggregate_tables(rel: AggregateRelease, items: Sequence[str]) -> dict[str, dict[str, Any]]:
    upper = np.triu_indices(len(items))
    names = np.array(items, dtype=object)
    return {
        "items": {"item": list(items), "weight": rel.weights, "weighted_sum": rel.sums,
                  "mean": rel.means},
        "item_pairs": {"item_a": list(names[upper[0]]), "item_b": list(names[upper[1]]),
                       "co_weight": rel.co_weights[upper],
                       "covariance_sum": rel.covariance_sums[upper],
                       "covariance": rel.covariance[upper]},
    }


# --------------------------------------------------------------------------- the export


def export_matrix(
    ctx: Context,
    *,
    purpose: str,
    category: str,
    out: Path,
    epsilon: float | str | Fraction | None = None,
    rho: float | str | Fraction | None = None,
    release: str = "matrix",
    unit: str = "participant",
    mechanism: str | None = None,
    recipient: str | None = None,
    items: Sequence[str] | None = None,
    grid_k: int | None = None,
    max_items_per_participant: int | None = None,
    formats: Sequence[str] = FORMATS,
) -> dict[str, Any]:
    """Release the granted cohort's `category` with DP noise into the new folder `out`.

    `epsilon` (discrete Laplace, pure DP) or `rho` (discrete Gaussian, zCDP);
    `mechanism` ("laplace"/"gaussian"), when given, must agree. `unit` is
    "participant" (default) or "rating" (only where the policy allows it; matrix
    release only). `items`: the public item catalogue (recommended; see the
    module docstring). Returns a summary: counts only, no participant ids.
    """
    now = ctx.now()
    if release not in RELEASES:
        raise UsageError("the release is 'matrix' or 'aggregate'", param="release")
    try:
        privacy_unit = PrivacyUnit(unit)
    except ValueError:
        raise UsageError("the privacy unit is 'participant' or 'rating'", param="unit") from None
    if release == "aggregate" and privacy_unit is not PrivacyUnit.PARTICIPANT:
        raise UsageError("the aggregate release protects whole participants: the privacy unit is "
                         "'participant'", param="unit")
    if mechanism is not None and mechanism not in MECHANISMS:
        raise UsageError("the mechanism is 'laplace' or 'gaussian'", param="mechanism")
    mech, amount = choose_mechanism(epsilon, rho, MECHANISMS[mechanism] if mechanism else None)
    if not formats or any(f not in FORMATS for f in formats):
        raise UsageError("formats are 'parquet' and/or 'csv'")
    out = export_runs.check_out(out)
    if purpose in ctx.policy.purposes and not budget.budgets(ctx.policy, purpose):
        _audit_refusal(ctx, purpose, "no-privacy-budget", now)
        raise PolicyRefusal(f"refused: purpose {purpose} sets no per-participant privacy budget "
                            "(epsilon_per_participant); differentially private exports need one")
    try:
        item_list, item_source = release_items(ctx, category, items)
    except PolicyRefusal:
        _audit_refusal(ctx, purpose, "no-item-catalogue", now)
        raise

    # 1-2. candidates, their remaining budgets, the decision
    batches = _candidates(ctx, category)
    # the aggregate publishes the exact cohort size: what holds is replace-one neighbouring,
    # twice epsilon (four times rho) of its add/remove mechanism, and that is what is charged
    stated = amount * (1 if release == "matrix" else 2 if mech == LAPLACE else 4)
    unit_cost = Cost(epsilon=stated) if mech == LAPLACE else Cost(rho=stated)
    n_rows = {pid: sum(n for _, n in b) for pid, b in batches.items()}
    per_rating = privacy_unit is PrivacyUnit.RATING
    scaled = {n: unit_cost.times(n) for n in set(n_rows.values())} if per_rating else {}
    bound = {pid: scaled[n_rows[pid]] if per_rating else unit_cost for pid in batches}
    request_eps = stated if mech == LAPLACE else zcdp_epsilon(stated, budget.ZCDP_DELTA)
    verdict = budget.affordable(ctx, purpose, bound) if purpose in ctx.policy.purposes else {}
    grant = ctx.authorize_release(purpose, [category], export=True, epsilon=request_eps,
                        privacy_unit=privacy_unit.value, recipient=recipient,
                        participants=tuple(batches), affordable=verdict)
    refused = dict(sorted(grant.counts.items()))
    low, high, k = _scale_of(ctx, category, grid_k)

    # 3. read through the one door
    cohort = _read_cohort(ctx, grant, batches, now)
    labels = exports.pseudonyms(ctx, purpose, cohort.pids)
    order = sorted(cohort.pids, key=labels.__getitem__)  # row order reveals nothing internal
    rows, cols, values = cohort.cells(order, item_list)
    del cohort
    shape = (len(order), len(item_list))
    kept = np.bincount(rows, minlength=len(order))

    # 4. the release (in memory)
    eps_arg = amount if mech == LAPLACE else None
    rho_arg = amount if mech == GAUSSIAN else None
    if release == "matrix":
        noisy, guarantee = release_cells(rows, cols, values, shape, unit=privacy_unit, low=low,
                                         high=high, grid_k=k, epsilon=eps_arg, rho=rho_arg)
        tables = {"matrix": matrix_table([labels[p] for p in order], item_list, rows, cols, noisy,
                                         privacy_unit)}
        del noisy
    else:
        m = max_items_per_participant if max_items_per_participant is not None else len(item_list)
        rel, guarantee = release_aggregate(dense(shape, rows, cols, values), low=low, high=high,
                                           grid_k=k, max_items_per_participant=m, epsilon=eps_arg,
                                           rho=rho_arg, item_ids=item_list, delta=budget.ZCDP_DELTA)
        tables = _aggregate_tables(rel, item_list)
    del rows, cols, values
    by_count = {int(n): guarantee.cost_for(int(n)) for n in np.unique(kept)}
    costs = {pid: by_count[int(n)] for pid, n in zip(order, kept, strict=True)}

    # 5. record the run and charge (one transaction, before any file exists), write into the
    # staging folder, sign and record the lineage, rename into place (vault.services.export_runs)
    export_id = exports.new_export_id()
    staging = export_runs.begin(ctx, export_id=export_id, kind=f"preference-{release}",
                                purpose=purpose, out=out, at=iso_utc(now), costs=costs)
    try:
        export_runs.writing(ctx, export_id)
        files: list[dict[str, Any]] = []
        for stem, columns in tables.items():
            files += write_table(staging, stem, columns, formats)
        tables.clear()
        if release == "matrix":
            members = labels
        else:  # nothing per participant is released: names unlinkable to any other export
            members = exports.pseudonyms(ctx, f"{purpose}#aggregate:{export_id}", order)
        body = _manifest_body(release, category, guarantee, files, item_list, item_source,
                              budget.budgets(ctx.policy, purpose), k, mech, formats)
        signed = exports.sign_and_record(ctx, export_id=export_id, kind=f"preference-{release}",
                                         grant=grant, members=members, body=body,
                                         list_pseudonyms=release == "matrix")
        export_runs.publish(ctx, export_id, staging, out, signed, iso_utc(now))
    except BaseException:
        export_runs.abandon(ctx, export_id, iso_utc(now))
        raise
    return {
        "export_id": export_id, "out": str(out), "release": release, "category": category,
        "purpose": purpose, "recipient": signed["body"]["recipient"],
        "cohort_size": len(order), "refused_by_reason": refused, "items": len(item_list),
        "item_source": item_source, "guarantee": guarantee.as_dict(),
        "files": [f["path"] for f in files], "manifest": str(out / MANIFEST_NAME),
    }


def _manifest_body(release: str, category: str, g: Guarantee, files: list[dict[str, Any]],
                   items: Sequence[str], item_source: str, plan: Mapping[str, Any], k: int,
                   mech: Mechanism, formats: Sequence[str]) -> dict[str, Any]:
    per_rating = g.unit is PrivacyUnit.RATING
    body: dict[str, Any] = {
        "release": release, "category": category, "data_format": " and ".join(
            {"parquet": "Apache Parquet", "csv": "CSV (UTF-8)"}[f] for f in formats),
        "mechanism": g.mechanism, "privacy_unit": g.unit.value,
        "epsilon": None if g.epsilon is None else str(g.epsilon),
        "rho": None if g.rho is None else str(g.rho),
        "zcdp_delta": str(budget.ZCDP_DELTA) if mech == GAUSSIAN else None,
        "privacy": g.as_dict(),
        "budget": {
            "charged_purposes": list(plan),
            "accounting": ("basic composition of pure epsilon" if mech == LAPLACE else
                           f"zCDP: rho adds up; judged as (epsilon, delta) at delta "
                           f"{budget.ZCDP_DELTA}"),
            "cost_per_participant": (f"{'epsilon' if mech == LAPLACE else 'rho'} per rating "
                                     "times that participant's number of released ratings "
                                     "(admission was judged on all their stored ratings)"
                                     if per_rating else "the stated epsilon or rho"),
        },
        "items": {"count": len(items), "ids": list(items), "source": item_source},
        "grid_k": k, "pseudonym_column": PSEUDONYM_COLUMN if release == "matrix" else None,
        "files": files, "export_cautions": list(EXPORT_CAUTIONS),
    }
    if per_rating:
        body["rating_unit_warning"] = (
            "PER-RATING PRIVACY UNIT: only single ratings are protected. A participant's ratings as "
            "a whole, their presence, and which items they rated are NOT protected.")
    return body


# --------------------------------------------------------------------------- checking an export


def verify_export_dir(out: Path, public_key: bytes) -> dict[str, Any]:
    """Offline check with the vault's public key alone: the manifest's signature, the
    audit tree head it names, and every listed file's size and SHA-256; a file in the
    folder that the manifest does not list, or a listed path leaving the folder, fails."""
    from vault.audit.log import TreeHead
    from vault.errors import IntegrityError

    root = Path(out)
    path = root / MANIFEST_NAME
    try:
        raw = path.read_bytes()
    except OSError as exc:
        raise NotFound(f"no {MANIFEST_NAME} in {out}") from exc
    doc = manifest.load(raw, "the manifest")
    body = doc["body"]
    problems = [] if manifest.verify(doc, public_key, manifest.MANIFEST) else ["bad signature"]
    try:
        if not TreeHead.from_dict(body.get("audit_tree_head") or {}).verify(public_key):
            problems.append("the audit tree head's signature does not verify")
    except IntegrityError:
        problems.append("the manifest names no valid audit tree head")
    listed: set[str] = set()
    entries = body.get("files")
    if not isinstance(entries, list):
        entries = []
        problems.append("the manifest lists no files")
    for entry in entries:
        name = entry.get("path") if isinstance(entry, dict) else None
        if not isinstance(name, str) or not name or name.startswith("/") or ".." in Path(name).parts:
            problems.append("a listed file has no valid relative path")
            continue
        listed.add(name)
        target = root / name
        if not target.is_file():
            problems.append(f"missing {name}")
            continue
        digest = crypto.StreamingDigest()
        with open(target, "rb") as fh:
            while block := fh.read(1 << 20):
                digest.update(block)
        if digest.hexdigest() != entry.get("sha256") or target.stat().st_size != entry.get("size"):
            problems.append(f"altered {name}")
    for extra in sorted(p.relative_to(root).as_posix() for p in root.rglob("*") if p.is_file()):
        if extra != MANIFEST_NAME and extra not in listed:
            problems.append(f"unlisted file {extra}")
    return {"ok": not problems, "problems": problems, "export_id": body.get("export_id"),
            "files": len(listed)}


# --------------------------------------------------------------------------- utility


def export_utility(
    ctx: Context,
    *,
    purpose: str,
    category: str,
    epsilons: Sequence[float],
    out_png: Path,
    unit: str = "participant",
    rank: int = 3,
    test_fraction: float = 0.2,
    repeats: int = 1,
    items: Sequence[str] | None = None,
    grid_k: int | None = None,
) -> dict[str, Any]:
    """Held-out RMSE of a recommender trained on DP-noised data, per epsilon, inside the vault.

    Stewards only (others: PolicyRefusal, audited). The noise is the real
    matrix release (`release_matrix`, the same unit and grid as an export),
    but the model is scored on raw held-out ratings: the figures are NOT
    differentially private (two vaults that differ in one rating give
    different figures), so no budget is charged and they are for the steward
    only. Every random choice (split, baseline, noise) starts from the
    CSPRNG; no caller picks a seed, so nobody can replay a split to difference
    two runs.
    """
    now = ctx.now()
    from vault.formats.plot import plot_utility
    from vault.privacy.recommend import utility_curve

    ctx.require_steward("export.utility")
    try:
        privacy_unit = PrivacyUnit(unit)
    except ValueError:
        raise UsageError("the privacy unit is 'participant' or 'rating'", param="unit") from None
    if Path(out_png).suffix.lower() != ".png":
        raise UsageError("the utility plot is written as PNG: give a path ending in .png")
    catalogue = _check_items(items) if items is not None else declared_items(ctx, category)
    batches = _candidates(ctx, category)
    grant = ctx.authorize_release(purpose, [category], privacy_unit=privacy_unit.value,
                        participants=tuple(batches))
    low, high, k = _scale_of(ctx, category, grid_k)
    cohort = _read_cohort(ctx, grant, batches, now)
    item_list = catalogue if catalogue is not None else cohort.items
    if not item_list:
        raise NotFound("the granted participants hold no ratings")
    values = dense((len(cohort.pids), len(item_list)), *cohort.cells(cohort.pids, item_list))
    del cohort
    rank = max(1, min(rank, *values.shape))

    def noise_fn(train: np.ndarray, eps: float) -> np.ndarray:
        return release_matrix(train, low=low, high=high, grid_k=k, unit=privacy_unit, epsilon=eps)[0]

    # the split and the baseline draw from a generator keyed with 128 bits of the CSPRNG
    start = int.from_bytes(crypto.random_bytes(16), "big")
    report: UtilityReport = utility_curve(
        values, epsilons, noise_fn, rng=np.random.default_rng(start),
        value_range=(float(low), float(high)), rank=rank, test_fraction=test_fraction,
        repeats=repeats)
    del values
    png = plot_utility(report, Path(out_png))
    figures = report.as_dict()
    ctx.audit_batch([{"actor": ctx.member, "action": "export.utility", "purpose": purpose,
                     "decision": "done", "subjects": [],
                     "details": {"grant": grant.grant_id, "category": category,
                                 "privacy_unit": privacy_unit.value, "epsilons": figures["epsilons"],
                                 "released": "held-out RMSE figures only, to the steward; "
                                             "not differentially private"}}])
    return {"purpose": purpose, "category": category, "privacy_unit": privacy_unit.value,
            "report": figures, "table": report.table(), "png": str(png),
            "caution": UTILITY_CAUTION}

"""The synthetic demo study, checked with readers and statistics from outside the project.

Outside sources:
- pyedflib (an independent EDF+ reader, built on EDFlib) and mne's EDF reader;
- the EDF+ specification (Kemp & Olivan 2003) for the raw header and time-keeping TAL;
- mne's bundled 10-20/10-10 montage (colin27_1020) for valid electrode labels;
- scipy.stats (ttest_ind, spearmanr) for the statistics;
- RFC 2606 (".example" reserved) for the invented e-mail addresses.
"""

from __future__ import annotations

import csv
import datetime as dt
import json
import re
from pathlib import Path

import mne
import numpy as np
import pyedflib
import pytest
import scipy.stats
from hypothesis import given, settings
from hypothesis import strategies as st
from vault.demo_data import eeg
from vault.demo_data.generate import generate, main
from vault.demo_data.study import MAX_PARTICIPANTS, MIN_PARTICIPANTS, PURPOSES, build_study

from vault.errors import UsageError

N = MIN_PARTICIPANTS  # smallest allowed cohort keeps the module quick
SEED = 7
FS = 256


@pytest.fixture(scope="module")
def study(tmp_path_factory: pytest.TempPathFactory):
    return generate(tmp_path_factory.mktemp("demo") / "out", n_participants=N, seed=SEED)


@pytest.fixture(scope="module")
def meta(study) -> dict:
    return json.loads(study.study.read_text(encoding="utf-8"))


def _rows(path: Path) -> list[dict[str, str]]:
    with path.open(newline="", encoding="utf-8") as f:
        return list(csv.DictReader(f))


def _grid(path: Path) -> dict[tuple[str, str], str]:
    return {(r["participant_code"], r["item_id"]): r["value"] for r in _rows(path)}


def _read_pyedflib(path: Path) -> dict:
    """Everything the tests need from one file, read by pyedflib."""
    reader = pyedflib.EdfReader(str(path))
    try:
        onsets, durations, texts = reader.readAnnotations()
        return {
            "labels": reader.getSignalLabels(),
            "rates": [reader.getSampleFrequency(i) for i in range(reader.signals_in_file)],
            "units": [reader.getPhysicalDimension(i) for i in range(reader.signals_in_file)],
            "patient_code": reader.getPatientCode(),
            "patient_name": reader.getPatientName(),
            "birthdate": reader.getBirthdate(),
            "sex": reader.getSex(),
            "technician": reader.getTechnician(),
            "start": reader.getStartdatetime(),
            "annotations": list(zip(onsets, durations, texts, strict=True)),
            "pz": reader.readSignal(reader.getSignalLabels().index("Pz")),
        }
    finally:
        reader.close()


@pytest.fixture(scope="module")
def recordings(study) -> dict[str, dict]:
    return {code: _read_pyedflib(path) for code, path in study.eeg.items()}


def _stimuli(record: dict) -> list[tuple[float, str]]:
    return [(on, text.removeprefix("stim/")) for on, _, text in record["annotations"]
            if text.startswith("stim/")]  # fmt: skip


def _late_minus_baseline(signal: np.ndarray, onset_s: float) -> float:
    # Written here from the documented method, not imported from demo_data.eeg.
    i = round(onset_s * FS)
    base = signal[i - round(0.2 * FS) : i].mean()
    return float(signal[i + round(0.3 * FS) : i + round(0.6 * FS)].mean() - base)


# ------------------------------------------------------------------ EDF+ files


def test_files_listed_and_present(study, meta):
    assert sorted(study.eeg) == [p["lab_code"] for p in meta["participants"]]
    assert len(study.eeg) == N == meta["n_participants"]
    for path in (study.ratings, study.scores, study.stimuli, study.participants, study.study):
        assert path.is_file()
    assert meta["synthetic"] is True and "invented" in meta["notice"]


def test_pyedflib_reads_32_channels_at_256_hz_with_10_20_labels(recordings):
    # Electrode names from mne's bundled 10-20/10-10 montage, an outside list.
    valid = set(mne.channels.make_standard_montage("colin27_1020").ch_names)
    for record in recordings.values():
        assert len(record["labels"]) == 32
        assert len(set(record["labels"])) == 32
        assert set(record["labels"]) <= valid
        assert record["rates"] == [256.0] * 32
        assert record["units"] == ["uV"] * 32


def test_header_carries_invented_identity_to_scrub(recordings, meta, study):
    people = {r["lab_code"]: r for r in _rows(study.participants)}
    for entry in meta["participants"]:
        record = recordings[entry["lab_code"]]
        planted = entry["edf_identity"]
        assert record["patient_code"] == planted["patient_code"]
        # pyedflib shows the EDF+ underscores of the name subfield as spaces.
        assert record["patient_name"] == people[entry["lab_code"]]["name"]
        assert record["patient_name"].replace(" ", "_") == planted["name"]
        born = dt.datetime.strptime(record["birthdate"], "%d %b %Y").date()
        assert born.isoformat() == planted["birthdate"]
        assert record["sex"] == {"F": "Female", "M": "Male"}[planted["sex"]]
        assert record["technician"] == planted["technician"]
        start = dt.datetime.fromisoformat(entry["session_start"])
        assert dt.date(2026, 3, 1) <= start.date() <= dt.date(2026, 5, 31)
        # Whole seconds only: pyedflib 0.1.42 mis-scales the sub-second part.
        assert record["start"].replace(microsecond=0) == start.replace(microsecond=0)


def _raw_tals(path: Path) -> tuple[str, list[bytes]]:
    """Reserved field and each data record's annotation bytes, per the EDF+ spec."""
    raw = path.read_bytes()
    n_signals = int(raw[252:256])
    n_records = int(raw[236:244])
    header_bytes = int(raw[184:192])
    labels = [raw[256 + 16 * i : 256 + 16 * (i + 1)].decode().strip() for i in range(n_signals)]
    # samples per data record: 8 ASCII bytes per signal, after 216 bytes of other fields
    spr_at = 256 + n_signals * (16 + 80 + 8 + 8 + 8 + 8 + 8 + 80)
    samples = [int(raw[spr_at + 8 * i : spr_at + 8 * (i + 1)]) for i in range(n_signals)]
    record_bytes = 2 * sum(samples)
    ann = labels.index("EDF Annotations")
    at = header_bytes + 2 * sum(samples[:ann])
    tals = [
        raw[at + r * record_bytes : at + r * record_bytes + 2 * samples[ann]]
        for r in range(n_records)
    ]
    return raw[192:197].decode(), tals


def test_time_keeping_tals_carry_the_subsecond_start(study, meta):
    # EDF+ spec 2.2.4: each record's annotations start with the time-keeping TAL
    # "+<record start>\x14\x14"; the first one holds the sub-second part of the start.
    fractions = []
    for entry in meta["participants"]:
        reserved, tals = _raw_tals(study.eeg[entry["lab_code"]])
        assert reserved == "EDF+C"
        micro = dt.datetime.fromisoformat(entry["session_start"]).microsecond
        for index, tal in enumerate(tals):
            match = re.match(rb"\+(\d+(?:\.\d+)?)\x14\x14\x00", tal)
            assert match, tal[:40]
            assert float(match.group(1)) == index + micro / 1e6  # records are 1 s long
            # Short exact decimals only: EDFlib (behind pyedflib) rejects float noise.
            for onset in re.findall(rb"[+-](\d+(?:\.\d+)?)[\x14\x15]", tal):
                assert len(onset.partition(b".")[2]) <= 10, onset
        fractions.append(micro)
    assert any(fractions) and not all(fractions)


def test_annotations_stimuli_and_identifying_notes(recordings, meta, study):
    dish_ids = [r["item_id"] for r in _rows(study.stimuli)]
    codes = set(meta["eeg"]["event_codes"])
    people = {r["lab_code"]: r for r in _rows(study.participants)}
    for entry in meta["participants"]:
        record = recordings[entry["lab_code"]]
        shown = [dish for _, dish in _stimuli(record)]
        assert sorted(shown) == sorted(dish_ids * 2)
        # each block shows every dish once
        assert sorted(shown[:60]) == sorted(dish_ids) == sorted(shown[60:])
        notes = [text for _, _, text in record["annotations"] if text not in codes]
        assert len(notes) == entry["free_text_notes"] >= 1
        person = people[entry["lab_code"]]
        first = person["name"].split()[0]
        tech_surname = entry["edf_identity"]["technician"].split(".")[-1]
        assert all(first in n or tech_surname in n for n in notes)
        onsets = [on for on, _ in _stimuli(record)]
        # photos 1.4-1.7 s apart, onsets rounded to whole samples
        gaps = np.diff(onsets)
        assert gaps.min() >= 1.4 - 1 / FS and np.median(gaps) < 1.7


def test_mne_reads_files_and_units(study, meta):
    for entry in meta["participants"][:3]:
        raw = mne.io.read_raw_edf(study.eeg[entry["lab_code"]], preload=True, verbose="error")
        assert raw.info["sfreq"] == 256.0
        assert raw.ch_names == list(eeg.CHANNELS)
        assert raw.info["subject_info"]["his_id"] == entry["edf_identity"]["patient_code"]
        descriptions = list(raw.annotations.description)
        assert sum(d.startswith("stim/") for d in descriptions) == 120
        # mne scales to volts using the header's "uV": background EEG is tens of uV.
        rms_uv = np.sqrt((raw.get_data(picks=["Pz"]) ** 2).mean()) * 1e6
        assert 5 < rms_uv < 40
        fp1 = raw.get_data(picks=["Fp1"])[0] * 1e6
        assert np.ptp(fp1) > 100  # blinks


# ------------------------------------------------------------------ the late positivity


def test_late_positivity_grows_with_rating_pyedflib(recordings, study):
    ratings = _grid(study.ratings)
    high, low = [], []
    for code, record in recordings.items():
        for onset, dish in _stimuli(record):
            value = int(ratings[(code, dish)])
            amp = _late_minus_baseline(record["pz"], onset)
            (high if value >= 2 else low).append(amp)
    # scipy.stats.ttest_ind (Welch), one-sided: high-rated > low-rated at Pz, 300-600 ms.
    result = scipy.stats.ttest_ind(high, low, equal_var=False, alternative="greater")
    assert np.mean(high) - np.mean(low) > 1.0  # microvolts
    assert result.pvalue < 1e-6


def test_late_positivity_with_mne_epochs(study, meta):
    ratings = _grid(study.ratings)
    high, low = [], []
    for entry in meta["participants"][:6]:
        code = entry["lab_code"]
        raw = mne.io.read_raw_edf(study.eeg[code], preload=True, verbose="error")
        events, event_id = mne.events_from_annotations(raw, regexp="^stim/", verbose="error")
        epochs = mne.Epochs(
            raw, events, event_id, tmin=-0.2, tmax=0.8, baseline=(None, 0), picks=["Pz"],
            preload=True, verbose="error",
        )  # fmt: skip
        assert len(epochs) == 120
        code_of = {v: k.removeprefix("stim/") for k, v in event_id.items()}
        window = (epochs.times >= 0.3) & (epochs.times < 0.6)
        amps = epochs.get_data()[:, 0, window].mean(axis=1) * 1e6
        for amp, event in zip(amps, epochs.events[:, 2], strict=True):
            (high if int(ratings[(code, code_of[event])]) >= 2 else low).append(amp)
    result = scipy.stats.ttest_ind(high, low, equal_var=False, alternative="greater")
    assert result.pvalue < 0.01


def test_no_effect_before_the_stimulus(recordings, study):
    # Control: the pre-stimulus baseline must not know the rating (a shifted onset would).
    ratings = _grid(study.ratings)
    high, low = [], []
    for code, record in recordings.items():
        for onset, dish in _stimuli(record):
            i = round(onset * FS)
            amp = record["pz"][i - round(0.2 * FS) : i].mean()
            (high if int(ratings[(code, dish)]) >= 2 else low).append(amp)
    assert scipy.stats.ttest_ind(high, low, equal_var=False).pvalue > 1e-3


# ------------------------------------------------------------------ ratings and scores


def test_ratings_integers_0_to_3_full_grid(study):
    rows = _rows(study.ratings)
    assert list(rows[0]) == ["participant_code", "item_id", "value"]
    assert len(rows) == N * 60
    assert len({(r["participant_code"], r["item_id"]) for r in rows}) == N * 60
    values = [r["value"] for r in rows]
    assert all(re.fullmatch(r"[0-3]", v) for v in values)
    assert set(values) == {"0", "1", "2", "3"}


def test_scores_in_documented_range_and_correlate_with_ratings(study, meta):
    low_end, high_end = meta["scores"]["range"]
    assert (low_end, high_end) == (0.0, 1.0)
    ratings, scores = _grid(study.ratings), _grid(study.scores)
    assert ratings.keys() == scores.keys()
    keys = sorted(ratings)
    x = [int(ratings[k]) for k in keys]
    y = [float(scores[k]) for k in keys]
    assert all(low_end <= v <= high_end for v in y)
    rho, p = scipy.stats.spearmanr(x, y)  # scipy.stats.spearmanr, overall
    assert rho > 0.15 and p < 0.01


def test_scores_are_derived_from_the_recordings(recordings, study):
    # Recompute the documented method from pyedflib's view of three files (Pz, CPz, P3,
    # P4, CP1, CP2; blink epochs dropped at Fp1/Fp2 > 120 uV; z-score; logistic).
    scores = _grid(study.scores)
    sites = ("Pz", "CPz", "P3", "P4", "CP1", "CP2")
    for code in list(recordings)[:3]:
        reader = pyedflib.EdfReader(str(study.eeg[code]))
        try:
            labels = reader.getSignalLabels()
            signals = {c: reader.readSignal(labels.index(c)) for c in (*sites, "Fp1", "Fp2")}
        finally:
            reader.close()
        per_dish: dict[str, list[tuple[float, bool]]] = {}
        for onset, dish in _stimuli(recordings[code]):
            i = round(onset * FS)
            amp = np.mean([_late_minus_baseline(signals[c], onset) for c in sites])
            swing = max(np.ptp(signals[c][i - 51 : i + 205]) for c in ("Fp1", "Fp2"))
            per_dish.setdefault(dish, []).append((amp, swing <= 120.0))
        dishes = sorted(per_dish)
        means = np.array([
            np.mean([a for a, ok in per_dish[d] if ok] or [a for a, _ in per_dish[d]])
            for d in dishes
        ])  # fmt: skip
        z = (means - means.mean()) / means.std()
        expected = 1 / (1 + np.exp(-z))
        got = np.array([float(scores[(code, d)]) for d in dishes])
        np.testing.assert_allclose(got, expected, atol=6e-4)


def test_ratings_have_low_rank_structure():
    # A recommender needs shared structure: the top 3 singular values of the centred
    # ratings must explain more than when each person's ratings are shuffled.
    ratings = build_study(MAX_PARTICIPANTS, SEED).ratings.astype(float)
    centred = ratings - ratings.mean(axis=1, keepdims=True)

    def top3(m: np.ndarray) -> float:
        s = np.linalg.svd(m - m.mean(axis=0), compute_uv=False) ** 2
        return s[:3].sum() / s.sum()

    rng = np.random.default_rng(0)
    shuffled = [top3(np.array([rng.permutation(r) for r in centred])) for _ in range(20)]
    assert top3(centred) > max(shuffled) + 0.05


# ------------------------------------------------------------------ consent plan and contacts


def _check_plan(plan: list[dict], starts: dict[str, dt.date], reference: dt.date) -> None:
    n = len(plan)
    refuse_rec = sum(not c["grants"]["recommender-training"] for c in plan)
    refuse_ext = sum(not c["grants"]["external-sharing"] for c in plan)
    assert abs(refuse_rec - 0.20 * n) <= 0.5  # ~20 %, to the nearest person
    assert abs(refuse_ext - 0.15 * n) <= 0.5  # ~15 %
    expired = [c for c in plan if dt.date.fromisoformat(c["expires"]) < reference]
    assert len(expired) == 1
    for c in plan:
        assert list(c["grants"]) == list(PURPOSES)
        assert c["grants"]["primary-analysis"] is True
        signed = dt.date.fromisoformat(c["signed"])
        assert signed <= starts[c["participant_code"]] < dt.date.fromisoformat(c["expires"])


def test_study_json_consent_plan(meta):
    assert meta["purposes"] == [
        "primary-analysis", "recommender-training", "method-development",
        "external-sharing", "re-contact",
    ]  # fmt: skip
    starts = {
        p["lab_code"]: dt.datetime.fromisoformat(p["session_start"]).date()
        for p in meta["participants"]
    }
    _check_plan(meta["consent_plan"], starts, dt.date.fromisoformat(meta["reference_date"]))


@settings(max_examples=30, deadline=None)
@given(
    n=st.integers(MIN_PARTICIPANTS, MAX_PARTICIPANTS),
    seed=st.integers(0, 2**32 - 1),
)
def test_consent_plan_property(n: int, seed: int):
    s = build_study(n, seed)
    plan = [
        {
            "participant_code": p.lab_code,
            "grants": p.consent.grants,
            "signed": p.consent.signed.isoformat(),
            "expires": p.consent.expires.isoformat(),
        }
        for p in s.participants
    ]
    starts = {p.lab_code: p.session_start.date() for p in s.participants}
    _check_plan(plan, starts, dt.date(2026, 6, 15))
    # Sub-second starts sit on a 1/64 s grid: other fractions put float noise such as
    # "+1.5899999999999999" into the EDF+ time-keeping TALs, which EDFlib rejects.
    assert all(p.session_start.microsecond % 15_625 == 0 for p in s.participants)
    assert len({p.lab_code for p in s.participants}) == n
    assert len({p.full_name for p in s.participants}) == n


def test_participants_contacts_are_invented_and_unique(study):
    rows = _rows(study.participants)
    assert list(rows[0]) == ["lab_code", "name", "email", "phone"]
    assert len(rows) == N
    for r in rows:
        # RFC 2606 reserves ".example": these addresses can never reach anyone.
        assert r["email"].endswith(".example")
        # Ofcom's range for drama, 07700 900000-900999 (from memory).
        assert re.fullmatch(r"\+44 7700 900\d{3}", r["phone"])
    for column in ("lab_code", "name", "email", "phone"):
        assert len({r[column] for r in rows}) == N


def test_stimuli_table(study):
    rows = _rows(study.stimuli)
    assert [r["item_id"] for r in rows] == [f"dish-{i:02d}" for i in range(1, 61)]
    assert len({r["name"] for r in rows}) == 60
    assert {r["vegetarian"] for r in rows} == {"true", "false"}
    assert {int(r["spiciness"]) for r in rows} == {0, 1, 2, 3}


# ------------------------------------------------------------------ determinism and errors


def _tree(root: Path) -> dict[str, bytes]:
    return {str(p.relative_to(root)): p.read_bytes() for p in sorted(root.rglob("*")) if p.is_file()}


@pytest.mark.slow  # two more generations: ~5-10 s on two shared cores
def test_same_seed_same_bytes_other_seed_differs(study, tmp_path):
    again = generate(tmp_path / "again", n_participants=N, seed=SEED)
    assert _tree(study.root) == _tree(again.root)
    other = generate(tmp_path / "other", n_participants=N, seed=SEED + 1)
    first, second = _tree(study.root), _tree(other.root)
    assert first.keys() == second.keys()
    assert all(first[k] != second[k] for k in first if k != "stimuli.csv")
    assert first["stimuli.csv"] == second["stimuli.csv"]  # the menu is fixed


@pytest.mark.parametrize("n", [MIN_PARTICIPANTS - 1, MAX_PARTICIPANTS + 1, 0, -3])
def test_cohort_size_out_of_range(tmp_path, n):
    with pytest.raises(UsageError):
        generate(tmp_path / "x", n_participants=n, seed=SEED)
    assert not (tmp_path / "x").exists()


def test_refuses_non_empty_folder_and_cli_exit_code(tmp_path, capsys):
    (tmp_path / "keep.txt").write_text("user file", encoding="utf-8")
    with pytest.raises(UsageError):
        generate(tmp_path, n_participants=N, seed=SEED)
    assert main([str(tmp_path)]) == UsageError.exit_code
    assert "error:" in capsys.readouterr().err
    assert [p.name for p in tmp_path.iterdir()] == ["keep.txt"]

"""Write the synthetic demo study to a folder.

    python -m demo_data.generate OUT [--participants N] [--seed S]

Output (all invented, see demo_data/README.md):
    eeg/<lab_code>.edf   32-channel EDF+ recordings with identifying headers and notes
    ratings.csv          participant_code,item_id,value   explicit ratings 0..3
    scores.csv           participant_code,item_id,value   EEG-derived scores in (0, 1)
    stimuli.csv          item_id,name,cuisine,spiciness,vegetarian,richness
    participants.csv     lab_code,name,email,phone         contact details for consent forms
    study.json           what was generated, planted identifiers and the consent plan
"""

from __future__ import annotations

import argparse
import csv
import json
import sys
import time
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from edfio import Edf, EdfAnnotation, EdfSignal, Patient, Recording
from vault.demo_data import eeg
from vault.demo_data.study import (
    DEFAULT_PARTICIPANTS,
    DEFAULT_SEED,
    EQUIPMENT_CODE,
    LAB_NAME,
    LAB_NICKNAME,
    PURPOSES,
    RATING_MAX,
    RATING_MIN,
    REFERENCE_DATE,
    REPETITIONS,
    STREAM_EEG,
    STUDY_CODE,
    STUDY_TITLE,
    Participant,
    Study,
    build_study,
    rng_for,
)

from vault.errors import UsageError, VaultError

FORMAT_VERSION = 1
NOTICE = (
    "Synthetic demo data. The lab, the dishes, the people, their contact details, "
    "recordings and consent are all invented; no real person was recorded."
)
TRANSDUCER = "AgAgCl cup electrode"
PREFILTERING = "HP:0.5Hz LP:70Hz"


@dataclass(frozen=True)
class StudyFiles:
    root: Path
    eeg: dict[str, Path]  # lab code -> EDF+ file
    ratings: Path
    scores: Path
    stimuli: Path
    participants: Path
    study: Path


def _annotations(
    participant: Participant, session: eeg.Session, study: Study
) -> list[EdfAnnotation]:
    fs = eeg.SAMPLING_RATE
    out = [
        EdfAnnotation(int(onset) / fs, eeg.STIMULUS_S, f"stim/{study.dishes[int(item)].item_id}")
        for onset, item in zip(session.onsets, session.items, strict=True)
    ]
    for first, last in session.blocks:
        out.append(EdfAnnotation(first / fs - 1.0, None, "block/start"))
        out.append(EdfAnnotation(last / fs + eeg.STIMULUS_S + 0.5, None, "block/end"))
    rng = rng_for(study.seed, STREAM_EEG, participant.index, 1)
    for note in participant.notes(rng):
        # on a 1/64 s grid, for exact decimal onsets (see study._session_starts)
        at = round(float(rng.uniform(1.0, session.duration_s - 1.0)) * 64) / 64
        out.append(EdfAnnotation(at, None, note))
    return out


def _edf(participant: Participant, session: eeg.Session, study: Study) -> Edf:
    signals = [
        EdfSignal(
            session.data_uv[i],
            eeg.SAMPLING_RATE,
            label=label,
            transducer_type=TRANSDUCER,
            physical_dimension="uV",
            physical_range=eeg.PHYSICAL_RANGE_UV,
            prefiltering=PREFILTERING,
        )
        for i, label in enumerate(eeg.CHANNELS)
    ]
    start = participant.session_start
    patient = Patient(
        code=participant.patient_code,
        sex=participant.sex,  # type: ignore[arg-type]
        birthdate=participant.birthdate,
        name=participant.edf_name,
        additional=("tel:" + participant.phone.replace(" ", ""),),
    )
    recording = Recording(
        startdate=start.date(),
        hospital_administration_code=f"EEG{start:%Y%m%d}-{participant.index + 1:02d}",
        investigator_technician_code=participant.technician[1],
        equipment_code=EQUIPMENT_CODE,
        additional=(LAB_NICKNAME.replace(" ", "-"),),
    )
    return Edf(
        signals,
        patient=patient,
        recording=recording,
        starttime=start.time(),
        data_record_duration=1.0,
        annotations=_annotations(participant, session, study),
    )


def _prepare(out_dir: Path) -> None:
    if out_dir.exists() and (not out_dir.is_dir() or any(out_dir.iterdir())):
        raise UsageError("output folder must be new or empty")
    (out_dir / "eeg").mkdir(parents=True, exist_ok=True)


def _write_csv(path: Path, header: Sequence[str], rows: list[Sequence[Any]]) -> None:
    with path.open("w", newline="", encoding="utf-8") as f:
        writer = csv.writer(f, lineterminator="\n")
        writer.writerow(header)
        writer.writerows(rows)


def _study_json(study: Study, notes: dict[str, int]) -> dict[str, Any]:
    people = study.participants
    return {
        "format_version": FORMAT_VERSION,
        "synthetic": True,
        "notice": NOTICE,
        "generator": "demo_data.generate",
        "seed": study.seed,
        "lab": LAB_NAME,
        "lab_nickname": LAB_NICKNAME,
        "study_code": STUDY_CODE,
        "study_title": STUDY_TITLE,
        "reference_date": REFERENCE_DATE.isoformat(),
        "n_participants": len(people),
        "n_items": len(study.dishes),
        "repetitions": REPETITIONS,
        "files": {
            "eeg": "eeg/<lab_code>.edf",
            "ratings": "ratings.csv",
            "scores": "scores.csv",
            "stimuli": "stimuli.csv",
            "participants": "participants.csv",
        },
        "eeg": {
            "format": "EDF+C",
            "sampling_rate_hz": eeg.SAMPLING_RATE,
            "channels": list(eeg.CHANNELS),
            "physical_dimension": "uV",
            "physical_range": list(eeg.PHYSICAL_RANGE_UV),
            "data_record_duration_s": 1.0,
            "stimulus_duration_s": eeg.STIMULUS_S,
            "event_codes": ["block/start", "block/end"]
            + [f"stim/{d.item_id}" for d in study.dishes],
            "free_text_annotations": "identifying notes; anything not in event_codes",
        },
        "ratings": {
            "kind": "explicit",
            "scale": [RATING_MIN, RATING_MAX],
            "columns": ["participant_code", "item_id", "value"],
        },
        "scores": {
            "kind": "derived from EEG",
            "range": list(eeg.SCORE_RANGE),
            "columns": ["participant_code", "item_id", "value"],
            "method": (
                "per trial: mean over "
                + "/".join(eeg.SCORE_SITES)
                + f" of the mean {eeg.WINDOW_S[0]}-{eeg.WINDOW_S[1]} s after the photo minus"
                f" the mean {eeg.BASELINE_S[0]}-{eeg.BASELINE_S[1]} s baseline; epochs whose"
                f" Fp1/Fp2 peak-to-peak exceeds {eeg.BLINK_REJECT_UV} uV dropped (all kept"
                " if none is left); mean over repetitions; z-score within participant;"
                " logistic 1/(1+exp(-z))"
            ),
        },
        "purposes": list(PURPOSES),
        "consent_plan": [
            {
                "participant_code": p.lab_code,
                "grants": dict(p.consent.grants),
                "signed": p.consent.signed.isoformat(),
                "expires": p.consent.expires.isoformat(),
            }
            for p in people
        ],
        "participants": [
            {
                "lab_code": p.lab_code,
                "eeg_file": f"eeg/{p.lab_code}.edf",
                "session_start": p.session_start.isoformat(),
                # Identity planted in the EDF+ header, for checking that it gets scrubbed.
                "edf_identity": {
                    "patient_code": p.patient_code,
                    "sex": p.sex,
                    "birthdate": p.birthdate.isoformat(),
                    "name": p.edf_name,
                    "technician": p.technician[1],
                },
                "free_text_notes": notes[p.lab_code],
            }
            for p in people
        ],
    }


def generate(
    out_dir: Path, *, n_participants: int = DEFAULT_PARTICIPANTS, seed: int = DEFAULT_SEED
) -> StudyFiles:
    """Write the whole synthetic study under `out_dir` (must be new or empty).

    Same (n_participants, seed) -> byte-identical files.
    """
    out_dir = Path(out_dir)
    study = build_study(n_participants, seed)
    _prepare(out_dir)
    n_items = len(study.dishes)
    scores = np.empty((len(study.participants), n_items))
    eeg_files: dict[str, Path] = {}
    notes: dict[str, int] = {}
    for p in study.participants:
        rng = rng_for(seed, STREAM_EEG, p.index, 0)
        params = eeg.EegParams.draw(rng)
        items = eeg.trial_order(rng, n_items, REPETITIONS)
        session = eeg.simulate(rng, params, items, study.latent[p.index, items], REPETITIONS)
        edf = _edf(p, session, study)
        path = out_dir / "eeg" / f"{p.lab_code}.edf"
        edf.write(path)
        eeg_files[p.lab_code] = path
        notes[p.lab_code] = sum(
            a.text.split("/")[0] not in ("stim", "block") for a in edf.annotations
        )
        # Score from the values as stored in the file (after 16-bit digitisation).
        decoded = np.stack([signal.data for signal in edf.signals])
        scores[p.index] = eeg.derive_scores(decoded, session.onsets, session.items, n_items)

    codes = [p.lab_code for p in study.participants]
    ids = [d.item_id for d in study.dishes]
    files = StudyFiles(
        root=out_dir,
        eeg=eeg_files,
        ratings=out_dir / "ratings.csv",
        scores=out_dir / "scores.csv",
        stimuli=out_dir / "stimuli.csv",
        participants=out_dir / "participants.csv",
        study=out_dir / "study.json",
    )
    header = ("participant_code", "item_id", "value")
    _write_csv(
        files.ratings,
        header,
        [(c, i, int(study.ratings[pi, di])) for pi, c in enumerate(codes) for di, i in enumerate(ids)],
    )
    _write_csv(
        files.scores,
        header,
        [(c, i, f"{scores[pi, di]:.4f}") for pi, c in enumerate(codes) for di, i in enumerate(ids)],
    )
    _write_csv(
        files.stimuli,
        ("item_id", "name", "cuisine", "spiciness", "vegetarian", "richness"),
        [
            (d.item_id, d.name, d.cuisine, d.spiciness, str(d.vegetarian).lower(), d.richness)
            for d in study.dishes
        ],
    )
    _write_csv(
        files.participants,
        ("lab_code", "name", "email", "phone"),
        [(p.lab_code, p.full_name, p.email, p.phone) for p in study.participants],
    )
    text = json.dumps(_study_json(study, notes), indent=2, ensure_ascii=True) + "\n"
    files.study.write_text(text, encoding="utf-8")
    return files


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(
        prog="python -m demo_data.generate",
        description="Write the synthetic Tasting Lab demo study (invented people only).",
    )
    parser.add_argument("out", type=Path, help="output folder (new or empty)")
    parser.add_argument("--participants", type=int, default=DEFAULT_PARTICIPANTS)
    parser.add_argument("--seed", type=int, default=DEFAULT_SEED)
    args = parser.parse_args(argv)
    began = time.perf_counter()
    try:
        files = generate(args.out, n_participants=args.participants, seed=args.seed)
    except VaultError as err:
        print(f"error: {err.message}", file=sys.stderr)
        return err.exit_code
    took = time.perf_counter() - began
    print(f"wrote {len(files.eeg)} synthetic participants to {files.root} in {took:.1f} s")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

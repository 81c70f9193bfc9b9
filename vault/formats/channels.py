"""Which EDF signal labels and physical dimensions de-identification may keep.

A label is kept only when it names a known electrode or channel, a unit only when
it is one EDF files use; everything else is replaced (`neutral_label`, blank unit),
so a label or unit can never carry a name or other free text. Both sets are finite
(matched ignoring letter case), so nothing outside them survives.

Sources:
- electrodes: the 10-20, 10-10 and 10-5 systems as laid out by Oostenveld &
  Praamstra (2001), "The five percent electrode system for high-resolution EEG and
  ERP measurements", Clin. Neurophysiol. 112:713-719 (rows and columns below from
  memory); tests check the set against MNE's `colin27_1005` montage (formerly
  `standard_1005`), which has exactly these 343 names;
- signal-type prefixes (EEG, EOG, ECG, EMG, ...) and the unit spellings: the EDF+
  specification's "standard texts" for labels and physical dimensions (Kemp &
  Olivan 2003), from memory; the other channel names (HEOG, LOC, Status, STI 014,
  TRIG, ...) are common practice of EEG amplifiers and of MNE's readers, no source.
"""

from __future__ import annotations

import re

__all__ = ["ELECTRODES", "UNITS", "is_known_label", "is_known_unit", "neutral_label"]

# 10-5 rows front to back, each with the row name used at the lateral columns 7-10
# (FC row: FT7, FT9 ...). Columns: 9 7 5 3 1 z 2 4 6 8 10, and a half position "h"
# after every numbered one (Oostenveld & Praamstra 2001, Fig. 1; from memory).
_ROWS = (("AFp", "AFp"), ("AF", "AF"), ("AFF", "AFF"), ("F", "F"), ("FFC", "FFT"),
         ("FC", "FT"), ("FCC", "FTT"), ("C", "T"), ("CCP", "TTP"), ("CP", "TP"),
         ("CPP", "TPP"), ("P", "P"), ("PPO", "PPO"), ("PO", "PO"), ("POO", "POO"))  # fmt: skip
_NARROW_ROWS = ("Fp", "O", "OI", "I")  # only 1, z, 2 and 1h, 2h
# Old 10-20 temporal names and the mastoid / earlobe references (10-20 system).
_EXTRA = ("T3", "T4", "T5", "T6", "M1", "M2", "A1", "A2")


def _electrodes() -> frozenset[str]:
    names = set(_EXTRA)
    for row, lateral in _ROWS:
        names.add(row + "z")
        for n in (1, 2, 3, 4, 5, 6, 7, 8, 9, 10):
            base = lateral if n >= 7 else row
            names |= {f"{base}{n}", f"{base}{n}h"}
    for row in _NARROW_ROWS:
        names |= {f"{row}1", f"{row}z", f"{row}2", f"{row}1h", f"{row}2h"}
    return frozenset(names)


ELECTRODES = _electrodes()
# Reference electrode names after a dash ("EEG Fp1-REF", "C3-AVG", "Fz-LE"): common practice.
_REFERENCES = ("REF", "AVG", "AVERAGE", "AV", "CAR", "LE", "AR", "Nz")
# Other channels, with an optional number or side: common practice (see module docstring).
_NAMED = ("EOG", "HEOG", "VEOG", "LOC", "ROC", "ECG", "EKG", "EMG", "CHIN", "TRIG", "TRIGGER",
          "STATUS", "STI", "STIM", "MARKER", "EVENT", "RESP", "TEMP", "GSR", "EDA", "SPO2",
          "SAO2", "PULSE", "PLETH", "PHOTIC")  # fmt: skip
_SIDES = ("L", "R", "LEFT", "RIGHT", "UP", "DOWN", "CHIN")
# EDF+ signal types written before the specification (EDF+ "standard texts", from memory).
_TYPES = ("EEG", "EOG", "ECG", "EKG", "EMG", "ERG", "MEG", "MCG", "EP")


def _alt(words: tuple[str, ...] | frozenset[str]) -> str:
    return "|".join(re.escape(w) for w in sorted(words, key=len, reverse=True))


# Every part is a finite alternation or a digit run of at most 3: no free text fits.
_LABEL = re.compile(
    rf"(?:(?:{_alt(_TYPES)}) )?"
    rf"(?:(?:{_alt(ELECTRODES)})(?:-(?:{_alt(ELECTRODES)}|{_alt(_REFERENCES)}))?"
    rf"|(?:{_alt(_NAMED)})(?: ?[0-9]{{1,3}}|[ -](?:{_alt(_SIDES)}))?)",
    re.IGNORECASE,
)

# Physical dimensions (EDF specification: "uV", "mV", "degC", "%" ...; EDF+ "standard
# texts" for units, from memory): SI prefixes on volts, amperes, ohms, seconds and hertz,
# and the usual physiological units. Blank means no dimension and is kept.
_PREFIXES = ("p", "n", "u", "m", "", "k", "M")
_BASE_UNITS = ("V", "A", "Ohm", "s", "Hz")
_OTHER_UNITS = ("degC", "degF", "K", "%", "bpm", "mmHg", "cmH2O", "l/min", "L/min", "ml", "l",
                "g", "lux", "dB", "deg", "rad", "Boolean", "mmol/l", "counts", "-")  # fmt: skip
UNITS = frozenset({p + b for p in _PREFIXES for b in _BASE_UNITS} | set(_OTHER_UNITS) | {""})


def is_known_label(label: str) -> bool:
    """True if `label` (trailing spaces ignored) is a known electrode or channel name."""
    return _LABEL.fullmatch(label.rstrip(" ")) is not None


def is_known_unit(unit: str) -> bool:
    """True if `unit` (trailing spaces ignored) is one of the EDF physical dimensions above.

    Case matters only where it must ("mV" millivolt, "MV" megavolt): the spelling must
    be exactly one of UNITS.
    """
    return unit.rstrip(" ") in UNITS


def neutral_label(position: int) -> str:
    """The label written instead of an unknown one: CH01, CH02, ... by signal position
    (1-based), so it is unique within the file (no known label has this form)."""
    return f"CH{position:02d}"

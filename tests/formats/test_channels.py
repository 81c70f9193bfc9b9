"""Which signal labels and units de-identification keeps (vault.formats.channels).

Outside sources, named again beside each check:
- electrode names: MNE's `colin27_1005` montage (the 10-05 system, formerly `standard_1005`);
- channel names MNE's own EDF reader types as EOG/ECG/EMG/stim: common practice, no source.
"""

from __future__ import annotations

import mne
import pytest
from hypothesis import given
from hypothesis import strategies as st

from vault.formats.bids import channel_type
from vault.formats.channels import ELECTRODES, UNITS, is_known_label, is_known_unit, neutral_label


def test_electrodes_are_exactly_mnes_10_05_montage() -> None:
    mne_names = set(mne.channels.make_standard_montage("colin27_1005").ch_names)  # MNE
    assert mne_names == ELECTRODES  # built from Oostenveld & Praamstra's rows, not copied


@pytest.mark.parametrize("form", ["{}", "EEG {}", "EEG {}-REF", "{}-A1", "{}-Cz", "{}-AVG"])
def test_every_10_05_name_is_kept_in_the_usual_forms(form: str) -> None:
    names = mne.channels.make_standard_montage("colin27_1005").ch_names  # MNE
    assert [n for n in names if not is_known_label(form.format(n))] == []
    assert [n for n in names if not is_known_label(form.format(n).upper())] == []


@pytest.mark.parametrize("label", [
    "EOG L", "HEOG", "VEOG-R", "LOC", "ECG", "EKG1", "EMG chin", "EMG", "Status", "TRIG",
    "STI 014", "STI014", "Trigger", "Resp", "EEG Fp1-F7", "EOG ROC", "Fz  ",
])  # fmt: skip
def test_usual_channel_names_are_kept(label: str) -> None:
    assert is_known_label(label)  # common practice, no source


@pytest.mark.parametrize("label", [
    "Fz Jane Roe", "Jane", "Roe Fz", "EEG Jane", "Fz-Jane", "Jane-Fz", "STATUS Jane", "EOG Roe",
    "EMG 12345", "Fz-Cz-Pz", "", " ", "CH01", "sine 1 Hz", "ECG 7 Roe", "Fz\tCz", "E1", "Fz_",
])  # fmt: skip
def test_free_text_labels_are_not_kept(label: str) -> None:
    assert not is_known_label(label)


MNE_NAMES = mne.channels.make_standard_montage("colin27_1005").ch_names  # MNE's 10-05 montage
# The test's own vocabulary of non-electrode words (common practice, no source).
WORDS = {"EEG", "EOG", "ECG", "EKG", "EMG", "ERG", "MEG", "MCG", "EP", "REF", "AVG", "AVERAGE", "AV",
         "CAR", "LE", "AR", "NZ", "HEOG", "VEOG", "LOC", "ROC", "CHIN", "TRIG", "TRIGGER", "STATUS",
         "STI", "STIM", "MARKER", "EVENT", "RESP", "TEMP", "GSR", "EDA", "SPO2", "SAO2", "PULSE",
         "PLETH", "PHOTIC", "L", "R", "LEFT", "RIGHT", "UP", "DOWN"}  # fmt: skip


def _token_ok(token: str) -> bool:
    upper = token.upper()
    if upper in {n.upper() for n in MNE_NAMES} | WORDS:
        return True
    stem = upper.rstrip("0123456789")
    digits = len(upper) - len(stem)
    return 0 < digits <= 3 and (stem in WORDS or stem == "") and upper.isascii()


_PIECES = st.one_of(st.sampled_from([*MNE_NAMES, *WORDS, "014", "7", "Jane", "Roe", "x"]),
                    st.text(max_size=4))


@given(st.lists(_PIECES, min_size=1, max_size=4), st.lists(st.sampled_from([" ", "-", "", "_"]),
                                                          min_size=3, max_size=3))
def test_a_kept_label_is_made_only_of_known_words(pieces: list[str], seps: list[str]) -> None:
    label = pieces[0] + "".join(sep + p for sep, p in zip(seps, pieces[1:], strict=False))
    if is_known_label(label):  # then every word in it is an MNE electrode or a listed word
        assert all(_token_ok(t) for t in label.replace("-", " ").split()), label


def test_units_are_the_edf_ones() -> None:
    # EDF specification examples (uV, mV, degC, %), from memory: kept exactly as spelled
    for unit in ("uV", "mV", "V", "nV", "degC", "%", "", "mmHg", "bpm", "Hz", "kOhm", "uV  "):
        assert is_known_unit(unit)
    for unit in ("Roe", "Jane", "µV", "uv ok", "12", "mV Roe", "X"):
        assert not is_known_unit(unit)
    assert all(len(u) <= 8 and u.isascii() for u in UNITS)  # fits the 8-byte field


def test_neutral_labels_are_unique_unknown_and_typed_misc() -> None:
    labels = [neutral_label(i) for i in range(1, 10000)]
    assert len(set(labels)) == len(labels) and all(len(x) <= 16 for x in labels)
    assert not any(is_known_label(x) for x in labels[:200])  # never mistaken for a real name
    assert channel_type(labels[0]) == "MISC"

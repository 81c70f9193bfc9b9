"""EEG-BIDS dataset writer for exports (Brain Imaging Data Structure 1.9, EEG extension).

`BidsWriter(out_dir, ...)` lays out one raw dataset: per recording the streamed
de-identified EDF/BDF (`vault.formats.edf.deidentified_blocks` output), `_eeg.json`,
`_channels.tsv` and optionally `_events.tsv`; `finish(participants)` adds
`participants.tsv`/`.json`, `dataset_description.json`, `README` and
`.bidsignore`, and returns every written file with its size and SHA-256 for the
caller's signed manifest. Which participants and recordings go in, their
pseudonymous labels and the manifest are the caller's business.

Every file is written to a temporary name inside `out_dir`, fsynced and renamed,
so a failure (for example an `InvalidInput` from the block iterator) never leaves
a half-written file under its final name. Data are streamed block by block.

Not thread-safe: one writer, one thread.
"""

from __future__ import annotations

import errno
import json
import math
import os
import re
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass
from importlib import metadata
from pathlib import Path
from typing import Any

from vault.crypto import StreamingDigest, random_id
from vault.errors import Conflict, InvalidInput, StorageFull, UsageError
from vault.formats.edf import RecordingMeta
from vault.storage.files import fsync_path

__all__ = ["BIDS_VERSION", "README_CAUTIONS", "BidsWriter", "WrittenFile", "channel_type",
           "check_recording"]

# The BIDS version the dataset claims; bids-validator 1.15.0 (npm) checks it.
BIDS_VERSION = "1.9.0"
DEFAULT_LICENSE = "Restricted: use only under the data use agreement that accompanied this release"
README_CAUTIONS = (
    "Cautions\n"
    "--------\n"
    "- Re-identification risk: names, birth dates and free-text labels were removed from\n"
    "  the EDF headers and annotations, and recording dates may be shifted, but EEG signals\n"
    "  themselves can identify a person, and so can linking this dataset with other data.\n"
    "  Do not try to re-identify anyone, and do not link this dataset with other data\n"
    "  about the same people.\n"
    "- Recipients must follow the data use agreement under which this dataset was\n"
    "  released: use it only for the purpose named there, keep it secure, do not pass it\n"
    "  on, and delete it when the agreement says so.\n"
    "- Participant labels are pseudonyms valid for this release's purpose only; they do\n"
    "  not match labels in releases for other purposes.\n"
    "- Whether and how this dataset may be used or shared is for your ethics board,\n"
    "  your data-protection officer and the applicable law to decide; this file does\n"
    "  not replace their advice.\n"
)

_LABEL = re.compile(r"[0-9A-Za-z]{1,64}")
_AGE_BAND = re.compile(r"(?:age_)?([0-9]{1,2}-[0-9]{1,2}|90\+)")
_SEX = {"M": "M", "F": "F", "O": "O", "n/a": "n/a"}
PARTICIPANT_COLUMNS = ("participant_id", "sex", "age_band")
_PARTICIPANTS_JSON = {
    "participant_id": {"Description": "Pseudonymous participant label, valid for this release only."},
    "sex": {
        "Description": "Sex as recorded in the EDF+ header (kept only where the release allows it).",
        "Levels": {"M": "male", "F": "female", "O": "other", "n/a": "not available"},
    },
    "age_band": {
        "Description": "Age in whole years at the original recording date, as a band (lower-upper, "
        "or 90+); exact ages and birth dates are not released.",
    },
}

# Channel types by label (common practice, no source): the label is matched
# without an "EEG " prefix and a reference suffix such as "-REF" or "-A1".
_ELECTRODE = re.compile(  # 10-20 / 10-10 / 10-05 names: Fp1, AFz, FCC5h, PPO10h, Iz, A1, M2
    r"(?:Fp|AFp|[AFCTPOIN]{1,3}|M)(?:[0-9]{1,2}h?|zh?)|LPA|RPA", re.IGNORECASE
)
_TYPE_RULES: tuple[tuple[str, re.Pattern[str]], ...] = (
    ("EOG", re.compile(r"EOG|[HV]EOG|LOC|ROC", re.IGNORECASE)),
    ("ECG", re.compile(r"ECG|EKG", re.IGNORECASE)),
    ("EMG", re.compile(r"EMG", re.IGNORECASE)),
    ("TRIG", re.compile(r"TRIG|TRIGGER|STI|STIM|STATUS|MARKER|EVENT", re.IGNORECASE)),
)
_COUNT_KEYS = {"EEG": "EEGChannelCount", "EOG": "EOGChannelCount", "ECG": "ECGChannelCount",
               "EMG": "EMGChannelCount", "MISC": "MiscChannelCount",
               "TRIG": "TriggerChannelCount"}  # fmt: skip
_UNITS = {"uV": "µV", "µV": "µV", "mV": "mV", "V": "V", "nV": "nV", "": "n/a"}


def channel_type(label: str) -> str:
    """EEG, EOG, ECG, EMG, TRIG or MISC from an EDF signal label (simple rules)."""
    text = label.strip()
    prefixed = text[:4].upper() == "EEG "
    base = text[4:].strip() if prefixed else text
    first = re.split(r"[-_ ]", base, maxsplit=1)[0]
    for kind, pattern in _TYPE_RULES:
        if pattern.match(first) or pattern.match(base):
            return kind
    if prefixed or _ELECTRODE.fullmatch(first):
        return "EEG"
    return "MISC"


@dataclass(frozen=True)
class WrittenFile:
    """One file of the dataset: POSIX path relative to the dataset root."""

    path: str
    size: int
    sha256: str


def _check_label(value: str, what: str) -> str:
    if not isinstance(value, str) or not _LABEL.fullmatch(value):
        raise UsageError(f"{what} must be 1-64 ASCII letters or digits (a BIDS label)")
    return value


def _check_text(value: str, what: str) -> str:
    if not isinstance(value, str) or not value.strip() or not value.isprintable():
        raise UsageError(f"{what} must be non-empty printable text")
    return value


def _tsv_cell(value: str, what: str) -> str:
    if not value or not value.isprintable():  # excludes tabs and line breaks
        raise UsageError(f"{what} must be non-empty printable text without tabs or line breaks")
    return value


def _number(value: float) -> str:
    """A finite number as TSV text: integers without a fraction, others via repr."""
    text = repr(float(value))
    return text[:-2] if text.endswith(".0") else text


def _json(doc: Mapping[str, Any]) -> bytes:
    return (json.dumps(doc, indent=2, ensure_ascii=False) + "\n").encode("utf-8")


def _tsv(header: Sequence[str], rows: Iterable[Sequence[str]]) -> bytes:
    lines = ["\t".join(header), *("\t".join(row) for row in rows)]
    return ("\n".join(lines) + "\n").encode("utf-8")




_FORMATS = ("EDF", "EDF+C", "EDF+D", "BDF", "BDF+C", "BDF+D")


def check_recording(meta: RecordingMeta) -> None:
    """Refuse (InvalidInput) a recording this writer could not export; ingest calls it too,
    so that no stored file can block a later export."""
    def bad(why: str) -> InvalidInput:
        return InvalidInput(f"recording cannot be exported as EEG-BIDS: {why}")

    if meta.format not in _FORMATS:
        raise bad("its format is not EDF or BDF")
    if not meta.channels:
        raise bad("it has no ordinary signals (annotations only)")
    if not len(meta.channels) == len(meta.units) == len(meta.sampling_rates):
        raise bad("its metadata lists channels, units and rates of different lengths")
    for i, (name, unit, rate) in enumerate(zip(meta.channels, meta.units, meta.sampling_rates,
                                               strict=True)):  # fmt: skip
        if not name.strip() or not name.isprintable():
            raise bad(f"signal {i} has an empty or unprintable label")
        if not _UNITS.get(unit.strip(), unit.strip()).isprintable():
            raise bad(f"signal {i} has an unprintable unit")
        if not (math.isfinite(rate) and rate > 0):
            raise bad(f"signal {i} has no positive sampling rate")
    if not (math.isfinite(meta.duration) and meta.duration > 0):
        raise bad("its duration is not positive")


class BidsWriter:
    """Writes one EEG-BIDS raw dataset into an empty (or new) directory."""

    def __init__(
        self,
        out_dir: str | os.PathLike[str],
        *,
        dataset_name: str,
        task: str,
        authors: Sequence[str] = (),
        license: str = DEFAULT_LICENSE,
        ethics_approvals: Sequence[str] = (),
        task_name: str | None = None,
        task_description: str | None = None,
        eeg_reference: str = "n/a",
        power_line_frequency: float | None = None,
        readme_intro: str | None = None,
    ) -> None:
        self.out_dir = Path(out_dir)
        self.task = _check_label(task, "task")
        self._name = _check_text(dataset_name, "dataset_name")
        self._authors = [_check_text(a, "author") for a in authors]
        self._license = _check_text(license, "license")
        self._ethics = [_check_text(e, "ethics approval") for e in ethics_approvals]
        self._task_name = _check_text(task_name or task, "task_name")
        self._task_description = task_description and _check_text(task_description, "task_description")
        self._reference = _check_text(eeg_reference, "eeg_reference")
        if power_line_frequency is not None and not (
            math.isfinite(power_line_frequency) and power_line_frequency > 0
        ):
            raise UsageError("power_line_frequency must be a positive number of Hz")
        self._line_frequency = power_line_frequency
        self._readme_intro = readme_intro
        self._files: dict[str, WrittenFile] = {}
        self._keys: set[tuple[str, str | None, int | None]] = set()
        self._folded: dict[str, str] = {}  # casefolded label -> label (case-insensitive disks)
        self._finished = False
        if self.out_dir.exists():
            if not self.out_dir.is_dir():
                raise Conflict("export target exists and is not a directory")
            if any(self.out_dir.iterdir()):
                raise Conflict("export directory is not empty; choose a new or empty directory")
        else:
            try:
                self.out_dir.mkdir(parents=True)
            except FileExistsError:
                raise Conflict("export directory appeared while it was being created") from None

    # ------------------------------------------------------------------ writing files

    def _target(self, rel: str) -> Path:
        if rel in self._files:
            raise Conflict("the export already holds a file of that name")
        path = self.out_dir / rel
        path.parent.mkdir(parents=True, exist_ok=True)
        return path

    def _write_stream(self, rel: str, chunks: Iterable[bytes], expected_size: int | None = None) -> None:
        """Stream `chunks` to a temporary name in out_dir, fsync, rename to `rel`."""
        final = self._target(rel)
        temp = self.out_dir / f".partial-{random_id(8)}.tmp"
        digest, size = StreamingDigest(), 0
        try:
            with temp.open("xb") as f:
                for chunk in chunks:
                    f.write(chunk)
                    digest.update(chunk)
                    size += len(chunk)
                if expected_size is not None and size != expected_size:
                    raise InvalidInput("recording stream length differs from what its header declares")
                f.flush()
                os.fsync(f.fileno())
            if final.exists():
                raise Conflict("the export already holds a file of that name")
            os.replace(temp, final)
        except BaseException as exc:
            temp.unlink(missing_ok=True)
            if isinstance(exc, OSError) and exc.errno == errno.ENOSPC:
                raise StorageFull("not enough disk space; the partial export file was removed") from None
            raise
        fsync_path(final.parent)
        self._files[rel] = WrittenFile(rel, size, digest.hexdigest())

    def _write(self, rel: str, data: bytes) -> None:
        self._write_stream(rel, [data])

    # ------------------------------------------------------------------ recordings

    def add_recording(
        self,
        label: str,
        session: str | None,
        run: int | None,
        header: bytes,
        blocks: Iterable[bytes],
        meta: RecordingMeta,
        *,
        events: Sequence[tuple[float, float, str]] | None = None,
    ) -> list[WrittenFile]:
        """Stream one de-identified recording and write its sidecars; returns the files.

        If `blocks` raises, nothing of this recording stays in the dataset.
        """
        if self._finished:
            raise Conflict("the export was already finished")
        _check_label(label, "participant label")
        if session is not None:
            _check_label(session, "session label")
        if run is not None and (isinstance(run, bool) or not isinstance(run, int) or not 0 <= run <= 9999):
            raise UsageError("run must be an integer from 0 to 9999")
        key = (label, session, run)
        if key in self._keys:
            raise Conflict("that participant already has a recording with this session and run")
        known = self._folded.get(label.casefold())
        if known is not None and known != label:
            raise Conflict("participant labels must differ in more than letter case")
        check_recording(meta)
        event_rows = self._event_rows(events) if events is not None else None
        channel_rows, counts = self._channel_rows(meta)

        stem = f"sub-{label}" + (f"_ses-{session}" if session else "") + f"_task-{self.task}"
        stem += f"_run-{run}" if run is not None else ""
        folder = f"sub-{label}/" + (f"ses-{session}/" if session else "") + "eeg/"
        extension = "bdf" if meta.format.startswith("BDF") else "edf"
        expected = meta.stored_bytes or None
        before = set(self._files)
        try:
            self._write_stream(f"{folder}{stem}_eeg.{extension}", self._chain(header, blocks), expected)
            sidecar: dict[str, Any] = {
                "TaskName": self._task_name,
                "EEGReference": self._reference,
                "SamplingFrequency": max(meta.sampling_rates),
                "PowerLineFrequency": self._line_frequency if self._line_frequency else "n/a",
                "SoftwareFilters": "n/a",
                "RecordingDuration": meta.duration,
                "RecordingType": "discontinuous" if meta.format.endswith("+D") else "continuous",
                **{_COUNT_KEYS[k]: n for k, n in counts.items()},
            }
            if self._task_description:
                sidecar["TaskDescription"] = self._task_description
            self._write(f"{folder}{stem}_eeg.json", _json(sidecar))
            header_row = ("name", "type", "units", "sampling_frequency", "status")
            self._write(f"{folder}{stem}_channels.tsv", _tsv(header_row, channel_rows))
            if event_rows is not None:
                event_header = ("onset", "duration", "trial_type")
                self._write(f"{folder}{stem}_events.tsv", _tsv(event_header, event_rows))
        except BaseException:
            for rel in set(self._files) - before:  # sidecars of a recording that failed
                (self.out_dir / rel).unlink(missing_ok=True)
                del self._files[rel]
            self._remove_empty(self.out_dir / folder)
            raise
        self._keys.add(key)
        self._folded[label.casefold()] = label
        return [self._files[rel] for rel in self._files if rel not in before]

    def _remove_empty(self, folder: Path) -> None:
        """Remove `folder` and its parents below out_dir while they are empty."""
        while folder != self.out_dir and self.out_dir in folder.parents:
            try:
                folder.rmdir()
            except OSError:  # not empty (another recording's files) or already gone
                if folder.exists():
                    return
            folder = folder.parent

    @staticmethod
    def _chain(header: bytes, blocks: Iterable[bytes]) -> Iterable[bytes]:
        yield header
        yield from blocks

    @staticmethod
    def _channel_rows(meta: RecordingMeta) -> tuple[list[tuple[str, ...]], dict[str, int]]:
        if not len(meta.channels) == len(meta.units) == len(meta.sampling_rates):
            raise UsageError("recording metadata lists channels, units and rates of different lengths")
        rows, counts = [], dict.fromkeys(_COUNT_KEYS, 0)
        for name, unit, rate in zip(meta.channels, meta.units, meta.sampling_rates, strict=True):
            kind = channel_type(name)
            counts[kind] += 1
            units = _UNITS.get(unit.strip(), unit.strip())
            rows.append((_tsv_cell(name, "channel name"), kind, _tsv_cell(units, "channel unit"),
                         _number(rate), "good"))  # fmt: skip
        return rows, counts

    @staticmethod
    def _event_rows(events: Sequence[tuple[float, float, str]]) -> list[tuple[str, str, str]]:
        rows = []
        for onset, duration, code in events:
            if not (math.isfinite(onset) and math.isfinite(duration) and duration >= 0):
                raise UsageError("event onsets must be finite and durations finite and non-negative")
            rows.append((_number(onset), _number(duration), _tsv_cell(str(code), "event code")))
        return rows

    # ------------------------------------------------------------------ dataset files

    def finish(
        self, participants: Sequence[Mapping[str, str]], *, bidsignore: Sequence[str] = ()
    ) -> list[WrittenFile]:
        """Write the dataset-level files; returns every file of the dataset, sorted by path.

        `participants`: one mapping per participant with `participant_id` (the label,
        with or without "sub-") and optionally `sex` (M/F/O/n/a) and `age_band`
        ("20-29", "age_20-29", "90+" or "n/a"); no other columns are accepted.
        `bidsignore`: patterns for files the caller adds afterwards (e.g. its manifest).
        """
        if self._finished:
            raise Conflict("the export was already finished")
        if not self._keys:
            raise UsageError("an export needs at least one recording")
        columns, rows = self._participant_rows(participants)
        self._write("participants.tsv", _tsv(columns, rows))
        self._write("participants.json", _json({c: _PARTICIPANTS_JSON[c] for c in columns}))
        description: dict[str, Any] = {
            "Name": self._name,
            "BIDSVersion": BIDS_VERSION,
            "DatasetType": "raw",
            "License": self._license,
        }
        if self._authors:
            description["Authors"] = self._authors
        if self._ethics:
            description["EthicsApprovals"] = self._ethics
        description["GeneratedBy"] = [
            {"Name": "mindward", "Version": _version(), "Description": "de-identified consented export"}
        ]
        self._write("dataset_description.json", _json(description))
        self._write("README", self._readme().encode("utf-8"))
        if bidsignore:
            patterns = [_tsv_cell(p, "bidsignore pattern") for p in bidsignore]
            self._write(".bidsignore", ("\n".join(patterns) + "\n").encode("utf-8"))
        self._finished = True
        return sorted(self._files.values(), key=lambda f: f.path)

    def _participant_rows(
        self, participants: Sequence[Mapping[str, str]]
    ) -> tuple[list[str], list[list[str]]]:
        labels = {key[0] for key in self._keys}
        seen: set[str] = set()
        present: set[str] = set()
        parsed: list[dict[str, str]] = []
        for entry in participants:
            unknown = set(entry) - set(PARTICIPANT_COLUMNS)
            if unknown:
                raise UsageError("participants may carry only participant_id, sex and age_band")
            pid = entry.get("participant_id")
            if not isinstance(pid, str):
                raise UsageError("every participant needs a participant_id")
            label = _check_label(pid.removeprefix("sub-"), "participant_id")
            if label in seen:
                raise UsageError("participant listed twice")
            seen.add(label)
            row = {"participant_id": f"sub-{label}"}
            if "sex" in entry:
                if entry["sex"] not in _SEX:
                    raise UsageError("sex must be M, F, O or n/a")
                row["sex"] = _SEX[entry["sex"]]
            if "age_band" in entry:
                band = entry["age_band"]
                m = _AGE_BAND.fullmatch(band) if isinstance(band, str) else None
                if m is None and band != "n/a":
                    raise UsageError("age_band must look like 20-29, age_20-29, 90+ or n/a")
                row["age_band"] = m[1] if m else "n/a"
            present |= set(row)
            parsed.append(row)
        if seen != labels:
            raise UsageError("participants must list exactly the participants with recordings")
        columns = [c for c in PARTICIPANT_COLUMNS if c in present]
        parsed.sort(key=lambda r: r["participant_id"])
        return columns, [[row.get(c, "n/a") for c in columns] for row in parsed]

    def _readme(self) -> str:
        intro = self._readme_intro.strip() + "\n\n" if self._readme_intro else ""
        return (
            f"{self._name}\n{'=' * len(self._name)}\n\n{intro}"
            "EEG recordings released by mindward in the Brain Imaging Data Structure (BIDS),\n"
            f"task '{self.task}'. Recordings are de-identified EDF/BDF files; participants are\n"
            "listed under pseudonymous labels in participants.tsv.\n\n" + README_CAUTIONS
        )


def _version() -> str:
    try:
        return metadata.version("mindward")
    except metadata.PackageNotFoundError:
        return "unknown"

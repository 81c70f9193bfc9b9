"""The client's receiving end, against the real packer (vault/formats/archive.pack) and a real
export, without a service: only a complete, untouched archive of the export asked for, signed by
the vault's key, ever appears at `out`; every other stream leaves neither `out` nor a staging
folder."""

from __future__ import annotations

import contextlib
import itertools
import os
import shutil
from collections.abc import Iterator
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

import vault
from tests.conftest import TEST_PASSPHRASE
from vault.formats.archive import pack
from vault.remote.receive import check_public_key, receive


@pytest.fixture(scope="module")
def exported(lab_files: dict, tmp_path_factory: pytest.TempPathFactory) -> dict:
    root = tmp_path_factory.mktemp("receive")
    shutil.copytree(Path(lab_files["root"]) / "base", root / "base")
    with vault.Vault.open(root / "base", TEST_PASSPHRASE) as v:
        result = v.export_eeg("method-development", root / "export")
        key = v.public_key
    archive = b"".join(pack(root / "export"))
    return {"root": root, "folder": root / "export", "id": result["export_id"], "key": key,
            "archive": archive}


_NAMES = itertools.count()


def _source(data: bytes, *, size: int = 4096, fail_after: int | None = None):
    """A download as receive() takes it: a context manager yielding chunks."""
    @contextlib.contextmanager
    def opened() -> Iterator[Iterator[bytes]]:
        def chunks() -> Iterator[bytes]:
            for n, start in enumerate(range(0, len(data), size)):
                if fail_after is not None and n >= fail_after:
                    raise vault.Unreachable("the service broke off")
                yield data[start:start + size]
        yield chunks()
    return opened


def _nothing_left(out: Path) -> bool:
    return not out.exists() and not [p for p in out.parent.iterdir() if p.name.startswith(f".{out.name}")]


def _files(root: Path) -> dict[str, bytes]:
    return {p.relative_to(root).as_posix(): p.read_bytes() for p in sorted(root.rglob("*")) if p.is_file()}


def test_a_complete_archive_arrives_as_the_exported_folder(exported, tmp_path: Path) -> None:
    out = tmp_path / "new" / "eeg"
    report = receive(out, exported["id"], _source(exported["archive"]), exported["key"])
    assert report["ok"] and _files(out) == _files(exported["folder"])
    assert vault.verify_export(out, exported["key"])["ok"]  # what `export verify` checks
    assert [p.name for p in out.parent.iterdir()] == ["eeg"]


def test_an_existing_empty_folder_is_filled_and_a_full_one_refused(exported, tmp_path: Path) -> None:
    empty = tmp_path / "empty"
    empty.mkdir()
    receive(empty, exported["id"], _source(exported["archive"]), exported["key"])
    assert (empty / "manifest.json").is_file()
    with pytest.raises(vault.Conflict):
        receive(empty, exported["id"], _source(exported["archive"]), exported["key"])


@pytest.mark.parametrize("fail_after", [0, 1, 3, 10])
def test_a_break_in_the_download_leaves_nothing(exported, tmp_path: Path, fail_after: int) -> None:
    assert len(exported["archive"]) > 10 * 4096  # the breaks fall inside the archive
    out = tmp_path / "eeg"
    with pytest.raises(vault.Unreachable):
        receive(out, exported["id"], _source(exported["archive"], fail_after=fail_after), exported["key"])
    assert _nothing_left(out)


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_a_truncated_or_changed_archive_leaves_nothing(exported, tmp_path: Path, data) -> None:
    archive = exported["archive"]
    # positions drawn independently of this run's archive (its length differs between runs, and
    # hypothesis replays saved examples: a strategy sized by it would be flaky), then folded in
    where = data.draw(st.integers(0, 2**32), label="position") % len(archive)
    if data.draw(st.booleans(), label="truncate"):
        damaged = archive[:where]
    else:
        at = where
        damaged = archive[:at] + bytes([archive[at] ^ data.draw(st.integers(1, 255))]) + archive[at + 1:]
    out = tmp_path / f"eeg-{next(_NAMES)}"  # a fresh folder for every example, shrinks included
    try:
        receive(out, exported["id"], _source(damaged), exported["key"])
    except vault.VaultError as exc:
        assert exc.exit_code in (5, 8), exc  # integrity failure or a malformed archive
        assert _nothing_left(out)
    else:  # a change that a tar reader ignores (padding, unused header bytes) changes no file
        assert _files(out) == _files(exported["folder"])


def test_another_export_or_another_key_is_refused(exported, tmp_path: Path) -> None:
    with pytest.raises(vault.IntegrityError):
        receive(tmp_path / "a", "x-another-export", _source(exported["archive"]), exported["key"])
    with pytest.raises(vault.IntegrityError):
        receive(tmp_path / "b", exported["id"], _source(exported["archive"]), bytes(32))
    assert _nothing_left(tmp_path / "a") and _nothing_left(tmp_path / "b")


def test_the_key_you_hold_must_be_the_services(exported) -> None:
    served = exported["key"].hex()
    assert check_public_key(None, served) == exported["key"]
    assert check_public_key(served, served) == exported["key"]
    with pytest.raises(vault.IntegrityError):
        check_public_key("00" * 32, served)


def test_an_unwritable_or_file_parent_is_refused_before_anything_is_asked(tmp_path: Path) -> None:
    from vault.remote.receive import check_out

    (tmp_path / "a-file").write_text("x")
    with pytest.raises(vault.Conflict):
        check_out(tmp_path / "a-file" / "deeper" / "out")
    if os.geteuid() != 0:  # root writes anywhere: the check has nothing to refuse there
        locked = tmp_path / "locked"
        locked.mkdir(mode=0o500)
        with pytest.raises(vault.UsageError):
            check_out(locked / "out")

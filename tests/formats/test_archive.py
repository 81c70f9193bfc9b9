"""The export archive: what `pack` writes, independent tar readers read; `unpack` gives back
the same tree and refuses everything `pack` would never write, leaving its folder empty.

Independent readers: GNU tar (`tar -tvf`, `tar -xf`; the system's, skipped where absent) and
Python's own `tarfile` in its ordinary (seeking) mode. Adversarial archives are written with
`tarfile` too, or by hand where tarfile would not write them.
"""

from __future__ import annotations

import io
import os
import shutil
import stat
import subprocess
import tarfile
import tracemalloc
from pathlib import Path

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from vault.errors import InvalidInput, UsageError
from vault.formats.archive import pack, unpack

SLOW = settings(deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture],
                max_examples=60)
BIG = {"max_bytes": 1 << 30, "max_files": 10_000}


def _tree(root: Path, files: dict[str, bytes]) -> Path:
    root.mkdir(parents=True, exist_ok=True)
    for name, data in files.items():
        path = root / name
        path.parent.mkdir(parents=True, exist_ok=True)
        path.write_bytes(data)
    return root


def _contents(root: Path) -> dict[str, bytes | None]:
    """Every path below root: bytes for files, None for folders."""
    return {str(p.relative_to(root)): (p.read_bytes() if p.is_file() else None)
            for p in sorted(root.rglob("*"))}


SAMPLE = {"manifest.json": b'{"body": {}}\n', "README": b"invented\n",
          "sub-a1/eeg/sub-a1_task-rest_eeg.edf": os.urandom(70_000), "sub-a1/empty.tsv": b"",
          "participants.tsv": b"participant_id\nsub-a1\n"}


@pytest.fixture
def sample_tree(tmp_path: Path) -> Path:
    return _tree(tmp_path / "export", SAMPLE)


def test_gnu_tar_lists_what_pack_wrote(sample_tree: Path, tmp_path: Path) -> None:
    if shutil.which("tar") is None:
        pytest.skip("no system tar")
    archive = tmp_path / "x.tar"
    archive.write_bytes(b"".join(pack(sample_tree)))
    assert archive.stat().st_size % 10240 == 0  # whole 20-block records, as tar writes them
    listing = subprocess.run(["tar", "--numeric-owner", "-tvf", str(archive)], check=True,
                             capture_output=True, text=True).stdout.splitlines()  # GNU tar
    rows = [line.split(maxsplit=5) for line in listing]
    names = [r[5] for r in rows]
    assert names == ["README", "manifest.json", "participants.tsv", "sub-a1/", "sub-a1/eeg/",
                     "sub-a1/eeg/sub-a1_task-rest_eeg.edf", "sub-a1/empty.tsv"]  # sorted, depth first
    for mode, owner, size, day, _time, name in rows:
        assert owner == "0/0" and day == "1970-01-01"  # no owner names, mtime 0
        assert mode == ("drwx------" if name.endswith("/") else "-rw-------")
        if not name.endswith("/"):
            assert int(size) == len(SAMPLE[name])
    out = tmp_path / "gnu"
    out.mkdir()
    subprocess.run(["tar", "-xf", str(archive), "-C", str(out)], check=True)  # GNU tar extracts
    assert _contents(out) == _contents(sample_tree)


def test_pythons_tarfile_reads_what_pack_wrote(sample_tree: Path) -> None:
    data = b"".join(pack(sample_tree))
    with tarfile.open(fileobj=io.BytesIO(data), mode="r:") as tar:  # seeking mode, not ours
        members = tar.getmembers()
        for m in members:
            assert (m.uid, m.gid, m.uname, m.gname, m.mtime) == (0, 0, "", "", 0)
            if m.isfile():
                assert tar.extractfile(m).read() == SAMPLE[m.name]
    assert {m.name for m in members if m.isfile()} == set(SAMPLE)
    assert data.startswith(b"README") and data[257:263] == b"ustar\x00"  # a POSIX ustar header


def test_pack_is_deterministic(sample_tree: Path, tmp_path: Path) -> None:
    copy = tmp_path / "copy"
    shutil.copytree(sample_tree, copy)
    os.utime(copy / "README", (1, 1))
    os.chmod(copy / "README", 0o644)
    assert b"".join(pack(sample_tree)) == b"".join(pack(copy))


_NAME = st.text("abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ0123456789-_.", min_size=1,
                max_size=12).filter(lambda s: s not in (".", ".."))
_PATH = st.lists(_NAME, min_size=1, max_size=4).map("/".join)
_LONG = st.lists(st.text("xyz", min_size=60, max_size=90), min_size=2, max_size=3).map("/".join)


def _casefold_clean(files: dict[str, bytes]) -> bool:
    """No path is a case-variant of another, and none runs through a file."""
    folded = {p.casefold() for p in files}
    if len(folded) != len(files):
        return False
    prefixes = {"/".join(p.split("/")[:i]).casefold() for p in files for i in range(1, p.count("/") + 1)}
    return not (prefixes & folded)


@SLOW
@given(files=st.dictionaries(st.one_of(_PATH, _LONG), st.binary(max_size=3000), min_size=1,
                             max_size=12).filter(_casefold_clean),
       cuts=st.lists(st.integers(1, 5000), max_size=30))
def test_round_trip_of_any_tree(files: dict[str, bytes], cuts: list[int], tmp_path_factory) -> None:
    src = _tree(tmp_path_factory.mktemp("src"), files)
    data = b"".join(pack(src))
    chunks, pos = [], 0
    for cut in cuts:  # the stream re-split as a network would
        chunks.append(data[pos : pos + cut])
        pos += cut
    chunks.append(data[pos:])
    dest = tmp_path_factory.mktemp("dest")
    result = unpack(iter(chunks), dest, **BIG)
    assert _contents(dest) == _contents(src)
    assert result["files"] == len(files) and result["bytes"] == sum(map(len, files.values()))
    for p in dest.rglob("*"):
        assert stat.S_IMODE(p.stat().st_mode) == (0o700 if p.is_dir() else 0o600)


def test_pack_memory_is_bounded_for_a_large_file(tmp_path: Path) -> None:
    src = tmp_path / "src"
    src.mkdir()
    with open(src / "recording.edf", "wb") as f:
        f.truncate(300 * 1024 * 1024)  # sparse: 300 MiB that take no disk
    tracemalloc.start()
    total = sum(len(chunk) for chunk in pack(src))
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    assert total >= 300 * 1024 * 1024
    assert peak < 8 * 1024 * 1024, peak


def test_pack_refuses_links_and_fifos(tmp_path: Path) -> None:
    for make in (lambda p: p.symlink_to("/etc/passwd"), lambda p: os.mkfifo(p)):
        src = _tree(tmp_path / f"src{id(make)}", {"a": b"x"})
        make(src / "odd")
        with pytest.raises(InvalidInput, match="other than regular files"):
            b"".join(pack(src))


def test_pack_refuses_a_missing_folder(tmp_path: Path) -> None:
    with pytest.raises(UsageError):
        next(pack(tmp_path / "absent"))


# --------------------------------------------------------------------------- adversarial


def _tar(members: list[tuple[tarfile.TarInfo, bytes | None]], fmt: int = tarfile.PAX_FORMAT) -> bytes:
    buf = io.BytesIO()
    with tarfile.open(fileobj=buf, mode="w", format=fmt) as tar:
        for info, data in members:
            if data is not None:
                info.size = len(data)
            tar.addfile(info, io.BytesIO(data) if data is not None else None)
    return buf.getvalue()


def _info(name: str, kind: bytes = tarfile.REGTYPE, **attrs: object) -> tarfile.TarInfo:
    info = tarfile.TarInfo(name)
    info.type = kind
    for k, v in attrs.items():
        setattr(info, k, v)
    return info


def _valid() -> bytes:
    return _tar([(_info("ok.txt"), b"fine")])


def _with_raw_name(name: bytes) -> bytes:
    """A ustar archive whose first member's name field is `name` exactly (tarfile would
    normalise some names on writing), checksum recomputed."""
    data = bytearray(_tar([(_info("placeholder"), b"x")], tarfile.USTAR_FORMAT))
    data[0:100] = name.ljust(100, b"\x00")
    data[148:156] = b" " * 8
    data[148:156] = b"%06o\x00 " % sum(data[:512])
    return bytes(data)


ADVERSARIAL = {
    "absolute": _tar([(_info("/etc/cron.d/x"), b"x")]),
    "absolute-raw": _with_raw_name(b"/tmp/escape"),
    "dotdot": _tar([(_info("../escape"), b"x")]),
    "dotdot-middle": _tar([(_info("a/../../escape"), b"x")]),
    "dotdot-raw": _with_raw_name(b"a/../../x"),
    "dot": _with_raw_name(b"./a"),
    "empty-part": _with_raw_name(b"a//b"),
    "backslash": _tar([(_info("a\\..\\b"), b"x")]),
    "control-char": _tar([(_info("a\nb"), b"x")]),
    "pax-absolute": _tar([(_info("fine", pax_headers={"path": "/etc/passwd"}), b"x")]),
    "long-dotdot": _tar([(_info("a/" * 80 + "../" * 90 + "x"), b"x")], tarfile.GNU_FORMAT),
    "symlink": _tar([(_info("link", tarfile.SYMTYPE, linkname="/etc/passwd"), None)]),
    "symlink-then-write": _tar([(_info("d", tarfile.SYMTYPE, linkname="/tmp"), None),
                                (_info("d/x"), b"x")]),
    "hardlink": _tar([(_info("a"), b"x"), (_info("b", tarfile.LNKTYPE, linkname="a"), None)]),
    "char-device": _tar([(_info("dev", tarfile.CHRTYPE, devmajor=1, devminor=3), None)]),
    "block-device": _tar([(_info("dev", tarfile.BLKTYPE, devmajor=8, devminor=0), None)]),
    "fifo": _tar([(_info("fifo", tarfile.FIFOTYPE), None)]),
    "contiguous": _tar([(_info("c", tarfile.CONTTYPE), b"x")]),
    "duplicate": _tar([(_info("a"), b"one"), (_info("a"), b"two")]),
    "duplicate-case": _tar([(_info("Manifest.json"), b"one"), (_info("manifest.json"), b"two")]),
    "duplicate-folder": _tar([(_info("d", tarfile.DIRTYPE), None), (_info("d", tarfile.DIRTYPE), None)]),
    "file-then-folder": _tar([(_info("a"), b"x"), (_info("a", tarfile.DIRTYPE), None)]),
    "through-a-file": _tar([(_info("a"), b"x"), (_info("a/b"), b"y")]),
    "over-max-bytes": _tar([(_info("big"), b"\x00" * 5000)]),
    "over-max-bytes-summed": _tar([(_info(f"f{i}"), b"\x01" * 900) for i in range(5)]),
    "over-max-files": _tar([(_info(f"f{i}"), b"") for i in range(11)]),
    "huge-pax-header": _tar([(_info("a", pax_headers={"comment": "x" * 200_000}), b"x")]),
    "garbage": os.urandom(20_000),
    "not-tar-text": b"this is not an archive\n" * 100,
    "empty": b"",
    "gzip": b"\x1f\x8b\x08\x00" + os.urandom(3000),
    "no-end-blocks": _valid()[:1024],  # header + one data block, then the stream stops
    "one-end-block": _valid()[:1536],
    "data-after-end": _valid() + b"trailing junk",
    "second-archive-after-end": _valid() + _valid(),
}
LIMITS = {"max_bytes": 4096, "max_files": 10}
REASONS = {  # the refusal each case must meet (so a case refused by accident shows)
    "absolute": "absolute", "dot": r"'\.' or '\.\.'", "empty-part": "empty", "backslash": "backslash",
    "control-char": "control", "pax-absolute": "absolute", "long": r"'\.\.'", "symlink": "not a regular",
    "hardlink": "not a regular", "char": "not a regular", "block": "not a regular", "fifo": "not a regular",
    "contiguous": "not a regular", "duplicate": "came before", "file-then": "came before",
    "through": "through a file", "over-max-bytes": "exceeds 4096 bytes", "over-max-files": "more than 10",
    "huge": "larger than its limits", "garbage": "not a tar", "not-tar": "not a tar", "empty": "not a tar",
    "gzip": "not a tar", "no-end": "no end-of-archive", "one-end": "no end-of-archive",
    "data-after": "after its end", "second": "after its end",
}


def _reason(case: str) -> str:
    return next(REASONS[k] for k in sorted(REASONS, key=len, reverse=True) if case.startswith(k))


@pytest.mark.parametrize("case", list(ADVERSARIAL))
def test_adversarial_archives_are_refused_and_leave_dest_empty(case: str, tmp_path: Path) -> None:
    dest = tmp_path / "dest"
    dest.mkdir()
    data = ADVERSARIAL[case]
    with pytest.raises(InvalidInput, match=_reason(case)):
        unpack([data[i : i + 700] for i in range(0, len(data), 700)], dest, **LIMITS)
    assert list(dest.iterdir()) == []
    assert not (tmp_path / "escape").exists()


def test_the_valid_controls_are_accepted(tmp_path: Path) -> None:
    # the adversarial cases' building blocks alone are fine, so each refusal is the thing tested
    for i, data in enumerate([_valid(), _tar([(_info(f"f{i}"), b"") for i in range(10)]),
                              _tar([(_info("d", tarfile.DIRTYPE), None), (_info("d/x"), b"x")]),
                              _tar([(_info("a"), b"\x00" * 4096)]), _valid() + b"\x00" * 10240]):
        dest = tmp_path / f"ok{i}"
        dest.mkdir()
        assert unpack([data], dest, **LIMITS)["files"] >= 1


@SLOW
@given(cut=st.integers(0, 40_000))
def test_a_stream_cut_anywhere_is_refused(cut: int, tmp_path_factory) -> None:
    src = _tree(tmp_path_factory.mktemp("src"), {"a.bin": b"\x07" * 20_000, "b/c.txt": b"c" * 3000})
    data = b"".join(pack(src))
    cut = min(cut, len(data) - 10240 + 1023)  # keep the cut before the second end block
    dest = tmp_path_factory.mktemp("dest")
    with pytest.raises(InvalidInput):
        unpack([data[:cut]], dest, **BIG)
    assert list(dest.iterdir()) == []


def test_a_failing_source_leaves_dest_empty(tmp_path: Path, sample_tree: Path) -> None:
    data = b"".join(pack(sample_tree))

    def chunks():
        yield data[:60_000]
        raise ConnectionResetError("gone")

    dest = tmp_path / "dest"
    dest.mkdir()
    with pytest.raises(ConnectionResetError):
        unpack(chunks(), dest, **BIG)
    assert list(dest.iterdir()) == []


@pytest.mark.parametrize("kind", ["missing", "not-empty", "a-file", "a-link"])
def test_dest_must_be_an_existing_empty_folder(kind: str, tmp_path: Path) -> None:
    dest = tmp_path / "dest"
    if kind == "not-empty":
        dest.mkdir()
        (dest / "kept").write_bytes(b"mine")
    elif kind == "a-file":
        dest.write_bytes(b"")
    elif kind == "a-link":
        (tmp_path / "real").mkdir()
        dest.symlink_to(tmp_path / "real")
    with pytest.raises(UsageError, match="folder to unpack into"):
        unpack([_valid()], dest, **LIMITS)
    if kind == "not-empty":
        assert [p.name for p in dest.iterdir()] == ["kept"]


@pytest.mark.parametrize("limits", [{"max_bytes": 0, "max_files": 1}, {"max_bytes": 1, "max_files": -1},
                                    {"max_bytes": True, "max_files": 1}, {"max_bytes": "9", "max_files": 1}])
def test_limits_must_be_positive_integers(limits: dict, tmp_path: Path) -> None:
    with pytest.raises(UsageError):
        unpack([_valid()], tmp_path, **limits)

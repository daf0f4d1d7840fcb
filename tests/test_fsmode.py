"""routerd.io.fsmode: state folders 0700 and files 0600 whatever the umask; the journal and
snapshots created through it; a real service's whole state directory."""
from __future__ import annotations

import os
import stat
import struct
from collections.abc import Iterator
from contextlib import contextmanager

import numpy as np
import pytest

from routerd.io import fsmode
from routerd.io import journal as J
from service_harness import running, short_base, stop_gracefully


def _mode(path: str) -> int:
    return stat.S_IMODE(os.stat(path).st_mode)


@contextmanager
def umask(mask: int) -> Iterator[None]:
    old = os.umask(mask)
    try:
        yield
    finally:
        os.umask(old)


def tree_modes(root: str) -> dict[str, int]:
    """Mode of every folder and file under ``root`` (root included), by relative path."""
    out = {".": _mode(root)}
    for d, dirs, files in os.walk(root):
        for n in dirs + files:
            p = os.path.join(d, n)
            out[os.path.relpath(p, root)] = _mode(p)
    return out


def assert_private_tree(root: str) -> None:
    """Every folder 0700 and every regular file 0600 under ``root`` (sockets, e.g. ipc://
    endpoints, are left to the folder that holds them)."""
    wrong = {}
    for rel, m in tree_modes(root).items():
        p = os.path.join(root, rel)
        st = os.lstat(p)
        want = fsmode.DIR_MODE if stat.S_ISDIR(st.st_mode) else \
            fsmode.FILE_MODE if stat.S_ISREG(st.st_mode) else None
        if want is not None and m != want:
            wrong[rel] = f"{m:04o} (want {want:04o})"
    assert wrong == {}, wrong


@pytest.mark.parametrize("mask", [0o000, 0o022, 0o277])
def test_private_dir_is_0700_whatever_the_umask(tmp_path: os.PathLike[str], mask: int) -> None:
    d = os.path.join(str(tmp_path), "a", "state")
    with umask(mask):
        assert fsmode.private_dir(d) is True
        assert fsmode.private_dir(d) is False           # already there: left alone
    assert _mode(d) == 0o700


def test_private_dir_leaves_an_existing_folder_and_refuses_a_file(tmp_path: os.PathLike[str]) -> None:
    d = os.path.join(str(tmp_path), "chosen")
    os.mkdir(d)
    os.chmod(d, 0o750)                  # an operator's choice (a group that reads it)
    assert fsmode.private_dir(d) is False and _mode(d) == 0o750
    f = os.path.join(str(tmp_path), "f")
    open(f, "w").close()
    with pytest.raises(FileExistsError):
        fsmode.private_dir(f)


@pytest.mark.parametrize("mask", [0o000, 0o022, 0o277])
def test_open_private_creates_0600_whatever_the_umask(tmp_path: os.PathLike[str], mask: int) -> None:
    p = os.path.join(str(tmp_path), "f")
    with umask(mask):
        fd = fsmode.open_private(p, os.O_WRONLY | os.O_CREAT | os.O_EXCL)
    try:
        os.write(fd, b"x")
    finally:
        os.close(fd)
    assert _mode(p) == 0o600


def test_open_private_narrows_an_existing_file_it_creates_into(tmp_path: os.PathLike[str]) -> None:
    p = os.path.join(str(tmp_path), "f")
    with open(p, "w") as fh:
        fh.write("old")
    os.chmod(p, 0o644)
    os.close(fsmode.open_private(p, os.O_WRONLY | os.O_CREAT | os.O_TRUNC))
    assert _mode(p) == 0o600
    os.chmod(p, 0o644)
    os.close(fsmode.open_private(p, os.O_RDONLY))    # no O_CREAT: only reads, changes nothing
    assert _mode(p) == 0o644


@pytest.mark.parametrize("mask", [0o000, 0o022])
def test_journal_and_snapshots_are_private(tmp_path: os.PathLike[str], mask: int) -> None:
    """Segments (new and rolled over), the bytes kept aside by recovery, snapshots and
    their folders: 0600 / 0700 even under the most permissive umask."""
    state = os.path.join(str(tmp_path), "state")
    with umask(mask):
        j = J.Journal(J.journal_dir(state), segment_bytes=1024)
        for i in range(40):
            j.append("tick", {"t": float(i), "pad": "x" * 40})
        j.close()
        segs = J._segments(J.journal_dir(state))
        assert len(segs) >= 3
        # corrupt a record in the middle segment: recovery keeps its tail aside as *.bad
        path = segs[1][1]
        with open(path, "r+b") as fh:
            data = bytearray(fh.read())
            off = 16 + 20 + struct.unpack_from("<I", data, 16 + 4)[0]
            data[off + 22] ^= 0x01
            fh.seek(0)
            fh.write(data)
        j = J.Journal(J.journal_dir(state))
        assert j.recovery.cuts and j.recovery.cuts[0].kept_as
        j.append("tick", {"t": 0.0})
        j.close()
        snaps = J.SnapshotStore(J.snapshot_dir(state))
        for no in (1, 2):
            snaps.write({"engine": {"Q": np.zeros(3)}}, no)
    names = tree_modes(state)
    assert any(n.endswith(".bad") for n in names) and any(n.endswith(".rdsnap") for n in names)
    # the state dir itself was made by Journal's parent creation (umask), not by us: the
    # service creates it private (tests/test_service.py); here its sub-folders and files
    del names["."]
    wrong = {n: f"{m:04o}" for n, m in names.items()
             if m != (0o700 if os.path.isdir(os.path.join(state, n)) else 0o600)}
    assert wrong == {}, wrong


@pytest.mark.slow
def test_a_services_state_dir_is_private_under_a_permissive_umask(tmp_path: os.PathLike[str]) -> None:
    """Everything a service writes in its state dir (the dir itself, journal, snapshots, and
    whatever else lives there: lock, recorded documents) is owner-only, even when it was
    started with umask 000."""
    import shutil

    base = short_base(tmp_path)
    try:
        with umask(0o000), running(base) as sp:
            assert sp.control({"op": "snapshot"})["snapshot"]["record"] >= 1
            assert stop_gracefully(sp) == 0, sp.log()
        state = os.path.join(base, "state")
        names = tree_modes(state)
        assert any(n.startswith("journal/") for n in names), names
        assert any(n.startswith("snapshots/") for n in names), names
        assert_private_tree(state)
    finally:
        shutil.rmtree(base, ignore_errors=True)

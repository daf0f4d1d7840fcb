"""Private files and folders: how routerd creates what it keeps in a state directory.

Owns the one rule for the state directory's permissions: folders are created ``0700`` and
files ``0600`` (owner only), whatever the process umask says.  The journal, snapshots, the
lock and the recorded documents are what the service trusts on restart, and a snapshot
holds every learned estimate: nobody else on the host needs to read them, and nobody else
may write them.  Modes are set explicitly after creation (``chmod``/``fchmod``), because a
umask can only take bits away — a restrictive one (``0277``) would otherwise leave a
folder the service cannot write into.  Existing folders are left as they are (an operator
may have chosen a group on purpose); files opened with ``O_CREAT`` end up ``0600``.

Must not import: anything else of routerd (every module that writes state calls it).
"""
from __future__ import annotations

import os
import stat

#: Mode of every folder routerd creates for state.
DIR_MODE = 0o700
#: Mode of every file routerd creates for state.
FILE_MODE = 0o600


def private_dir(path: str) -> bool:
    """Make sure ``path`` is a folder; create it ``0700`` (parents as the umask says) when
    missing.  Returns True if it was created here.  Raises ``OSError`` like
    ``os.makedirs`` (``FileExistsError`` if ``path`` is a file)."""
    parent = os.path.dirname(os.path.abspath(path))
    os.makedirs(parent, exist_ok=True)
    try:
        os.mkdir(path, DIR_MODE)
    except FileExistsError:
        if not os.path.isdir(path):
            raise
        return False
    os.chmod(path, DIR_MODE)
    return True


def open_private(path: str, flags: int) -> int:
    """``os.open(path, flags)``; with ``O_CREAT`` in ``flags`` the file is ``0600`` after
    the call (created that way, or narrowed if it already existed wider).  Returns the fd."""
    fd = os.open(path, flags, FILE_MODE)
    if flags & os.O_CREAT:
        try:
            if stat.S_IMODE(os.fstat(fd).st_mode) != FILE_MODE:
                os.fchmod(fd, FILE_MODE)
        except BaseException:
            os.close(fd)
            raise
    return fd

"""The state directory's lock (routerd/io/statedir.py, "lock" section): one writer per
directory, a second one told who holds it, a lock file left by a dead process locks nothing."""
from __future__ import annotations

import os
import subprocess
import sys
import textwrap

import pytest

from routerd.io import statedir as S


def test_second_lock_on_the_same_dir_is_refused_naming_the_holder(tmp_path: pytest.TempPathFactory) -> None:
    d = str(tmp_path / "state")
    with S.StateLock(d, "routerd serve") as first:
        assert first.held
        with open(os.path.join(d, "lock"), encoding="utf-8") as fh:
            assert fh.read().splitlines() == [str(os.getpid()), "routerd serve"]
        # flock belongs to the open file description: a second one conflicts even here
        with pytest.raises(S.StateDirBusy) as ei:
            S.StateLock(d).acquire()
        assert ei.value.holder == os.getpid()
        msg = str(ei.value)
        assert os.path.abspath(d) in msg and f"pid {os.getpid()}" in msg and "routerd serve" in msg
        # reading the holder did not drop the lock (an lockf lock would have been released)
        with pytest.raises(S.StateDirBusy):
            S.StateLock(d).acquire()
    # released: free again, and the file no longer names anyone
    with S.StateLock(d) as again:
        assert again.held
    assert os.path.getsize(os.path.join(d, "lock")) == 0


def test_a_lock_file_left_by_a_dead_process_is_not_a_lock(tmp_path: pytest.TempPathFactory) -> None:
    d = str(tmp_path)
    # a process that takes the lock and dies without releasing it (kill -9 in effect)
    code = textwrap.dedent(f"""
        import os
        from routerd.io import statedir
        statedir.StateLock({d!r}, "doomed").acquire()
        print(os.getpid(), flush=True)
        os._exit(0)
    """)
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    dead = int(out.stdout.strip())
    with open(os.path.join(d, "lock"), encoding="utf-8") as fh:
        assert fh.read().splitlines()[0] == str(dead)         # stale content left behind
    with S.StateLock(d, "next") as lk:
        assert lk.held
        with open(os.path.join(d, "lock"), encoding="utf-8") as fh:
            assert fh.read().splitlines() == [str(os.getpid()), "next"]


def test_a_live_holder_in_another_process_is_named(tmp_path: pytest.TempPathFactory) -> None:
    d = str(tmp_path)
    code = textwrap.dedent(f"""
        import sys
        from routerd.io import statedir
        statedir.StateLock({d!r}, "holder").acquire()
        print("held", flush=True)
        sys.stdin.read()
    """)
    p = subprocess.Popen([sys.executable, "-c", code], stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True)
    try:
        assert p.stdout is not None and p.stdout.readline().strip() == "held"
        with pytest.raises(S.StateDirBusy, match=rf"pid {p.pid}, holder"):
            S.StateLock(d).acquire()
    finally:
        p.kill()
        p.wait(10)
        for f in (p.stdin, p.stdout):
            if f is not None:
                f.close()
    with S.StateLock(d):          # the holder is dead: its lock died with it
        pass


def test_enclosing_state_dir(tmp_path: pytest.TempPathFactory) -> None:
    root = tmp_path / "s"
    (root / "journal").mkdir(parents=True)
    assert S.enclosing_state_dir(str(root)) == str(root)
    assert S.enclosing_state_dir(str(root / "out" / "deeper")) == str(root)
    other = tmp_path / "elsewhere"
    assert S.enclosing_state_dir(str(other)) is None
    sharded = tmp_path / "front"
    (sharded / "shard-0-of-2").mkdir(parents=True)
    with S.StateLock(str(sharded)):              # a front's root: a lock file, no journal/
        assert S.enclosing_state_dir(str(sharded / "o")) == str(sharded)
    # a stray file called "lock" does not make a state dir (and is never touched)
    stray = tmp_path / "home"
    stray.mkdir()
    (stray / "lock").write_text("mine\n")
    assert S.enclosing_state_dir(str(stray / "out")) is None
    assert (stray / "lock").read_text() == "mine\n"

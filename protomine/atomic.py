"""Atomic output: every file is written to a temporary name in the same folder, then renamed.

A crash (even SIGKILL) at any point leaves either the previous file or the new one, never a half
file.  Temporary names are ``.<name>.tmp-<pid>-<random>``; :func:`clean_stale_temporaries` removes
ones left by processes that no longer exist (called at the start of every writing command).

Test hook (inert unless set): ``PROTOMINE_TEST_PAUSE=<point>`` makes :func:`pause_point` print
``protomine-pause: <point>`` on stderr and sleep ``PROTOMINE_TEST_PAUSE_S`` seconds (default 60), so a
test can SIGKILL the process at a known place.  Points: ``inputs_read`` (inputs read, nothing written),
``mid_write`` (the temporary file is half written, writer lock held), ``before_rename`` (the
temporary file is complete and fsynced, not yet renamed).
"""
from __future__ import annotations

import contextlib
import errno
import fcntl
import os
import secrets
import sys
import time
from pathlib import Path
from typing import Iterator

from .errors import InputError

TMP_MARK = ".tmp-"
PAUSE_ENV = "PROTOMINE_TEST_PAUSE"


def pause_point(point: str) -> None:
    """Test hook: pause here when PROTOMINE_TEST_PAUSE == point (see module docstring); otherwise nothing."""
    if os.environ.get(PAUSE_ENV) != point:
        return
    print(f"protomine-pause: {point}", file=sys.stderr, flush=True)
    time.sleep(float(os.environ.get(PAUSE_ENV + "_S", "60")))


def _tmp_name(path: Path) -> Path:
    return path.with_name(f".{path.name}{TMP_MARK}{os.getpid()}-{secrets.token_hex(4)}")


@contextlib.contextmanager
def atomic_path(path: str | Path) -> Iterator[Path]:
    """Yield a temporary path beside ``path``; on success fsync and rename it onto ``path``."""
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    tmp = _tmp_name(path)
    try:
        yield tmp
        if tmp.exists():
            with open(tmp, "rb+") as fh:
                os.fsync(fh.fileno())
            pause_point("before_rename")
            os.replace(tmp, path)
    finally:
        if tmp.exists():
            tmp.unlink()


def write_text(path: str | Path, text: str) -> None:
    with atomic_path(path) as tmp:
        Path(tmp).write_text(text)


def write_bytes(path: str | Path, data: bytes) -> None:
    with atomic_path(path) as tmp:
        Path(tmp).write_bytes(data)


def clean_stale_temporaries(folder: str | Path) -> list[Path]:
    """Remove temporary files in ``folder`` whose writing process is gone. Returns what was removed."""
    removed = []
    folder = Path(folder)
    if not folder.is_dir():
        return removed
    for p in folder.iterdir():
        name = p.name
        if not name.startswith(".") or TMP_MARK not in name:
            continue
        try:
            pid = int(name.split(TMP_MARK, 1)[1].split("-", 1)[0])
        except ValueError:
            continue
        if pid == os.getpid() or _pid_alive(pid):
            continue
        with contextlib.suppress(OSError):
            p.unlink()
            removed.append(p)
    return removed


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except OSError as e:
        return e.errno == errno.EPERM
    return True


@contextlib.contextmanager
def exclusive_lock(path: str | Path, *, timeout: float = 0.0) -> Iterator[None]:
    """Hold an advisory lock on ``<path>.lock`` so two writers of one file never interleave.

    The second writer waits up to ``timeout`` seconds, then fails with a clear error.  The lock file is
    removed when the holder is done.  A waiter may have opened the file the holder then removes, so after
    acquiring the lock it checks that its open file is still the one at the path, and retries otherwise
    (the usual protocol for removable lock files).
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    lock = path.with_name(path.name + ".lock")
    deadline = time.monotonic() + timeout
    while True:
        fh = open(lock, "a+")
        try:
            fcntl.flock(fh.fileno(), fcntl.LOCK_EX | fcntl.LOCK_NB)
        except BlockingIOError:
            fh.close()
            if time.monotonic() >= deadline:
                raise InputError(path, None, "another protomine process is writing this file "
                                 f"(lock {lock.name} is held); try again when it has finished") from None
            time.sleep(0.1)
            continue
        try:
            same = os.fstat(fh.fileno()).st_ino == os.stat(lock).st_ino
        except FileNotFoundError:
            same = False
        if same:
            break
        fh.close()                      # the holder removed the file we locked: lock the new one
    try:
        yield
    finally:
        with contextlib.suppress(FileNotFoundError):
            lock.unlink()               # still holding it: a waiter on this inode will see it is gone
        fh.close()

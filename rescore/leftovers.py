"""Leftovers of killed runs: temporaries and scratch folders, and the locks that tell a
live run's from a dead one's.

Every temporary and scratch folder is held under ``flock`` by its run; the kernel drops
the lock when the process dies, in whatever PID namespace (or container) it ran, so a
later run removes a leftover only once it can take that lock.
"""

from __future__ import annotations

import contextlib
import fcntl
import os
import shutil
import stat
import tempfile
from collections.abc import Iterator
from pathlib import Path

TMP_PREFIX = ".rescore-tmp-"


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


SCRATCH_LOCK = "lock"


def _lock_free(path: Path) -> bool:
    """Whether nobody holds the ``flock`` of ``path`` (a temporary, or a scratch folder's
    lock file): taking it, briefly, proves that the run which held it is gone. A folder
    without a lock file (one made by an older version) counts as free."""
    target = path / SCRATCH_LOCK if path.is_dir() else path
    try:
        fd = os.open(target, os.O_RDONLY)
    except FileNotFoundError:
        return path.is_dir()
    except OSError:
        return False
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except OSError:
        return False
    finally:
        os.close(fd)
    return True


def remove_stale_temporaries(folder: Path, name: str) -> None:
    """Delete temporaries and scratch folders of ``name`` left by a killed run.

    Both signs must agree: nobody holds the leftover's lock, and no process of its pid runs
    here. (The lock alone proves it across PID namespaces; the pid closes the instant
    between a temporary's creation and its locking.)
    """
    prefix = f"{TMP_PREFIX}{name}."
    for leftover in folder.glob(f"{TMP_PREFIX}*"):
        rest = leftover.name[len(prefix):] if leftover.name.startswith(prefix) else ""
        pid_text = rest.split(".", 1)[0]
        if pid_text.isdigit() and not _pid_alive(int(pid_text)) and _lock_free(leftover):
            with contextlib.suppress(OSError):
                if leftover.is_dir():
                    shutil.rmtree(leftover)
                else:
                    leftover.unlink()


@contextlib.contextmanager
def scratch_folder(target: Path, label: str) -> Iterator[Path]:
    """A locked scratch folder beside ``target`` for one run, removed when the block ends.

    The run holds the ``flock`` of the folder's lock file for its whole life; a run killed
    with SIGKILL leaves the folder, and the next run writing the same output removes it
    once it can take that lock (see :func:`remove_stale_temporaries`).
    """
    folder = _scratch_home(target)
    remove_stale_temporaries(folder, target.name)
    scratch = Path(tempfile.mkdtemp(prefix=f"{TMP_PREFIX}{target.name}.{os.getpid()}.{label}.",
                                    dir=folder))
    try:
        fd = os.open(scratch / SCRATCH_LOCK, os.O_RDWR | os.O_CREAT, 0o600)
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            yield scratch
        finally:
            os.close(fd)
    finally:
        shutil.rmtree(scratch, ignore_errors=True)




def _scratch_home(target: Path) -> Path:
    """Beside the target, so shards live on its file system; in the system's temporary
    folder when the target is standard output or a special file (a device's folder is
    often not ours to write in)."""
    try:
        special = str(target) == "-" or not stat.S_ISREG(os.stat(target).st_mode)
    except OSError:
        special = False  # not there yet: an ordinary file to be
    if special:
        return Path(tempfile.gettempdir())
    return target.parent if str(target.parent) else Path(".")

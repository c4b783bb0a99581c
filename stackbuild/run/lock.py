"""One run at a time per build folder: an advisory lock held for the whole command.

Two runs writing the same build folder (a second ``build --resume`` started while
the first still runs, a ``render`` beside an ``update``) would interleave their
records and pixels. Every command that writes a build folder therefore holds an
exclusive POSIX record lock (:func:`fcntl.lockf`) on ``DIR/.stackbuild.lock`` while
it runs; a second command on the same folder is refused at once with an error that
says who holds it.

The operating system drops the lock when the holding process ends, however it
ends (a ``kill -9``, a node lost under Slurm), so a killed run never leaves a
stale lock behind and ``--resume`` can follow it straight away. The file itself
stays, holding the last holder's process id, host, command and start time for
the message. POSIX record locks also work on NFS with a lock daemon; on file
systems without working locks the lock cannot protect the folder (say so to your
cluster's administrators if ``stackbuild`` reports the lock as unsupported).

Whoever takes the lock first finishes a swap of a replacing build that a killed
``build --overwrite`` left halfway (:func:`stackbuild.run.start.complete_replacement`),
so no command ever sees half of one build and half of another.

Dask workers never take the lock: they only read the folder's records and write
their own pixels, on behalf of the command that holds it.
"""
from __future__ import annotations

import errno
import fcntl
import json
import os
import socket
import sys
import time
from contextlib import contextmanager
from pathlib import Path

from ..errors import BuildFolderError
from ..folder import LOCK_NAME, BuildFolder
from .start import complete_replacement



@contextmanager
def build_lock(folder: str | Path, command: str | None = None):
    """Hold the build folder's lock for the duration of the ``with`` block.

    Parameters
    ----------
    folder : str or Path
        The build folder; it is created if missing (the lock must exist before
        anything else is written there), and removed again on the way out if the
        command left nothing in it but the lock (a refused first ``build``).
    command : str, optional
        What is running, for the message a second run gets (default: this process's
        command line).

    Raises
    ------
    BuildFolderError
        If another process holds the lock, naming it; or if the file system does not
        support locks.
    """
    folder = Path(folder)
    created = not folder.exists()
    path = folder / LOCK_NAME
    try:
        folder.mkdir(parents=True, exist_ok=True)
        fd = os.open(path, os.O_RDWR | os.O_CREAT, 0o644)
    except OSError as exc:  # under a file, a read-only mount, no permission
        raise BuildFolderError(f"cannot create or write the build folder ({exc.strerror})", file=folder) from None
    try:
        try:
            fcntl.lockf(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError as exc:
            if exc.errno in (errno.EACCES, errno.EAGAIN):
                raise BuildFolderError(f"another stackbuild run is using this build folder ({_holder(fd)}); "
                                       "wait for it to finish or stop it first", file=folder) from None
            raise BuildFolderError(f"cannot lock the build folder ({exc.strerror}); the file system may not "
                                   "support locks", file=path) from None
        info = {"pid": os.getpid(), "host": socket.gethostname(),
                "command": command or " ".join(["stackbuild", *sys.argv[1:]]),
                "started": time.strftime("%Y-%m-%d %H:%M:%S %z")}
        os.ftruncate(fd, 0)
        os.pwrite(fd, (json.dumps(info) + "\n").encode(), 0)
        try:
            complete_replacement(BuildFolder(folder))
            yield path
        finally:
            fcntl.lockf(fd, fcntl.LOCK_UN)
    finally:
        os.close(fd)
        if created and [p.name for p in folder.iterdir()] == [LOCK_NAME]:
            path.unlink(missing_ok=True)
            folder.rmdir()


def _holder(fd: int) -> str:
    """Return a short description of the lock's holder, from what it wrote in the file."""
    try:
        info = json.loads(os.pread(fd, 4096, 0).decode() or "{}")
    except (OSError, ValueError):
        info = {}
    if not info:
        return "holder unknown"
    return (f"pid {info.get('pid', '?')} on {info.get('host', '?')}, started {info.get('started', '?')}: "
            f"{info.get('command', '?')}")

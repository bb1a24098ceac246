"""Advisory whole-file locks, one way on every platform: portalocker.

portalocker takes ``fcntl.flock`` on POSIX (the lock belongs to the open file description,
so a second open of the same file in the same process is refused too, and the lock dies with
its process) and ``LockFileEx`` / ``msvcrt.locking`` on Windows. collector opens the lock
file itself (never through a link: :func:`collector.storage.safe_paths.open_own_file`) and
hands the open file to the library, so the no-link guarantee stays ours.
"""

from __future__ import annotations

from typing import IO

import portalocker

__all__ = ["LockHeldElsewhere", "lock_exclusive"]


class LockHeldElsewhere(Exception):
    """Another open file (another process, or another open in this one) holds the lock."""


def lock_exclusive(handle: IO[bytes], *, wait: bool) -> None:
    """Take an exclusive lock on the open file ``handle``; released when it is closed.

    ``wait=False`` raises :class:`LockHeldElsewhere` at once if someone else holds it;
    ``wait=True`` blocks until the lock is free."""
    flags = portalocker.LOCK_EX if wait else portalocker.LOCK_EX | portalocker.LOCK_NB
    try:
        portalocker.lock(handle, flags)
    except portalocker.AlreadyLocked as exc:
        raise LockHeldElsewhere(str(exc)) from exc

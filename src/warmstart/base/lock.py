"""One writer per output folder: an exclusive lock file beside it.

``output_lock(path)`` creates ``.<name>.warmstart-lock`` next to ``path`` (a hidden sibling, so
that deleting or replacing the output, as ``--fresh`` does, never removes the lock) with the
holder's process id, host and start time, atomically (``O_CREAT | O_EXCL``). A second writer is
refused with who holds the lock. A lock left by a process that no longer runs on this host is
stale and taken over; one from another host cannot be checked from here, and its message says how
to clear it. Written here because the lock libraries on the registries do not report the holder or
detect stale locks across the ways our commands end (signals, killed worker pools).
"""
from __future__ import annotations

import contextlib
import json
import os
import socket
import time
from pathlib import Path
from typing import Any, Callable, Iterator, TypeVar

from ..errors import WarmstartError

__all__ = ["output_lock", "locks_output", "OutputBusyError", "lock_path"]

F = TypeVar("F", bound=Callable[..., Any])


class OutputBusyError(WarmstartError, RuntimeError):
    """Another warmstart process is writing the same output."""


def lock_path(path: str | os.PathLike[str]) -> Path:
    p = Path(path).absolute()
    return p.parent / f".{p.name}.warmstart-lock"


def _alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # exists, owned by someone else
        return True
    return True


@contextlib.contextmanager
def output_lock(path: str | os.PathLike[str], what: str) -> Iterator[Path]:
    """Hold the lock of output ``path`` for the duration of the block.

    Parameters
    ----------
    path : path
        The output folder or file (it need not exist yet).
    what : str
        The command, for the message a second writer gets (``"corpus build"``).

    Raises
    ------
    OutputBusyError
        A live process (or one on another host) holds the lock.
    """
    lock = lock_path(path)
    lock.parent.mkdir(parents=True, exist_ok=True)
    me = {"pid": os.getpid(), "host": socket.gethostname(), "what": what,
          "started": time.strftime("%Y-%m-%dT%H:%M:%S%z")}
    for _ in range(3):
        try:
            fd = os.open(lock, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
        except FileExistsError:
            try:
                holder = json.loads(lock.read_text())
            except (OSError, ValueError):
                holder = {}
            if holder.get("host") == me["host"] and isinstance(holder.get("pid"), int) and not _alive(holder["pid"]):
                lock.unlink(missing_ok=True)  # stale: its process is gone
                continue
            if not holder:  # being written this instant, or unreadable: look again
                time.sleep(0.2)
                continue
            raise OutputBusyError(
                f"{Path(path)}: {holder.get('what', 'another warmstart command')} (process {holder.get('pid')} on "
                f"{holder.get('host')}, since {holder.get('started')}) is writing here; wait for it, or use another "
                f"output. If that process is gone, delete {lock}") from None
        with os.fdopen(fd, "w") as fh:
            json.dump(me, fh)
        break
    else:
        raise OutputBusyError(f"{Path(path)}: cannot take the lock {lock}; delete it if no warmstart command is running")
    try:
        yield lock
    finally:
        with contextlib.suppress(OSError, ValueError):
            if json.loads(lock.read_text()).get("pid") == me["pid"]:
                lock.unlink()


def locks_output(what: str, argument: str = "out", when: Callable[[], bool] | None = None) -> Callable[[F], F]:
    """Decorator: run the function holding the lock of its output argument ``argument``.

    ``when`` (optional) decides per call whether to lock: the extra processes of a distributed run
    write into the folder their first process has locked.
    """
    import functools
    import inspect

    def deco(fn: F) -> F:
        sig = inspect.signature(fn)

        @functools.wraps(fn)
        def wrapper(*args: Any, **kwargs: Any) -> Any:
            if when is not None and not when():
                return fn(*args, **kwargs)
            out = sig.bind(*args, **kwargs).arguments[argument]
            with output_lock(out, what):
                return fn(*args, **kwargs)

        return wrapper  # type: ignore[return-value]

    return deco

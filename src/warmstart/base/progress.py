"""Progress: a tqdm bar on a terminal, a plain line every few seconds anywhere else.

tqdm redraws its bar with carriage returns, which a file or a pipe (CI logs, ``demo > log.txt``)
keeps as one endless line; tqdm has no line-per-update mode, so :class:`PlainProgress` is that
mode: same calls (``update``, ``close``, iteration, ``set_postfix_str``), one line per interval.
"""
from __future__ import annotations

import sys
import time
from typing import Any, Iterable, Iterator, TextIO

__all__ = ["progress_bar", "PlainProgress", "stderr_is_terminal", "LINE_INTERVAL_S"]

LINE_INTERVAL_S = 5.0


def stderr_is_terminal() -> bool:
    """Whether stderr is an interactive terminal (where redrawn bars belong)."""
    try:
        return bool(sys.stderr.isatty())
    except (AttributeError, ValueError):  # replaced or closed stream
        return False


class PlainProgress:
    """Progress written as ``desc: n/total (p %) [elapsed] postfix`` lines, at most one per
    ``interval`` seconds, plus one when it closes.

    Parameters
    ----------
    iterable : iterable, optional
    total : int, optional
        Expected count (``len(iterable)`` when it has one).
    desc, unit : str
    initial : int
        Count already done (a resumed job).
    interval : float
        Seconds between lines.
    disable : bool
        Write nothing.
    stream : file, optional
        Where lines go (``sys.stderr``).
    """

    def __init__(self, iterable: Iterable[Any] | None = None, *, total: int | None = None, desc: str = "",
                 unit: str = "it", initial: int = 0, interval: float = LINE_INTERVAL_S, disable: bool = False,
                 stream: TextIO | None = None, **_ignored: Any) -> None:
        self.iterable = iterable
        if total is None and iterable is not None and hasattr(iterable, "__len__"):
            total = len(iterable)  # type: ignore[arg-type]
        self.total, self.desc, self.unit, self.n = total, desc, unit, int(initial)
        self.interval, self.disable = float(interval), disable
        self.stream = stream
        self.postfix = ""
        self._t0 = time.monotonic()
        self._last = self._t0
        self._written: int | None = None  # the count of the last line written
        self._closed = False

    def line(self) -> str:
        elapsed = time.monotonic() - self._t0
        done = f"{self.n}/{self.total}" if self.total else f"{self.n}"
        pct = f" ({100 * self.n / self.total:.0f} %)" if self.total else ""
        post = f", {self.postfix}" if self.postfix else ""
        return f"{self.desc}: {done} {self.unit}{pct}, {elapsed:.0f} s{post}"

    def _write(self) -> None:
        if not self.disable:
            self._written = self.n
            print(self.line(), file=self.stream or sys.stderr, flush=True)

    def update(self, n: int = 1) -> None:
        self.n += n
        now = time.monotonic()
        if now - self._last >= self.interval:
            self._last = now
            self._write()

    def set_postfix_str(self, text: str, refresh: bool = True) -> None:
        self.postfix = text

    def set_postfix(self, **values: Any) -> None:
        self.postfix = ", ".join(f"{k}={v}" for k, v in values.items())

    def close(self) -> None:
        """Write the final count (unless the last line already showed it)."""
        if not self._closed:
            self._closed = True
            if self._written != self.n:
                self._write()

    def __iter__(self) -> Iterator[Any]:
        if self.iterable is None:
            raise TypeError("PlainProgress was made without an iterable")
        try:
            for item in self.iterable:
                yield item
                self.update()
        finally:
            self.close()

    def __enter__(self) -> "PlainProgress":
        return self

    def __exit__(self, *exc: Any) -> None:
        self.close()


def progress_bar(iterable: Iterable[Any] | None = None, **kwargs: Any) -> Any:
    """A tqdm bar when stderr is a terminal, else a :class:`PlainProgress`; same keyword arguments
    (``total``, ``desc``, ``unit``, ``initial``, ``disable``, ``leave``)."""
    if stderr_is_terminal():
        from tqdm.auto import tqdm

        return tqdm(iterable, **kwargs)
    return PlainProgress(iterable, **kwargs)

"""A small progress reporter for long work (partial search, batches, simulations).

Progress goes to standard error on one line that is rewritten in place. It is silent
when ``quiet=True`` or when the stream is not an interactive terminal (a log file, a
pipe, CI), so redirected output never fills with carriage returns.

Examples
--------
>>> with Progress(total=40, label="score tests", quiet=True) as bar:
...     for k in range(40):
...         bar.update()
>>> for item in track(range(3), label="items", quiet=True):
...     pass
"""

from __future__ import annotations

import sys
import time
from typing import IO, Iterable, Iterator, TypeVar

__all__ = ["Progress", "track", "format_duration"]

T = TypeVar("T")


def format_duration(seconds: float) -> str:
    """``h:mm:ss`` (or ``m:ss`` under an hour) for a number of seconds."""
    s = max(int(round(seconds)), 0)
    h, rest = divmod(s, 3600)
    m, s = divmod(rest, 60)
    return f"{h}:{m:02d}:{s:02d}" if h else f"{m}:{s:02d}"


def _is_terminal(stream: IO[str]) -> bool:
    isatty = getattr(stream, "isatty", None)
    try:
        return bool(isatty()) if callable(isatty) else False
    except (ValueError, OSError):  # closed stream
        return False


class Progress:
    """Report how far a long loop has come.

    Parameters
    ----------
    total
        Number of steps expected (``None`` if unknown: only the count is shown).
    label
        Short name of the work, shown first on the line.
    quiet
        Show nothing at all.
    stream
        Where to write; standard error by default. Nothing is shown unless the
        stream is a terminal.
    min_interval
        Least number of seconds between two redraws.

    Attributes
    ----------
    count
        Steps done so far.
    enabled
        Whether anything is written (not quiet and the stream is a terminal).
    """

    def __init__(
        self,
        total: int | None = None,
        *,
        label: str = "",
        quiet: bool = False,
        stream: IO[str] | None = None,
        min_interval: float = 0.2,
    ) -> None:
        self.total = None if total is None else int(total)
        self.label = str(label)
        self.stream = sys.stderr if stream is None else stream
        self.enabled = (not quiet) and _is_terminal(self.stream)
        self.min_interval = float(min_interval)
        self.count = 0
        self.note = ""
        self._start = time.monotonic()
        self._last_draw = -float("inf")
        self._width = 0
        self._closed = False

    # ------------------------------------------------------------ protocol
    def __enter__(self) -> "Progress":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    # ------------------------------------------------------------- actions
    def update(self, n: int = 1, *, note: str | None = None) -> None:
        """Record ``n`` more steps done, optionally with a short note (current item)."""
        self.count += int(n)
        if note is not None:
            self.note = str(note)
        if not self.enabled:
            return
        now = time.monotonic()
        done = self.total is not None and self.count >= self.total
        if done or now - self._last_draw >= self.min_interval:
            self._draw(now)

    def line(self, now: float | None = None) -> str:
        """The text of the progress line as it would be drawn now."""
        now = time.monotonic() if now is None else now
        elapsed = now - self._start
        parts = [self.label] if self.label else []
        if self.total:
            frac = min(self.count / self.total, 1.0)
            parts.append(f"{self.count}/{self.total} ({frac:4.0%})")
            parts.append(f"elapsed {format_duration(elapsed)}")
            if 0 < self.count < self.total:
                parts.append(f"left ~{format_duration(elapsed * (self.total - self.count) / self.count)}")
        else:
            parts.append(f"{self.count} done")
            parts.append(f"elapsed {format_duration(elapsed)}")
        if self.note:
            parts.append(self.note[:40])
        return "  ".join(parts)

    def _draw(self, now: float) -> None:
        text = self.line(now)
        pad = " " * max(self._width - len(text), 0)
        self.stream.write("\r" + text + pad)
        self.stream.flush()
        self._width = len(text)
        self._last_draw = now

    def close(self) -> None:
        """Draw the final state and end the line (once)."""
        if self._closed:
            return
        self._closed = True
        if self.enabled and self.count:
            self._draw(time.monotonic())
            self.stream.write("\n")
            self.stream.flush()


def track(
    iterable: Iterable[T],
    *,
    total: int | None = None,
    label: str = "",
    quiet: bool = False,
    stream: IO[str] | None = None,
) -> Iterator[T]:
    """Iterate over ``iterable`` while showing a :class:`Progress` line.

    ``total`` defaults to ``len(iterable)`` when the iterable has a length.
    """
    if total is None:
        try:
            total = len(iterable)  # type: ignore[arg-type]
        except TypeError:
            total = None
    with Progress(total, label=label, quiet=quiet, stream=stream) as bar:
        for obj in iterable:
            yield obj
            bar.update()

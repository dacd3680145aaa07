"""Progress of long work (fitting the levels, partial search, batches, simulations).

A thin layer over tqdm (a widely used progress library): one line on standard error,
rewritten in place. It is silent when ``quiet=True`` or when the stream is not an
interactive terminal (a log file, a pipe, CI), so redirected output never fills with
carriage returns.

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

from tqdm import tqdm

__all__ = ["Progress", "track", "format_duration"]

T = TypeVar("T")

NOTE_WIDTH = 40
BAR_FORMAT = "{desc}  {n_fmt}/{total_fmt} ({percentage:3.0f}%)  elapsed {elapsed}  left ~{remaining}{postfix}"
COUNT_FORMAT = "{desc}  {n_fmt} done  elapsed {elapsed}{postfix}"


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
        self.count = 0
        self.note = ""
        self._start = time.monotonic()
        self._bar = tqdm(
            total=self.total,
            desc=self.label,
            file=self.stream,
            disable=not self.enabled,
            mininterval=float(min_interval),
            leave=True,
            bar_format=BAR_FORMAT if self.total else COUNT_FORMAT,
        )

    def __enter__(self) -> "Progress":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    def update(self, n: int = 1, *, note: str | None = None) -> None:
        """Record ``n`` more steps done, optionally with a short note (current item)."""
        self.count += int(n)
        if note is not None:
            self.note = str(note)
            self._bar.set_postfix_str(self.note[:NOTE_WIDTH], refresh=False)
        self._bar.update(int(n))

    def line(self, now: float | None = None) -> str:
        """The text of the progress line as it would be drawn now."""
        now = time.monotonic() if now is None else now
        elapsed = now - self._start
        parts = [self.label] if self.label else []
        if self.total:
            parts.append(f"{self.count}/{self.total} ({min(self.count / self.total, 1.0):4.0%})")
            parts.append(f"elapsed {format_duration(elapsed)}")
            if 0 < self.count < self.total:
                parts.append(f"left ~{format_duration(elapsed * (self.total - self.count) / self.count)}")
        else:
            parts += [f"{self.count} done", f"elapsed {format_duration(elapsed)}"]
        if self.note:
            parts.append(self.note[:NOTE_WIDTH])
        return "  ".join(parts)

    def close(self) -> None:
        """Draw the final state and end the line (once)."""
        self._bar.close()


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

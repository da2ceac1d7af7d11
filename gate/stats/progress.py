"""A one-line progress display on stderr for long passes over the rows.

Shown only when the pass has run longer than ``delay`` seconds (short checks stay quiet), only
when the stream is a terminal (CI logs and pipes get nothing), and never with ``--quiet``.
The line carries rows done, rows per second and, when the row count is known beforehand
(Parquet metadata), the share done and an estimate of the time left.
"""

from __future__ import annotations

import sys
import time
from collections.abc import Callable
from typing import TextIO

#: Seconds a pass runs before the line appears.
SHOW_AFTER_SECONDS = 2.0
#: Seconds between redraws.
REDRAW_SECONDS = 0.25


class RowProgress:
    """Counts rows through one pass and redraws a line on ``stream`` now and then.

    Parameters
    ----------
    label : what the pass is, e.g. ``"reading rows"``
    total : rows expected (None when the format does not say)
    stream : where to draw (default: ``sys.stderr``)
    enabled : draw at all (default: only when ``stream`` is a terminal)
    clock : seconds, monotonic (injected by tests)
    """

    def __init__(self, label: str, total: int | None, *, stream: TextIO | None = None,
                 enabled: bool | None = None, clock: Callable[[], float] = time.monotonic,
                 delay: float = SHOW_AFTER_SECONDS) -> None:
        self.label = label
        self.total = total
        self.rows = 0
        self._stream = stream if stream is not None else sys.stderr
        self._enabled = _is_terminal(self._stream) if enabled is None else enabled
        self._clock = clock
        self._delay = delay
        self._start = clock()
        self._last_draw = -1.0
        self._width = 0

    @property
    def shown(self) -> bool:
        return self._width > 0

    def advance(self, rows: int) -> None:
        self.rows += rows
        if not self._enabled:
            return
        now = self._clock()
        elapsed = now - self._start
        if elapsed < self._delay or now - self._last_draw < REDRAW_SECONDS:
            return
        self._last_draw = now
        self._draw(self.line(elapsed))

    def line(self, elapsed: float) -> str:
        """The text of the line after ``elapsed`` seconds."""
        rate = self.rows / elapsed if elapsed > 0 else 0.0
        parts = [f"gate: {self.label}: {self.rows:,}"]
        if self.total:
            share = min(self.rows / self.total, 1.0)
            parts[0] += f" of {self.total:,} rows ({share:.0%})"
        else:
            parts[0] += " rows"
        parts.append(f"{_si(rate)} rows/s")
        if self.total and rate > 0 and self.rows < self.total:
            parts.append(f"about {_duration((self.total - self.rows) / rate)} left")
        return "  ".join(parts)

    def finish(self) -> None:
        """Clear the line (if one was drawn) so the summary starts on a clean line."""
        if self.shown:
            self._stream.write("\r" + " " * self._width + "\r")
            self._stream.flush()
            self._width = 0

    def _draw(self, text: str) -> None:
        pad = max(self._width - len(text), 0)
        self._stream.write("\r" + text + " " * pad)
        self._stream.flush()
        self._width = max(self._width, len(text))


#: Builds the progress counter of one pass: (label, expected rows or None) -> counter.
ProgressFactory = Callable[[str, "int | None"], RowProgress]


def terminal_progress(label: str, total: int | None) -> RowProgress:
    """The CLI's progress: stderr, only when it is a terminal."""
    return RowProgress(label, total)


def _is_terminal(stream: TextIO) -> bool:
    try:
        return stream.isatty()
    except (AttributeError, ValueError):
        return False


def _si(value: float) -> str:
    for scale, suffix in ((1e9, "G"), (1e6, "M"), (1e3, "k")):
        if value >= scale:
            return f"{value / scale:.1f}{suffix}"
    return f"{value:.0f}"


def _duration(seconds: float) -> str:
    if seconds < 60:
        return f"{seconds:.0f} s"
    minutes, secs = divmod(round(seconds), 60)
    if minutes < 60:
        return f"{minutes} min {secs:02d} s"
    hours, minutes = divmod(minutes, 60)
    return f"{hours} h {minutes:02d} min"

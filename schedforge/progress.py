"""Progress reporting for long work: a bar on a terminal, log lines otherwise.

One tiny reusable reporter for items (sweep points), no dependency.  On a terminal
it redraws a single line ``[#######.............] 12/40 points  0.53/s  ETA 53 s``;
when the stream is not a terminal (a log file, CI) it writes one flushed line per
finished item instead, so nothing is lost if the run is killed; ``mode="quiet"``
silences it.

Within one long anneal (several qubits take minutes), the integrators report how far
through the anneal they are (x = t / tf) with :func:`report_anneal_progress`; a
caller that wants to show it installs an :class:`AnnealProgress` with
:func:`anneal_progress`.  Without one the report costs a context-variable lookup.
"""

from __future__ import annotations

import sys
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from contextvars import ContextVar
from typing import TextIO

__all__ = [
    "AnnealProgress",
    "ProgressReporter",
    "anneal_progress",
    "format_duration",
    "report_anneal_progress",
]

_MODES = ("auto", "bar", "lines", "quiet")


def _resolve_mode(mode: str, stream: TextIO) -> str:
    """Check ``mode``; ``"auto"`` is a bar on a terminal and lines otherwise."""
    if mode not in _MODES:
        raise ValueError(f"mode must be one of {_MODES}, got {mode!r}")
    if mode == "auto":
        isatty = getattr(stream, "isatty", None)
        return "bar" if isatty is not None and isatty() else "lines"
    return mode


def format_duration(seconds: float) -> str:
    """Human-readable duration, e.g. ``"42 s"``, ``"3 min 05 s"``, ``"2 h 07 min"``.

    Parameters
    ----------
    seconds : float
        Duration; negative or non-finite values give ``"?"``.

    Returns
    -------
    str
    """
    if not seconds >= 0 or seconds == float("inf"):
        return "?"
    s = round(seconds)
    if s < 60:
        return f"{s} s"
    if s < 3600:
        return f"{s // 60} min {s % 60:02d} s"
    return f"{s // 3600} h {(s % 3600) // 60:02d} min"


class ProgressReporter:
    """Report items done out of a total, with rate and estimated time left.

    Parameters
    ----------
    total : int
        Number of items in the whole job (including those already done earlier).
    done : int, optional
        Items already done before this run started (e.g. found in a store); they
        count towards ``done/total`` but not towards the rate.
    label : str, optional
        What is counted ("points").
    stream : text stream, optional
        Where to write; default ``sys.stderr``.
    mode : {"auto", "bar", "lines", "quiet"}, optional
        ``"auto"`` draws a bar when ``stream`` is a terminal and writes lines otherwise.
    clock : callable, optional
        Monotonic clock in seconds (injectable for tests).
    min_interval : float, optional
        Minimum seconds between two redraws of the bar.
    """

    def __init__(
        self,
        total: int,
        *,
        done: int = 0,
        label: str = "points",
        stream: TextIO | None = None,
        mode: str = "auto",
        clock: Callable[[], float] = time.monotonic,
        min_interval: float = 0.1,
    ) -> None:
        self.stream = sys.stderr if stream is None else stream
        self.mode = _resolve_mode(mode, self.stream)
        self.total = int(total)
        self.done = int(done)
        self.label = label
        self._clock = clock
        self._min_interval = float(min_interval)
        self._start_done = self.done
        self._t0 = clock()
        self._last_draw = -float("inf")
        self._bar_drawn = False

    # -- figures ------------------------------------------------------------
    @property
    def rate(self) -> float:
        """Items per second finished in this run (0 before the first one)."""
        elapsed = self._clock() - self._t0
        n = self.done - self._start_done
        return n / elapsed if n > 0 and elapsed > 0 else 0.0

    @property
    def eta_s(self) -> float:
        """Estimated seconds left (``inf`` while the rate is unknown)."""
        remaining = max(self.total - self.done, 0)
        if remaining == 0:
            return 0.0
        r = self.rate
        return remaining / r if r > 0 else float("inf")

    def status_text(self) -> str:
        """``"12/40 points  0.53/s  ETA 53 s"``."""
        text = f"{self.done}/{self.total} {self.label}"
        r = self.rate
        if r > 0:
            text += f"  {r:.3g}/s" if r >= 0.1 else f"  {60 * r:.3g}/min"
        if self.done < self.total:
            text += f"  ETA {format_duration(self.eta_s)}"
        return text

    # -- events -------------------------------------------------------------
    def start(self, message: str = "") -> None:
        """Announce the job (and draw an empty bar on a terminal)."""
        if self.mode == "quiet":
            return
        if message:
            self._write_line(message)
        if self.mode == "bar":
            self._draw(force=True)

    def advance(self, n: int = 1, note: str = "") -> None:
        """Count ``n`` more items done; ``note`` describes the item (lines mode)."""
        self.done += int(n)
        if self.mode == "lines":
            extra = f": {note}" if note else ""
            self._write(f"[{self.status_text()}]{extra}\n")
        elif self.mode == "bar":
            self._draw(force=self.done >= self.total)

    def log(self, message: str) -> None:
        """Write a message on its own line without disturbing the bar."""
        if self.mode == "quiet":
            return
        self._write_line(message)
        if self.mode == "bar":
            self._draw(force=True)

    def finish(self, message: str = "") -> None:
        """End the bar (newline) and write an optional closing message."""
        if self.mode == "quiet":
            return
        if self.mode == "bar" and self._bar_drawn:
            self._draw(force=True)
            self._write("\n")
            self._bar_drawn = False
        if message:
            self._write(message + "\n")

    # -- drawing ------------------------------------------------------------
    def _draw(self, force: bool = False) -> None:
        now = self._clock()
        if not force and now - self._last_draw < self._min_interval:
            return
        self._last_draw = now
        width = 24
        frac = self.done / self.total if self.total > 0 else 1.0
        filled = min(width, round(width * frac))
        bar = "#" * filled + "." * (width - filled)
        self._write(f"\r[{bar}] {self.status_text()}\x1b[K")
        self._bar_drawn = True

    def _write_line(self, message: str) -> None:
        if self.mode == "bar" and self._bar_drawn:
            self._write("\r\x1b[K")
            self._bar_drawn = False
        self._write(message + "\n")

    def _write(self, text: str) -> None:
        self.stream.write(text)
        self.stream.flush()


# -- progress within one anneal -------------------------------------------------------
_ANNEAL_PROGRESS: ContextVar[Callable[[float], None] | None] = ContextVar(
    "schedforge_anneal_progress", default=None
)


def report_anneal_progress(x: float) -> None:
    """Tell the installed reporter (if any) that the anneal has reached x = t / tf."""
    callback = _ANNEAL_PROGRESS.get()
    if callback is not None:
        callback(x)


@contextmanager
def anneal_progress(callback: Callable[[float], None] | None) -> Iterator[None]:
    """Install ``callback`` to receive :func:`report_anneal_progress` calls in a block."""
    token = _ANNEAL_PROGRESS.set(callback)
    try:
        yield
    finally:
        _ANNEAL_PROGRESS.reset(token)


class AnnealProgress:
    """Show how far one long anneal has got: ``anneal x = 0.42 (pass 1), 1 min 10 s``.

    Silent for the first ``delay`` seconds (most points take less).  On a terminal it
    redraws one line at most every ``bar_interval`` seconds; otherwise it writes a
    line at most every ``line_interval`` seconds.  x is the fraction of the anneal
    time integrated, not of the work: steps crowd where the spectrum changes fast, so
    no time left is estimated.  When x falls back (an integrator checks its result
    with a second run, or hands over to another), the pass count goes up.

    Parameters
    ----------
    stream : text stream, optional
        Default ``sys.stderr``.
    mode : {"auto", "bar", "lines", "quiet"}, optional
    clock : callable, optional
        Monotonic clock in seconds (injectable for tests).
    delay, bar_interval, line_interval : float, optional
        Seconds.
    note : str, optional
        Appended to every progress line (e.g. why this anneal is slow).
    """

    def __init__(
        self,
        *,
        stream: TextIO | None = None,
        mode: str = "auto",
        clock: Callable[[], float] = time.monotonic,
        delay: float = 2.0,
        bar_interval: float = 0.5,
        line_interval: float = 30.0,
        note: str = "",
    ) -> None:
        self.note = note
        self.stream = sys.stderr if stream is None else stream
        self.mode = _resolve_mode(mode, self.stream)
        self._clock = clock
        self._t0 = clock()
        self._delay = float(delay)
        self._interval = float(bar_interval if self.mode == "bar" else line_interval)
        self._last = -float("inf")
        self._x = 0.0
        self.passes = 1
        self._drawn = False

    def __call__(self, x: float) -> None:
        if x < self._x - 0.25:
            self.passes += 1
        self._x = float(x)
        now = self._clock()
        if self.mode == "quiet" or now - self._t0 < self._delay:
            return
        if now - self._last < self._interval:
            return
        self._last = now
        text = (
            f"anneal x = {self._x:.3f} (pass {self.passes}), "
            f"{format_duration(now - self._t0)} so far"
        )
        if self.note:
            text += f"; {self.note}"
        if self.mode == "bar":
            self.stream.write(f"\r{text}\x1b[K")
            self._drawn = True
        else:
            self.stream.write(text + "\n")
        self.stream.flush()

    def finish(self) -> None:
        """Clear the line on a terminal (the result is printed next)."""
        if self._drawn:
            self.stream.write("\r\x1b[K")
            self.stream.flush()
            self._drawn = False

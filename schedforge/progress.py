"""Progress reporting for long work (sweeps): a bar on a terminal, log lines otherwise.

One tiny reusable reporter, no dependency.  On a terminal it redraws a single line
``[#######.............] 12/40 points  0.53/s  ETA 53 s``; when the stream is not a
terminal (a log file, CI) it writes one flushed line per finished item instead, so
nothing is lost if the run is killed; ``mode="quiet"`` silences it.
"""

from __future__ import annotations

import sys
import time
from collections.abc import Callable
from typing import TextIO

__all__ = ["ProgressReporter", "format_duration"]

_MODES = ("auto", "bar", "lines", "quiet")


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
        if mode not in _MODES:
            raise ValueError(f"mode must be one of {_MODES}, got {mode!r}")
        self.stream = sys.stderr if stream is None else stream
        if mode == "auto":
            isatty = getattr(self.stream, "isatty", None)
            mode = "bar" if isatty is not None and isatty() else "lines"
        self.mode = mode
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

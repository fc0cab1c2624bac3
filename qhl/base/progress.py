"""Progress lines with an estimated time left, for long work (on stderr).

Estimate (common practice): after `done` of `total` equal-cost units in `elapsed` seconds,
    time left = elapsed / done * (total - done).
On a terminal the line is rewritten in place ('\\r'); otherwise (a log file) a new line is
written at most every `min_interval` seconds, and always for the last unit.
"""

import sys
import time

__all__ = ["Progress", "FractionProgress", "format_seconds", "time_left"]


def time_left(elapsed: float, done: float, total: float) -> float:
    """elapsed / done * (total - done) seconds; inf before the first unit is done."""
    if done <= 0:
        return float("inf")
    return max(elapsed / done * (total - done), 0.0)


def format_seconds(seconds: float) -> str:
    """'42 s', '3.5 min', '1.2 h' or '?' for an unknown (infinite) time."""
    if seconds != seconds or seconds == float("inf"):
        return "?"
    if seconds < 90:
        return f"{seconds:.0f} s"
    if seconds < 5400:
        return f"{seconds / 60:.1f} min"
    return f"{seconds / 3600:.1f} h"


class Progress:
    """One progress line: 'label: done/total [#####.....] 1.2 min elapsed, ~3.4 min left  note'.

    Args:
        label: what is being done.
        total: number of units (> 0).
        stream: default sys.stderr.
        min_interval: seconds between lines when the stream is not a terminal (a terminal line is
            rewritten at most every 0.2 s).
        clock: a monotonic clock (seconds), replaceable in tests.
    """

    def __init__(self, label: str, total: int, stream=None, min_interval: float = 10.0, clock=time.monotonic):
        self.label, self.total = label, max(int(total), 1)
        self.stream = stream if stream is not None else sys.stderr
        self.clock = clock
        self.start = clock()
        self.tty = bool(getattr(self.stream, "isatty", lambda: False)())
        self.min_interval = 0.2 if self.tty else float(min_interval)
        self._last = None
        self._open = False

    def line(self, done: int, note: str = "") -> str:
        elapsed = self.clock() - self.start
        width = 20
        fill = int(width * min(done, self.total) / self.total)
        left = "done" if done >= self.total else f"~{format_seconds(time_left(elapsed, done, self.total))} left"
        text = (f"{self.label}: {done}/{self.total} [{'#' * fill}{'.' * (width - fill)}] "
                f"{format_seconds(elapsed)} elapsed, {left}")
        return text + (f"  {note}" if note else "")

    def update(self, done: int, note: str = "") -> None:
        """Show `done` units finished (rate-limited; the last unit is always shown)."""
        now = self.clock()
        if done < self.total and self._last is not None and now - self._last < self.min_interval:
            return
        self._last = now
        text = self.line(done, note)
        if self.tty:
            self.stream.write("\r" + text[:150].ljust(150))
            self._open = True
            if done >= self.total:
                self.close()
        else:
            self.stream.write(text + "\n")
        self.stream.flush()

    def close(self) -> None:
        """End a terminal line that is still open."""
        if self._open:
            self.stream.write("\n")
            self.stream.flush()
            self._open = False


class FractionProgress:
    """A Progress fed with fractions done (callable(fraction)), shown only once the work has taken
    longer than `after` seconds (short runs print nothing).

    Args:
        label: what is being done; after: seconds before the first line; other arguments as Progress.
    """

    UNITS = 1000

    def __init__(self, label: str, after: float = 2.0, stream=None, clock=time.monotonic):
        self.bar = Progress(label, self.UNITS, stream=stream, clock=clock)
        self.after = float(after)

    def __call__(self, fraction: float) -> None:
        shown = self.bar._last is not None
        if self.bar.clock() - self.bar.start > self.after or (fraction >= 1 and shown):
            self.bar.update(int(round(min(max(fraction, 0.0), 1.0) * self.UNITS)))

    def close(self) -> None:
        self.bar.close()

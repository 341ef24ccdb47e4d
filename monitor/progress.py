"""Progress of long runs (replay, tuning): a bar on a terminal, plain log lines otherwise.

On a terminal the bar is tqdm's, sized by the input file's bytes and showing the rows done and
the rate. When the stream is not a terminal (a log file, a CI job, a pipe) a line such as::

    replay: 3,000,000 rows (42% of input), 1,210,000 rows/s, 2.5 s elapsed, about 3.4 s left

is written every ``every_s`` seconds (default 10) and once at the end, so a long job shows
that it is alive without filling its log. Everything goes to ``stderr`` by default, so a
``--json`` summary on stdout stays clean.

>>> import io
>>> buf = io.StringIO()
>>> p = Progress(total=1000, desc="replay", stream=buf, every_s=0.0, tty=False)
>>> p.update(rows=500, done=500)
>>> p.close()
>>> buf.getvalue().splitlines()[0].startswith("replay: 500 rows (50% of input)")
True
"""

from __future__ import annotations

import sys
import time
from typing import Callable, TextIO


class Progress:
    """Report rows done and the share of the input consumed.

    Parameters
    ----------
    total : int, optional
        Size of the input in the units of ``done`` (bytes of a CSV file, rows of a Parquet
        file, settings of a tuning grid); ``None`` when unknown (no percentage, no estimate
        of the time left).
    desc : str
        Label at the start of each line (``"replay"``, ``"tune"``).
    stream : text stream
        Where to write (default ``sys.stderr``).
    enabled : bool
        ``False`` writes nothing (``--quiet``).
    every_s : float
        Seconds between plain log lines when not on a terminal.
    tty : bool, optional
        Force the bar (``True``) or plain lines (``False``); default: ``stream.isatty()``.
    unit : str
        Name of what ``rows`` counts, in the lines written.
    clock : callable
        Monotonic clock in seconds (tests pass a fake one).
    """

    def __init__(self, total: int | None = None, desc: str = "replay", stream: TextIO | None = None,
                 enabled: bool = True, every_s: float = 10.0, tty: bool | None = None,
                 unit: str = "rows", clock: Callable[[], float] = time.monotonic):
        self.total = total if total and total > 0 else None
        self.desc = desc
        self.stream = stream if stream is not None else sys.stderr
        self.enabled = enabled
        self.every_s = float(every_s)
        self.unit = unit
        self.clock = clock
        self.rows = 0
        self.done = 0
        self._t0 = clock()
        self._last = self._t0
        self._bar = None
        if tty is None:
            tty = bool(getattr(self.stream, "isatty", lambda: False)())
        self.tty = tty
        if enabled and tty:
            from tqdm import tqdm

            self._bar = tqdm(total=self.total, desc=desc, file=self.stream, unit="B",
                             unit_scale=True, unit_divisor=1024, leave=True, dynamic_ncols=True)

    @property
    def elapsed(self) -> float:
        """Seconds since the start."""
        return self.clock() - self._t0

    def line(self) -> str:
        """The plain progress line for the current counts."""
        el = self.elapsed
        rate = self.rows / el if el > 0 else 0.0
        parts = [f"{self.desc}: {self.rows:,} {self.unit}"]
        if self.total:
            frac = min(self.done / self.total, 1.0)
            parts[0] += f" ({100 * frac:.0f}% of input)"
        parts.append(f"{rate:,.0f} {self.unit}/s")
        parts.append(f"{el:.1f} s elapsed")
        if self.total and 0 < self.done < self.total:
            left = el * (self.total - self.done) / self.done
            parts.append(f"about {left:.1f} s left")
        return ", ".join(parts)

    def update(self, rows: int = 0, done: int | None = None) -> None:
        """Add ``rows`` to the row count; ``done`` is the absolute input position reached."""
        self.rows += int(rows)
        if done is None:
            done = self.done + int(rows)
        step = int(done) - self.done
        self.done = int(done)
        if not self.enabled:
            return
        if self._bar is not None:
            self._bar.update(max(step, 0))
            el = self.elapsed
            self._bar.set_postfix_str(f"{self.rows:,} {self.unit}, "
                                      f"{self.rows / el if el > 0 else 0:,.0f} {self.unit}/s",
                                      refresh=False)
            return
        now = self.clock()
        if now - self._last >= self.every_s:
            self._last = now
            print(self.line(), file=self.stream, flush=True)

    def close(self) -> None:
        """Finish: close the bar, or write the final plain line."""
        if not self.enabled:
            return
        if self._bar is not None:
            self._bar.close()
            self._bar = None
        else:
            print(self.line() + " (done)", file=self.stream, flush=True)

    def __enter__(self) -> "Progress":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

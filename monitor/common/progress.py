"""Progress of the steps of ``comove update`` (and the demo's build), on a terminal or in a log.

On a terminal (stderr is a TTY) a step shows a tqdm bar that disappears when it ends. When
stderr goes to a file or a pipe (cron, systemd, ``>> comove.log 2>&1``), bars would write
carriage-return garbage, so each step writes plain lines instead, each with its elapsed time:
a progress line when another tenth of the work is done or ten seconds have passed (at most
one a second), and one closing line, e.g. ``marginals: 12 assets in 41.2 s``.
"""

from __future__ import annotations

import sys
import time
from collections.abc import Callable
from typing import Self, TextIO

from tqdm import tqdm

#: Seconds between progress lines of a long step, and the least between any two.
EVERY_SECONDS = 10.0
MIN_SECONDS = 1.0


class StepProgress:
    """Progress of one step: ``with StepProgress("rolling", 660, "pair") as p: p.update()``.

    Parameters
    ----------
    step : str
        Name of the step, first word of every line.
    total : int
        Units of work (assets, pairs, files).
    unit : str
        What a unit is, singular (``"asset"``); lines add an ``s`` when the count is not 1.
    enabled : bool
        False writes nothing at all.
    stream : file, optional
        Where to write (default ``sys.stderr`` at construction).
    clock : callable, optional
        Seconds, monotonic (default ``time.perf_counter``); tests pass their own.
    """

    def __init__(self, step: str, total: int, unit: str, *, enabled: bool = True,
                 stream: TextIO | None = None,
                 clock: Callable[[], float] = time.perf_counter) -> None:
        self.step, self.total, self.unit = step, int(total), unit
        self.stream = sys.stderr if stream is None else stream
        self.clock = clock
        self.done = 0
        self.enabled = enabled
        self._start = self._last = clock()
        self._tenth = 0
        isatty = getattr(self.stream, "isatty", None)
        self._bar = (tqdm(total=self.total, desc=step, unit=unit, leave=False, file=self.stream)
                     if enabled and callable(isatty) and isatty() else None)

    def __enter__(self) -> Self:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close(failed=exc[0] is not None)

    def _units(self, n: int) -> str:
        return f"{n} {self.unit}{'' if n == 1 else 's'}"

    def _write(self, text: str) -> None:
        self.stream.write(text + "\n")
        self.stream.flush()

    @property
    def elapsed(self) -> float:
        """Seconds since the step started."""
        return self.clock() - self._start

    def update(self, n: int = 1) -> None:
        """Count ``n`` more units done; writes a progress line when one is due."""
        self.done += n
        if not self.enabled:
            return
        if self._bar is not None:
            self._bar.update(n)
            return
        now = self.clock()
        tenth = 10 * self.done // self.total if self.total else 10
        since = now - self._last
        if self.done < self.total and since >= MIN_SECONDS and (
                tenth > self._tenth or since >= EVERY_SECONDS):
            self._write(f"{self.step}: {self.done} of {self._units(self.total)} "
                        f"({100 * self.done // self.total}%), {now - self._start:.1f} s")
            self._last = now
            self._tenth = tenth

    def close(self, failed: bool = False) -> None:
        """End the step: the bar goes, or the closing line is written."""
        if not self.enabled:
            return
        self.enabled = False
        if self._bar is not None:
            self._bar.close()
            return
        if failed:
            self._write(f"{self.step}: stopped after {self.done} of "
                        f"{self._units(self.total)}, {self.elapsed:.1f} s")
        else:
            self._write(f"{self.step}: {self._units(self.done)} in {self.elapsed:.1f} s")

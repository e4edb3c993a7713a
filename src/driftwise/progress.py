"""Progress of a counted loop on stderr (a bar on a terminal, a plain line every few seconds elsewhere), and
a stopwatch of named stages (the ``--profile`` tables).

On a terminal a tqdm bar redraws itself in place.  When stderr is a pipe or a log file a bar would be a
stream of carriage returns, so :class:`Progress` writes instead one ordinary line every ``every_s``
seconds (and none for a loop that ends sooner)::

    driftwise fit: step 400/1500, elbo=-1.2e+04, 12 s elapsed, ~33 s left

The time left is the steps still to run at the rate of the steps since the previous line (so the
compilation of the first steps does not inflate it), printed with :func:`driftwise.units.format_duration`.
"""

from __future__ import annotations

import sys
import time
from collections.abc import Callable, Iterator
from contextlib import contextmanager
from typing import Any, TextIO

from tqdm.auto import tqdm

from .units import format_duration

PLAIN_EVERY_S = 5.0


class Progress:
    """``update``/``set_postfix``/``set_description``/``close`` like a tqdm bar; disabled when ``enabled`` is False."""

    def __init__(self, total: int, *, desc: str, initial: int = 0, enabled: bool = True, unit: str = "step",
                 stream: TextIO | None = None, every_s: float = PLAIN_EVERY_S,
                 clock: Callable[[], float] = time.monotonic) -> None:
        self.stream = sys.stderr if stream is None else stream
        self.total, self.n, self.desc, self.unit = int(total), int(initial), desc, unit
        self.every_s, self.clock, self.postfix = float(every_s), clock, ""
        terminal = enabled and hasattr(self.stream, "isatty") and self.stream.isatty()
        self.plain = enabled and not terminal
        self.bar = tqdm(total=total, initial=initial, disable=not terminal, desc=desc, unit=unit, file=self.stream,
                        leave=False, dynamic_ncols=True) if terminal else None
        self.start = self.last = clock()
        self.last_n = self.n

    def update(self, n: int = 1) -> None:
        self.n += n
        if self.bar is not None:
            self.bar.update(n)
        elif self.plain and self.clock() - self.last >= self.every_s:
            self._line()

    def set_postfix(self, **values: Any) -> None:
        self.postfix = ", ".join(f"{key}={value}" for key, value in values.items())
        if self.bar is not None:
            self.bar.set_postfix(**values)

    def set_description(self, desc: str) -> None:
        self.desc = desc
        if self.bar is not None:
            self.bar.set_description(desc)

    def close(self) -> None:
        if self.bar is not None:
            self.bar.close()

    def line(self) -> str:
        """The plain progress line for the present state."""
        now = self.clock()
        elapsed, done = now - self.start, self.n - self.last_n
        left = (now - self.last) * (self.total - self.n) / done if done > 0 and self.total >= self.n else None
        parts = [f"{self.desc}: {self.unit} {self.n}/{self.total}"] + ([self.postfix] if self.postfix else [])
        parts.append(f"{format_duration(round(elapsed, 1))} elapsed")
        if left is not None:
            parts.append(f"~{format_duration(round(left, 1))} left")
        return ", ".join(parts)

    def _line(self) -> None:
        print(self.line(), file=self.stream, flush=True)
        self.last, self.last_n = self.clock(), self.n


class Stopwatch:
    """Wall seconds of named stages, added into ``laps`` (a dict; a new one when None)::

        clock = Stopwatch()
        with clock("read"):
            ...
        clock.laps   # {"read": 0.12}

    A stage timed twice adds up; a stage that raises is still counted.
    """

    def __init__(self, laps: dict[str, float] | None = None, clock: Callable[[], float] = time.perf_counter) -> None:
        self.laps = {} if laps is None else laps
        self.clock = clock

    @contextmanager
    def __call__(self, name: str) -> Iterator[None]:
        start = self.clock()
        try:
            yield
        finally:
            self.laps[name] = self.laps.get(name, 0.0) + self.clock() - start

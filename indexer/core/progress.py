"""Progress reporting: a bar on a terminal, plain log lines otherwise."""

from __future__ import annotations

import logging
import sys
import time

from tqdm import tqdm

log = logging.getLogger(__name__)


class Progress:
    """Wraps tqdm when stderr is a terminal; otherwise (a cron job, output to a file) logs a line every
    `every_s` seconds, so long work is never silent there. `enabled` forces the bar on or off."""

    def __init__(self, total: int | None, desc: str, *, enabled: bool | None = None, every_s: float = 10.0,
                 unit: str = "file", initial: int = 0):
        self.desc = desc
        self.total = total
        self.unit = unit
        self.count = initial
        self._initial = initial
        self.every_s = every_s
        self._started = self._last = time.monotonic()
        tty = sys.stderr.isatty()
        self._bar = tqdm(total=total, initial=initial, desc=desc, unit=unit, dynamic_ncols=True) \
            if (enabled if enabled is not None else tty) else None

    def update(self, n: int = 1, **postfix) -> None:
        self.count += n
        if self._bar is not None:
            self._bar.update(n)
            if postfix:
                self._bar.set_postfix(postfix, refresh=False)
            return
        now = time.monotonic()
        if now - self._last >= self.every_s:
            self._last = now
            rate = (self.count - self._initial) / max(now - self._started, 1e-9)
            of = f" of {self.total}" if self.total is not None else ""
            extra = "".join(f", {k.replace('_', ' ')} {v}" for k, v in postfix.items())
            log.info("%s: %d%s %ss (%.1f a second%s)", self.desc, self.count, of, self.unit, rate, extra)

    def close(self) -> None:
        if self._bar is not None:
            self._bar.close()

    def __enter__(self) -> "Progress":
        return self

    def __exit__(self, *exc) -> None:
        self.close()

"""A dependency-free progress line on stderr for long runs."""

from __future__ import annotations

import sys
import time


class Progress:
    """Prints ``label  42% [####......]  12.3 s`` in place, at most 4 times a second."""

    def __init__(self, total: int, *, enabled: bool = True, label: str = "") -> None:
        self.total = max(int(total), 1)
        self.enabled = enabled and sys.stderr.isatty()
        self.label = label
        self._t0 = time.monotonic()
        self._last = 0.0

    def update(self, done: int) -> None:
        if not self.enabled:
            return
        now = time.monotonic()
        if now - self._last < 0.25:
            return
        self._last = now
        frac = min(max(done / self.total, 0.0), 1.0)
        bar = "#" * int(frac * 30)
        sys.stderr.write(f"\r{self.label}  {frac:4.0%} [{bar:<30}]  {now - self._t0:6.1f} s")
        sys.stderr.flush()

    def done(self) -> None:
        if self.enabled:
            self.update(self.total)
            self._last = 0.0
            sys.stderr.write("\n")
            sys.stderr.flush()

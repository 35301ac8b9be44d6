"""A dependency-free progress display on stderr for long runs.

On a terminal: one line redrawn in place, at most 4 times a second. Elsewhere
(logs, CI): a plain line at every 10 %, once the run has taken more than 5 s.
"""

from __future__ import annotations

import sys
import time
from typing import Any


class Progress:
    """``label  42% [############..................]  12.3 s``."""

    def __init__(self, total: int, *, enabled: bool = True, label: str = "") -> None:
        self.total = max(int(total), 1)
        self.enabled = enabled
        self.tty = sys.stderr.isatty()
        self.label = label
        self._t0 = time.monotonic()
        self._last = 0.0
        self._last_decile = 0

    def update(self, done: int, *, force: bool = False) -> None:
        if not self.enabled:
            return
        now = time.monotonic()
        frac = min(max(done / self.total, 0.0), 1.0)
        elapsed = now - self._t0
        if self.tty:
            if not force and now - self._last < 0.25:
                return
            self._last = now
            bar = "#" * int(frac * 30)
            sys.stderr.write(f"\r{self.label}  {frac:4.0%} [{bar:<30}]  {elapsed:6.1f} s")
        else:
            decile = int(frac * 10)
            if decile <= self._last_decile or (elapsed < 5.0 and not force):
                return
            self._last_decile = decile
            sys.stderr.write(f"{self.label}  {frac:4.0%}  {elapsed:6.1f} s\n")
        sys.stderr.flush()

    def done(self) -> None:
        """Show 100 % (and end the terminal line)."""
        if not self.enabled:
            return
        elapsed = time.monotonic() - self._t0
        if self.tty:
            self.update(self.total, force=True)
            sys.stderr.write("\n")
        elif elapsed >= 5.0 and self._last_decile < 10:
            self.update(self.total, force=True)
        sys.stderr.flush()


def raw_position(fh: Any) -> int:
    """Bytes read so far of a (possibly gzip) file: progress through the file on disk."""
    raw = getattr(fh, "fileobj", None)
    try:
        return int((raw if raw is not None else fh).tell())
    except (OSError, ValueError):
        return 0

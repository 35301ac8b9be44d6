"""Where a site agent's hits come from: ``--source SCHEME:ARG``.

=================  =============================================================
``file:PATH``      a file of hit times, one per line: GPS ns (an integer) or ISO 8601
                   UTC (``2026-03-14T00:00:01.123456789Z``); ``#`` starts a comment,
                   blank lines are ignored, a bad line is reported with its number
                   and skipped. A regular file is *uploaded* (:class:`UploadSource`);
                   a FIFO, or ``-`` for standard input, is read in real time
                   (:class:`StreamSource`).
``pipe:PATH``      the same (``pipe:-`` is standard input).
``sim:RATE``       a simulated detector: Poisson hits at RATE Hz in real time
                   (:class:`SimSource`).
=================  =============================================================

A real-time source drives a :class:`HitSink` (the agent's batcher): ``up(at)``
when it starts delivering, ``put(t)`` with hit times, ``mark(upto)`` when every
hit before ``upto`` has been delivered, and ``down(at)`` when it stops (the
batcher ends the live time there). Every time is GPS ns.
"""

from __future__ import annotations

import asyncio
import contextlib
import datetime as _dt
import logging
import os
import re
import stat
import sys
import warnings
from abc import ABC, abstractmethod
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field
from pathlib import Path
from typing import ClassVar, Protocol

import numpy as np

from tocsin.gpstime import gps_minus_unix_ns, gps_now_ns, utc_to_gps_ns
from tocsin.live.logs import event
from tocsin.types import NS_PER_S, I64Array

log = logging.getLogger("tocsin.agent")

I64_MAX = 2**63 - 1
MAX_BAD_LINES_SHOWN = 20
"""Bad lines logged one by one; after that only counted (and summed up at the end)."""
DEFAULT_GRACE_S = 0.2
"""How late a line may arrive after its hit time and still fall in its batch (s)."""
DEFAULT_STALL_S = 60.0
"""A stream silent this long (no line at all, comments included) stops counting as live."""
MAX_AHEAD_S = 60.0
"""A real-time hit more than this far ahead of the clock is refused as a bad line (s)."""
TICK_S = 0.05
"""How often a real-time source looks at the clock (s)."""
_MAX_SIM_STEP_S = 10.0

_ISO = re.compile(r"(\d{4})-(\d{2})-(\d{2})T(\d{2}):(\d{2}):(\d{2})(?:\.(\d{1,9}))?Z?")
_UNIX_EPOCH_ORDINAL = _dt.date(1970, 1, 1).toordinal()


def parse_time(text: str) -> int:
    """A hit time as GPS ns: a non-negative integer, or ISO 8601 UTC with up to 9 decimals.

    ISO times are converted with the leap seconds of :mod:`tocsin.gpstime`
    (astropy's table; a leap second ``23:59:60`` goes through astropy itself).
    Raises ``ValueError`` naming the text.
    """
    s = text.strip()
    if s.isascii() and s.isdigit():
        v = int(s)
        if v > I64_MAX:
            raise ValueError(f"GPS ns {s!r} does not fit in int64")
        return v
    m = _ISO.fullmatch(s)
    if m is None:
        raise ValueError(f"{text!r} is neither GPS ns (an integer) nor an ISO 8601 UTC time")
    y, mo, d, hh, mm, ss = (int(m.group(k)) for k in range(1, 7))
    frac_ns = int((m.group(7) or "").ljust(9, "0"))
    if not 1980 <= y <= 2200:
        raise ValueError(f"{text!r}: year {y} is outside 1980..2200")
    if hh > 23 or mm > 59 or ss > 60:
        raise ValueError(f"{text!r} is not a valid time of day")
    if ss == 60:
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("error")  # ERFA only warns about a 61st second of a day
                return utc_to_gps_ns(s)
        except (ValueError, Warning):
            raise ValueError(f"{text!r} is not a leap second") from None
    try:
        day = _dt.date(y, mo, d).toordinal() - _UNIX_EPOCH_ORDINAL
    except ValueError:
        raise ValueError(f"{text!r} is not a valid date") from None
    unix_ns = (day * 86400 + hh * 3600 + mm * 60 + ss) * NS_PER_S + frac_ns
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # ERFA "dubious year" past the leap-second table
        gps = unix_ns + gps_minus_unix_ns(unix_ns)
    if gps < 0:
        raise ValueError(f"{text!r} is before the GPS epoch 1980-01-06")
    return gps


@dataclass(slots=True)
class SourceStats:
    """Counters of a source. ``bad`` keeps the first bad lines as (line number, reason)."""

    lines: int = 0
    hits: int = 0
    bad_lines: int = 0
    bad: list[tuple[int, str]] = field(default_factory=list)


class LineParser:
    """Turns lines into GPS ns, counting and reporting bad lines by number (1-based)."""

    def __init__(self, name: str) -> None:
        self.name = name
        self.stats = SourceStats()

    def parse(
        self, lines: Iterable[bytes], *, reject: Callable[[int], str | None] | None = None
    ) -> I64Array:
        """Hit times of ``lines`` (in order); ``reject(t)`` may refuse a time with a reason."""
        out: list[int] = []
        st = self.stats
        for raw in lines:
            st.lines += 1
            s = raw.split(b"#", 1)[0].strip()
            if not s:
                continue
            try:
                v = int(s) if s.isdigit() else parse_time(s.decode("ascii"))
                why = None if reject is None else reject(v)
                if why is not None:
                    raise ValueError(f"{s.decode('ascii')!r} {why}")
            except (ValueError, UnicodeDecodeError) as exc:
                self._bad(st.lines, raw, exc)
                continue
            if v > I64_MAX:
                self._bad(st.lines, raw, ValueError(f"GPS ns {s!r} does not fit in int64"))
                continue
            out.append(v)
        st.hits += len(out)
        return np.array(out, dtype=np.int64)

    def _bad(self, line_no: int, raw: bytes, exc: Exception) -> None:
        st = self.stats
        st.bad_lines += 1
        reason = str(exc) if isinstance(exc, ValueError) else "not ASCII text"
        if len(st.bad) < MAX_BAD_LINES_SHOWN:
            st.bad.append((line_no, reason))
            event(log, "bad_line", logging.WARNING, source=self.name, line=line_no, reason=reason)
        elif st.bad_lines == MAX_BAD_LINES_SHOWN + 1:
            event(
                log,
                "bad_lines_not_shown",
                logging.WARNING,
                source=self.name,
                after=MAX_BAD_LINES_SHOWN,
            )


class HitSink(Protocol):
    """What a real-time source drives (the agent's batcher). Times are GPS ns."""

    def up(self, at_ns: int) -> None: ...
    def put(self, t: I64Array) -> None: ...
    def mark(self, upto_ns: int) -> None: ...
    def down(self, at_ns: int) -> None: ...


class HitSource(ABC):
    """A source of one site's hits. Subclasses register a scheme with a factory."""

    _factories: ClassVar[dict[str, Callable[[str, SourceOptions], HitSource]]] = {}
    stats: SourceStats

    @abstractmethod
    def describe(self) -> str:
        """A short text for logs (``file:/data/hits.txt``)."""


class RealtimeSource(HitSource):
    """Hits arriving now; :meth:`run` drives a sink until the source ends or is cancelled."""

    @abstractmethod
    async def run(self, sink: HitSink) -> None: ...


class UploadSource(HitSource):
    """Every hit of a regular file, read at once; the agent sends them as fast as it can."""

    def __init__(self, name: str, lines: Iterable[bytes]) -> None:
        self.name = name
        parser = LineParser(name)
        t = parser.parse(lines)
        self.stats = parser.stats
        if t.size == 0:
            raise ValueError(
                f"{name!r} holds no valid hit time ({self.stats.lines} lines, "
                f"{self.stats.bad_lines} bad)"
            )
        self.hits: I64Array = np.sort(t, kind="stable")
        """All hit times, sorted (GPS ns)."""

    def describe(self) -> str:
        return f"file:{self.name}"


class StreamSource(RealtimeSource):
    """Lines from a FIFO or standard input, in real time.

    A line may arrive up to ``grace_s`` after its hit time. While lines flow
    (or a writer is connected and quiet for less than ``stall_s``), the data is
    complete up to *now − grace*. When a FIFO's writer goes away the source is
    down until another writer opens it; the end of standard input ends the
    source. Silence longer than ``stall_s`` (0 = never) is a stall: live time
    stops ``stall_s`` after the last line and resumes with the next one.
    A writer that is quiet on purpose keeps the site live with comment lines.
    """

    def __init__(self, path: Path | None, *, grace_s: float, stall_s: float) -> None:
        self.path = path
        self.grace_ns = round(grace_s * NS_PER_S)
        self.stall_ns = round(stall_s * NS_PER_S)
        self.parser = LineParser(self.describe())
        self.stats = self.parser.stats

    def describe(self) -> str:
        return "pipe:-" if self.path is None else f"file:{self.path}"

    async def run(self, sink: HitSink) -> None:
        if self.path is None:
            fd, own = sys.stdin.fileno(), False
        else:
            fd, own = os.open(self.path, os.O_RDONLY | os.O_NONBLOCK), True
        was_blocking = os.get_blocking(fd)
        os.set_blocking(fd, False)
        try:
            await self._loop(fd, sink)
        finally:
            if own:
                os.close(fd)
            else:
                os.set_blocking(fd, was_blocking)

    async def _loop(self, fd: int, sink: HitSink) -> None:
        idle, live, stalled = 0, 1, 2
        state, last_alive, rest = idle, 0, b""
        ahead_ns = round(MAX_AHEAD_S * NS_PER_S)
        last_empty = gps_now_ns()  # when a read last found nothing: new data came after it
        while True:
            try:
                data: bytes | None = os.read(fd, 1 << 16)
            except BlockingIOError:
                data = None
            now = gps_now_ns()
            if data:
                if state != live:
                    sink.up(min(now, last_empty) - self.grace_ns)
                    state = live
                last_alive = now
                *lines, rest = (rest + data).split(b"\n")
                self._put(sink, lines, now + ahead_ns)
                sink.mark(now - self.grace_ns)
                continue
            if data == b"":  # end of input, or no writer on the FIFO
                if rest:
                    self._put(sink, [rest], now + ahead_ns)
                    rest = b""
                if state == live:
                    sink.down(now)
                    event(log, "source_down", source=self.describe(), reason="end of input")
                state, last_empty = idle, now
                if self.path is None:
                    return
                await asyncio.sleep(TICK_S)
                continue
            last_empty = now
            # a writer is connected but has nothing for us now
            if state == idle:
                sink.up(now - self.grace_ns)
                state, last_alive = live, now
            if state == live:
                if self.stall_ns and now - last_alive > self.stall_ns:
                    sink.down(last_alive + self.stall_ns)
                    state = stalled
                    event(
                        log,
                        "source_stalled",
                        logging.WARNING,
                        source=self.describe(),
                        silent_s=self.stall_ns / NS_PER_S,
                    )
                else:
                    sink.mark(now - self.grace_ns)
            await _readable(fd, TICK_S)

    def _put(self, sink: HitSink, lines: list[bytes], limit_ns: int) -> None:
        def too_far(v: int) -> str | None:
            return None if v <= limit_ns else f"is more than {MAX_AHEAD_S:g} s in the future"

        t = self.parser.parse(lines, reject=too_far)
        if t.size:
            sink.put(t)


async def _readable(fd: int, timeout_s: float) -> None:
    """Return when ``fd`` is readable or after ``timeout_s``."""
    loop = asyncio.get_running_loop()
    fut: asyncio.Future[None] = loop.create_future()

    def ready() -> None:
        if not fut.done():
            fut.set_result(None)

    loop.add_reader(fd, ready)
    try:
        with contextlib.suppress(TimeoutError):
            await asyncio.wait_for(fut, timeout_s)
    finally:
        loop.remove_reader(fd)


class SimSource(RealtimeSource):
    """A simulated detector: a Poisson process of ``rate_hz`` hits per second, in real time.

    Every tick draws the number of hits since the last tick (Poisson) and their
    times (uniform), vectorised. If the process was held up for more than
    10 s (suspended), the missed span is dead time, not simulated.
    """

    def __init__(self, rate_hz: float, *, seed: int | None, extra: Iterable[int] = ()) -> None:
        """``extra``: hit times (GPS ns) to add when their time comes (an injected signal)."""
        if not (0.0 < rate_hz <= 1e6):
            raise ValueError(f"sim rate {rate_hz!r} Hz must be in (0, 1e6]")
        self.rate_hz = rate_hz
        self.rng = np.random.default_rng(seed)
        self.stats = SourceStats()
        self.extra = np.sort(np.asarray(list(extra), dtype=np.int64))

    def describe(self) -> str:
        return f"sim:{self.rate_hz:g}"

    async def run(self, sink: HitSink) -> None:
        last = gps_now_ns()
        sink.up(last)
        while True:
            await asyncio.sleep(TICK_S)
            now = gps_now_ns()
            if now <= last:
                continue
            if now - last > _MAX_SIM_STEP_S * NS_PER_S:
                sink.down(last)
                sink.up(now)
                last = now
                continue
            n = int(self.rng.poisson(self.rate_hz * (now - last) / NS_PER_S))
            t = self.rng.integers(last, now, size=n, dtype=np.int64)
            if self.extra.size:
                due = (self.extra >= last) & (self.extra < now)
                t = np.concatenate([t, self.extra[due]])
            t = np.sort(t)
            self.stats.hits += int(t.size)
            sink.put(t)
            sink.mark(now)
            last = now


@dataclass(frozen=True, slots=True)
class SourceOptions:
    seed: int | None = None
    grace_s: float = DEFAULT_GRACE_S
    stall_s: float = DEFAULT_STALL_S


def register(
    scheme: str,
) -> Callable[
    [Callable[[str, SourceOptions], HitSource]], Callable[[str, SourceOptions], HitSource]
]:
    """Decorator: register a factory ``(arg, options) -> HitSource`` under ``scheme``."""

    def deco(
        f: Callable[[str, SourceOptions], HitSource],
    ) -> Callable[[str, SourceOptions], HitSource]:
        HitSource._factories[scheme] = f
        return f

    return deco


@register("file")
@register("pipe")
def _open_path(arg: str, opts: SourceOptions) -> HitSource:
    if arg == "-":
        mode = os.fstat(sys.stdin.fileno()).st_mode
        if stat.S_ISREG(mode):
            return UploadSource("<stdin>", sys.stdin.buffer)
        return StreamSource(None, grace_s=opts.grace_s, stall_s=opts.stall_s)
    p = Path(arg)
    try:
        mode = p.stat().st_mode
    except OSError as exc:
        raise ValueError(f"source file {arg!r}: {exc.strerror}") from None
    if stat.S_ISFIFO(mode):
        return StreamSource(p, grace_s=opts.grace_s, stall_s=opts.stall_s)
    if not stat.S_ISREG(mode):
        raise ValueError(f"source file {arg!r} is neither a regular file nor a FIFO")
    with open(p, "rb") as fh:
        return UploadSource(arg, fh)


@register("sim")
def _open_sim(arg: str, opts: SourceOptions) -> HitSource:
    try:
        rate = float(arg)
    except ValueError:
        raise ValueError(f"sim rate {arg!r} is not a number of hits per second") from None
    return SimSource(rate, seed=opts.seed)


def open_source(spec: str, options: SourceOptions | None = None) -> HitSource:
    """The source named by ``spec`` (``file:PATH``, ``pipe:-``, ``sim:RATE``)."""
    scheme, sep, arg = spec.partition(":")
    factory = HitSource._factories.get(scheme)
    if not sep or factory is None or not arg:
        raise ValueError(
            f"source {spec!r} is not SCHEME:ARG with a scheme among {sorted(HitSource._factories)}"
        )
    return factory(arg, options or SourceOptions())

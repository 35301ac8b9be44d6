"""The ``--inject`` mini-language: ``KIND:key=value,key=value,...`` (see :data:`INJECT_SYNTAX`).

Times are seconds after the recording's start, angles degrees. Parsing checks
each value and names the bad one; whether an injection fits the scenario (its
time inside the recording, enough live sites) is checked when it is applied
(:mod:`tocsin.sim.inject`).
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass
from typing import Final, Literal

from tocsin.model.registry import SITE_ID_PATTERN

INJECT_SYNTAX: Final = """\
front:at=SEC,ra=DEG,dec=DEG[,sites=N][,names=A+B+...][,minel=DEG]
    one plane front from ICRS (ra, dec), degrees; AT is its time at the Earth's
    centre, in seconds after the start. SITES GPS-timed sites (default 6) that
    are live and see the source at least MINEL degrees (default 10) above the
    horizon get one hit each, stamped with their own clock error. NAMES picks
    the sites by id instead (its length then sets SITES).
burst:at=SEC[,dur=SEC][,boost=X][,sites=N][,names=A+B+...][,pick=rate|random]
    SITES sites (default 10) get extra Poisson hits at BOOST (default 0.5) times
    their own rate for DUR seconds (default 30) from AT. pick=rate (default)
    takes the highest-rate sites live then, pick=random a random choice of
    them; NAMES picks them by id.
examples:
    --inject front:at=180,ra=150,dec=35,sites=6
    --inject front:at=600,ra=120,dec=35,names=hollow-creek-2+kestrel-ridge+dune-station
    --inject burst:at=1200,sites=20,boost=0.5,dur=30
"""
"""Help text of the injection language (shown by ``tocsin simulate --help``)."""

_FRONT_KEYS: Final = ("at", "ra", "dec", "sites", "names", "minel")
_BURST_KEYS: Final = ("at", "dur", "boost", "sites", "names", "pick")


@dataclass(frozen=True, slots=True)
class FrontSpec:
    """A plane front: time ``at_s`` (s after start), direction ICRS (deg), site choice."""

    text: str
    at_s: float
    ra_deg: float
    dec_deg: float
    n_sites: int = 6
    names: tuple[str, ...] | None = None
    min_elev_deg: float = 10.0


@dataclass(frozen=True, slots=True)
class BurstSpec:
    """A rate excess: ``boost`` x each site's rate over ``[at_s, at_s + dur_s)`` (s after start)."""

    text: str
    at_s: float
    dur_s: float = 30.0
    boost: float = 0.5
    n_sites: int = 10
    names: tuple[str, ...] | None = None
    pick: Literal["rate", "random"] = "rate"


InjectionSpec = FrontSpec | BurstSpec


def parse_injection(text: str) -> InjectionSpec:
    """Parse one ``--inject`` value; ``ValueError`` names the bad part of ``text``."""
    kind, sep, rest = text.strip().partition(":")
    if not sep or kind not in ("front", "burst"):
        raise ValueError(
            f"injection {text!r}: expected 'front:...' or 'burst:...' (kind {kind!r} unknown)"
        )
    allowed = _FRONT_KEYS if kind == "front" else _BURST_KEYS
    kv: dict[str, str] = {}
    for part in rest.split(","):
        key, eq, value = part.strip().partition("=")
        if not eq or not key or not value:
            raise ValueError(f"injection {text!r}: {part.strip()!r} is not key=value")
        if key not in allowed:
            raise ValueError(
                f"injection {text!r}: unknown key {key!r} ({kind} takes {', '.join(allowed)})"
            )
        if key in kv:
            raise ValueError(f"injection {text!r}: key {key!r} given twice")
        kv[key] = value
    if "at" not in kv:
        raise ValueError(f"injection {text!r}: 'at=SECONDS' is required")
    at = _number(text, kv, "at", lo=0.0)
    names = _names(text, kv)
    n_default = 6 if kind == "front" else 10
    n_sites = _count(text, kv, len(names) if names else n_default)
    if names is not None and n_sites != len(names):
        raise ValueError(f"injection {text!r}: sites={n_sites} but {len(names)} names given")
    if kind == "front":
        for key in ("ra", "dec"):
            if key not in kv:
                raise ValueError(f"injection {text!r}: '{key}=DEGREES' is required for a front")
        return FrontSpec(
            text=text,
            at_s=at,
            ra_deg=_number(text, kv, "ra", lo=0.0, hi=360.0, hi_open=True),
            dec_deg=_number(text, kv, "dec", lo=-90.0, hi=90.0),
            n_sites=n_sites,
            names=names,
            min_elev_deg=_number(text, kv, "minel", lo=-90.0, hi=90.0, hi_open=True)
            if "minel" in kv
            else 10.0,
        )
    pick = kv.get("pick", "rate")
    if pick not in ("rate", "random"):
        raise ValueError(f"injection {text!r}: pick={pick!r} is not 'rate' or 'random'")
    return BurstSpec(
        text=text,
        at_s=at,
        dur_s=_number(text, kv, "dur", lo=0.0, lo_open=True) if "dur" in kv else 30.0,
        boost=_number(text, kv, "boost", lo=0.0, lo_open=True) if "boost" in kv else 0.5,
        n_sites=n_sites,
        names=names,
        pick="rate" if pick == "rate" else "random",
    )


def _number(
    text: str,
    kv: dict[str, str],
    key: str,
    *,
    lo: float,
    hi: float = math.inf,
    lo_open: bool = False,
    hi_open: bool = False,
) -> float:
    raw = kv[key]
    try:
        x = float(raw)
    except ValueError:
        raise ValueError(f"injection {text!r}: {key}={raw!r} is not a number") from None
    bad_lo = x <= lo if lo_open else x < lo
    bad_hi = x >= hi if hi_open else x > hi
    if not math.isfinite(x) or bad_lo or bad_hi:
        left, right = "(" if lo_open else "[", ")" if hi_open else "]"
        raise ValueError(f"injection {text!r}: {key}={raw!r} is not in {left}{lo:g}, {hi:g}{right}")
    return x


def _count(text: str, kv: dict[str, str], default: int) -> int:
    if "sites" not in kv:
        return default
    raw = kv["sites"]
    if not raw.isdigit() or int(raw) < 1:
        raise ValueError(f"injection {text!r}: sites={raw!r} is not a positive integer")
    return int(raw)


def _names(text: str, kv: dict[str, str]) -> tuple[str, ...] | None:
    if "names" not in kv:
        return None
    names = tuple(kv["names"].split("+"))
    for n in names:
        if not re.fullmatch(SITE_ID_PATTERN, n):
            raise ValueError(f"injection {text!r}: {n!r} is not a site id")
    if len(set(names)) != len(names):
        raise ValueError(f"injection {text!r}: names={kv['names']!r} repeats a site")
    return names

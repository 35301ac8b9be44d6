"""Engine configuration (the ``[engine]`` tables of a Tocsin TOML config), validated at load."""

from __future__ import annotations

import tomllib
from pathlib import Path
from typing import Annotated, Any

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator

from tocsin.errors import ConfigError

PosFloat = Annotated[float, Field(gt=0.0)]


class RateConfig(BaseModel):
    """Rolling rate estimate per site (see ``tocsin.engine.rates``)."""

    model_config = ConfigDict(extra="forbid")
    bin_s: Annotated[float, Field(gt=0.0, le=60.0)] = 1.0
    """Width of the exposure bins (s). Every excess window is a whole number of bins."""
    background_s: Annotated[float, Field(ge=60.0)] = 3600.0
    """Length of the background stretch that judges a window (s)."""
    min_live_s: Annotated[float, Field(ge=1.0)] = 60.0
    """A site needs this much live time (s) in its background stretch before it takes
    part, so a restarted network is searched after a minute, with the posterior of a
    short exposure."""


class CoincidenceConfig(BaseModel):
    """Distinct sites within a geometry-aware window (see ``tocsin.engine.coincidence``)."""

    model_config = ConfigDict(extra="forbid")
    scales_s: list[PosFloat] = [1e-6, 1e-5, 1e-4, 1e-3, 1e-2, 1e-1, 1.0, 10.0, 100.0]
    """Window scales W (s): the slack added to each pair's light-time + clock slot."""
    front_scales_s: list[PosFloat] = [1e-6, 1e-5, 1e-4]
    """Scales at which the plane-front statistic is also evaluated (s)."""
    clock_sigmas: PosFloat = 3.0
    """Clock errors are allowed for at this many combined sigma."""
    occupancy_cap: Annotated[float, Field(gt=0.0, le=1.0)] = 0.5
    """A site whose chance occupancy of its slot exceeds this takes no part at that scale."""
    front_max_clock_ns: PosFloat = 10_000.0
    """Only sites with clock sigma up to this (ns) take part in plane-front fits."""
    redundancy_ratio: Annotated[float, Field(ge=1.0)] = 3.0
    """A scale is skipped for a seed site when it widens the expected occupancy less than this."""
    min_multiplicity: Annotated[int, Field(ge=2)] = 2
    max_expected_neighbours: PosFloat = 20.0
    """A scale is not evaluated for a seed site whose slots hold more chance
    neighbours than this on average: multiplicity has no power there."""

    @field_validator("scales_s", "front_scales_s")
    @classmethod
    def _sorted(cls, v: list[float]) -> list[float]:
        return sorted(set(v))


class ExcessConfig(BaseModel):
    """More hits than expected over a longer window (see ``tocsin.engine.excess``)."""

    model_config = ConfigDict(extra="forbid")
    scales_s: list[PosFloat] = [1.0, 4.0, 16.0, 64.0, 256.0, 600.0]
    """Window lengths (s), each a whole number of exposure bins."""
    per_site: bool = True
    network: bool = True
    min_expected: Annotated[float, Field(ge=0.0)] = 2.0
    """A site-window with fewer expected hits than this is not tested on its own."""


class EngineConfig(BaseModel):
    model_config = ConfigDict(extra="forbid")
    rate: RateConfig = RateConfig()
    coincidence: CoincidenceConfig = CoincidenceConfig()
    excess: ExcessConfig = ExcessConfig()
    candidate_far_per_year: PosFloat = 365.25
    """Decisions at or below this false alarm rate are written as candidates (default 1/day)."""
    lateness_s: Annotated[float, Field(ge=0.0)] = 3.0
    """A batch arriving later than this after the start of its live interval is late."""


def read_toml(path: str | Path) -> dict[str, Any]:
    """Parse a TOML config file; errors name the file."""
    p = Path(path)
    try:
        return tomllib.loads(p.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise ConfigError(f"config file {str(p)!r} does not exist") from None
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"config file {str(p)!r} is not valid TOML: {exc}") from exc


def validation_error(path: str | Path, exc: ValidationError, prefix: str = "") -> ConfigError:
    """A ConfigError naming the file and the dotted key of the first problem."""
    err = exc.errors()[0]
    loc = ".".join(str(x) for x in err["loc"])
    return ConfigError(f"config file {str(path)!r}: {prefix}{loc}: {err['msg']}")


def load_engine_config(path: str | Path | None) -> EngineConfig:
    """Read the ``[engine]`` table of a TOML file (defaults when ``path`` is None)."""
    if path is None:
        return EngineConfig()
    data = read_toml(path)
    try:
        return EngineConfig.model_validate(data.get("engine", {}))
    except ValidationError as exc:
        raise validation_error(path, exc, "engine.") from exc

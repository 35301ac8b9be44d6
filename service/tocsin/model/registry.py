"""Site registry: the TOML file listing every site the service accepts (contract §2)."""

from __future__ import annotations

import tomllib
from collections.abc import Iterator, Sequence
from pathlib import Path
from typing import Annotated

import numpy as np
from pydantic import BaseModel, ConfigDict, Field, ValidationError

from tocsin.errors import ConfigError
from tocsin.types import F64Array, SiteId

SITE_ID_PATTERN = r"^[a-z0-9][a-z0-9-]{0,62}$"


class Site(BaseModel):
    """One detector site. Angles in degrees (WGS84), heights in metres, clock sigma in ns."""

    model_config = ConfigDict(extra="forbid", frozen=True)

    id: Annotated[str, Field(pattern=SITE_ID_PATTERN)]
    lat_deg: Annotated[float, Field(ge=-90.0, le=90.0)]
    lon_deg: Annotated[float, Field(ge=-180.0, le=360.0)]
    height_m: Annotated[float, Field(ge=-1000.0, le=100_000.0)]
    clock_sigma_ns: Annotated[float, Field(gt=0.0, le=10e9)]
    area_m2: Annotated[float | None, Field(gt=0.0)] = None
    kind: str = "detector"


class SiteRegistry:
    """An ordered, immutable set of sites with vectorised geometry.

    ``index(site_id)`` gives the integer site index used in all engine arrays.
    ``ecef_m`` is an (N, 3) array of Earth-centred, Earth-fixed (ITRS/WGS84)
    positions in metres, from :meth:`astropy.coordinates.EarthLocation.from_geodetic`.
    """

    def __init__(self, sites: Sequence[Site]) -> None:
        if not sites:
            raise ConfigError("site registry lists no sites")
        ids = [s.id for s in sites]
        dupes = sorted({i for i in ids if ids.count(i) > 1})
        if dupes:
            raise ConfigError(f"site registry repeats site id(s) {dupes}")
        self.sites: tuple[Site, ...] = tuple(sites)
        self._index: dict[SiteId, int] = {sid: k for k, sid in enumerate(ids)}
        self.ids: tuple[SiteId, ...] = tuple(ids)
        self.clock_sigma_ns: F64Array = np.array([s.clock_sigma_ns for s in sites], dtype=float)
        self.ecef_m: F64Array = _ecef(self.sites)

    def __len__(self) -> int:
        return len(self.sites)

    def __iter__(self) -> Iterator[Site]:
        return iter(self.sites)

    def __contains__(self, site_id: object) -> bool:
        return site_id in self._index

    def index_or_none(self, site_id: str) -> int | None:
        """Integer index of ``site_id``, None if it is not a known site."""
        return self._index.get(site_id)

    def index(self, site_id: SiteId) -> int:
        """Integer index of ``site_id``; raises ``KeyError`` naming the id if unknown."""
        try:
            return self._index[site_id]
        except KeyError:
            raise KeyError(
                f"site {site_id!r} is not in the registry ({len(self)} sites known)"
            ) from None

    def subset(self, site_ids: Sequence[SiteId]) -> SiteRegistry:
        """A new registry with only ``site_ids`` (in that order)."""
        return SiteRegistry([self.sites[self.index(s)] for s in site_ids])

    @classmethod
    def from_toml(cls, path: str | Path) -> SiteRegistry:
        """Load a registry file; errors name the file, the site entry and the key."""
        p = Path(path)
        try:
            data = tomllib.loads(p.read_text(encoding="utf-8"))
        except FileNotFoundError:
            raise ConfigError(f"site registry {str(p)!r} does not exist") from None
        except tomllib.TOMLDecodeError as exc:
            raise ConfigError(f"site registry {str(p)!r} is not valid TOML: {exc}") from exc
        entries = data.get("site")
        if not isinstance(entries, list) or not entries:
            raise ConfigError(f"site registry {str(p)!r} has no [[site]] entries")
        sites: list[Site] = []
        for k, entry in enumerate(entries):
            try:
                sites.append(Site.model_validate(entry))
            except ValidationError as exc:
                err = exc.errors()[0]
                loc = ".".join(str(x) for x in err["loc"])
                raise ConfigError(
                    f"site registry {str(p)!r}, site #{k + 1} "
                    f"({entry.get('id', '?')!r}): {loc}: {err['msg']}"
                ) from exc
        return cls(sites)

    def to_toml(self) -> str:
        """Serialise back to the contract's TOML layout."""
        lines: list[str] = []
        for s in self.sites:
            lines.append("[[site]]")
            lines.append(f'id = "{s.id}"')
            lines.append(f"lat_deg = {s.lat_deg!r}")
            lines.append(f"lon_deg = {s.lon_deg!r}")
            lines.append(f"height_m = {s.height_m!r}")
            lines.append(f"clock_sigma_ns = {s.clock_sigma_ns!r}")
            if s.area_m2 is not None:
                lines.append(f"area_m2 = {s.area_m2!r}")
            lines.append(f'kind = "{s.kind}"')
            lines.append("")
        return "\n".join(lines)


def _ecef(sites: Sequence[Site]) -> F64Array:
    from astropy import units as u
    from astropy.coordinates import EarthLocation

    loc = EarthLocation.from_geodetic(
        lon=[s.lon_deg for s in sites] * u.deg,
        lat=[s.lat_deg for s in sites] * u.deg,
        height=[s.height_m for s in sites] * u.m,
        ellipsoid="WGS84",
    )
    xyz = np.stack([loc.x.to_value(u.m), loc.y.to_value(u.m), loc.z.to_value(u.m)], axis=-1)
    return np.asarray(xyz, dtype=float).reshape(len(sites), 3)

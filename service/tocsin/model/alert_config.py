"""Alert policy and delivery settings: the ``[alerts]`` table of the service config.

Layout (all keys optional; the defaults are safe: role ``test``)::

    [alerts]
    authority = "tocsin.example"        # IVORN: ivo://<authority>/<stream>#<local id>
    stream = "alerts"
    role = "test"                       # "observation" for the real stream, "test" for drills
    internal_far_per_year = 365.25      # alert to our own sinks (MQTT topic, directory): 1/day
    public_far_per_year = 1.0           # also to external subscribers (VOEvent transport): 1/yr
    max_per_hour = 12.0                 # token bucket refill (alerts per hour of data time)
    # per-trigger thresholds (e.g. from `tocsin tune`) override the two above:
    # [alerts.public_far_per_year_by_trigger]  coincidence = 0.5 / excess = 0.5
    # [alerts.internal_far_per_year_by_trigger]
    burst = 5                           # token bucket size
    author_title = "Tocsin detector network"
    contact_email = ""
    directory = ""                      # packets as files; "" = <data_dir>/alerts
    skymaps = true                      # HEALPix localisation file for fitted directions
    skymap_url_base = ""                # how subscribers reach them; "" = file:// path

    [alerts.transport]                  # VOEvent transport server for subscribers
    host = "0.0.0.0"
    port = 8099                         # 0 = no server
    idle_s = 60.0                       # iamalive after this much silence (spec: <= 90 s)
    ack_timeout_s = 20.0
    allow = [{ name = "obs-a", network = "192.0.2.10/32" }]
"""

from __future__ import annotations

import ipaddress
import re
from pathlib import Path
from typing import Annotated, Literal

from pydantic import (
    BaseModel,
    ConfigDict,
    Field,
    PositiveFloat,
    ValidationError,
    field_validator,
    model_validator,
)

from tocsin.model.config import read_toml, validation_error

AUTHORITY_RE = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._~-]{2,}$")
"""Authority part of an IVORN (IVOA Identifiers 2.0 §2, from memory; conservative subset)."""
STREAM_RE = re.compile(r"^[A-Za-z0-9._~-]+(/[A-Za-z0-9._~-]+)*$")
NAME_RE = re.compile(r"^[a-z0-9][a-z0-9._-]{0,62}$")


class AllowEntry(BaseModel):
    """One subscriber allowed to connect: a name (deliveries are tracked by it) and a network."""

    model_config = ConfigDict(extra="forbid")
    name: str
    network: str

    @field_validator("name")
    @classmethod
    def _name(cls, v: str) -> str:
        if not NAME_RE.match(v):
            raise ValueError(f"subscriber name {v!r} must match {NAME_RE.pattern}")
        return v

    @field_validator("network")
    @classmethod
    def _net(cls, v: str) -> str:
        try:
            return str(ipaddress.ip_network(v, strict=False))
        except ValueError as exc:
            raise ValueError(f"subscriber network {v!r} is not an address or CIDR block") from exc


class TransportConfig(BaseModel):
    """The VOEvent transport (VTP 2.0) server that external subscribers connect to."""

    model_config = ConfigDict(extra="forbid")
    host: str = "127.0.0.1"
    port: Annotated[int, Field(ge=0, le=65535)] = 8099
    idle_s: Annotated[float, Field(gt=0, le=90)] = 60.0
    ack_timeout_s: Annotated[float, Field(gt=0, le=600)] = 20.0
    allow: list[AllowEntry] = []

    @field_validator("allow")
    @classmethod
    def _unique(cls, v: list[AllowEntry]) -> list[AllowEntry]:
        names = [a.name for a in v]
        dup = sorted({n for n in names if names.count(n) > 1})
        if dup:
            raise ValueError(f"subscriber names must be unique; repeated: {dup}")
        return v


class AlertConfig(BaseModel):
    """Which candidates become alerts, what the packets say, and where they go."""

    model_config = ConfigDict(extra="forbid")
    authority: str = "tocsin.example"
    stream: str = "alerts"
    role: Literal["observation", "test"] = "test"
    internal_far_per_year: Annotated[float, Field(gt=0)] = 365.25
    public_far_per_year: Annotated[float, Field(gt=0)] = 1.0
    max_per_hour: Annotated[float, Field(gt=0)] = 12.0
    burst: Annotated[int, Field(ge=1, le=1000)] = 5
    author_title: str = "Tocsin detector network"
    contact_email: str = ""
    directory: Path | None = None
    skymaps: bool = True
    skymap_url_base: str = ""
    public_far_per_year_by_trigger: dict[Literal["coincidence", "excess"], PositiveFloat] = {}
    internal_far_per_year_by_trigger: dict[Literal["coincidence", "excess"], PositiveFloat] = {}
    transport: TransportConfig | None = None

    def thresholds(self, trigger: str) -> tuple[float, float]:
        """(public, internal) FAR thresholds per year for a trigger."""
        pub = self.public_far_per_year_by_trigger.get(trigger, self.public_far_per_year)  # type: ignore[call-overload]
        internal = self.internal_far_per_year_by_trigger.get(trigger, self.internal_far_per_year)  # type: ignore[call-overload]
        return float(pub), float(max(internal, pub))

    @field_validator("authority")
    @classmethod
    def _authority(cls, v: str) -> str:
        if not AUTHORITY_RE.match(v):
            raise ValueError(f"authority {v!r} must match {AUTHORITY_RE.pattern} (no ivo://)")
        return v

    @field_validator("stream")
    @classmethod
    def _stream(cls, v: str) -> str:
        if not STREAM_RE.match(v):
            raise ValueError(f"stream {v!r} must be /-separated segments of [A-Za-z0-9._~-]")
        return v

    @model_validator(mode="after")
    def _order(self) -> AlertConfig:
        if self.public_far_per_year > self.internal_far_per_year:
            raise ValueError(
                f"public_far_per_year {self.public_far_per_year!r} must not exceed "
                f"internal_far_per_year {self.internal_far_per_year!r}"
            )
        return self

    @property
    def stream_ivorn(self) -> str:
        """``ivo://authority/stream`` — the part of every IVORN before ``#``."""
        return f"ivo://{self.authority}/{self.stream}"


def load_alert_config(path: str | Path | None) -> AlertConfig:
    """Read the ``[alerts]`` table of a TOML file (defaults, role ``test``, when absent)."""
    if path is None:
        return AlertConfig()
    data = read_toml(path)
    try:
        return AlertConfig.model_validate(data.get("alerts", {}))
    except ValidationError as exc:
        raise validation_error(path, exc, "alerts.") from exc

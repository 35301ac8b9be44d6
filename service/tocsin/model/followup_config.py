"""Follow-up of outside alerts: the ``[followup]`` table of the service config.

Layout (all keys optional; without the table nothing is listened to)::

    [followup]
    enabled = true
    roles = ["observation"]             # VOEvent roles acted on; add "test" for drills
    authors = ["ivo://far-observatory.example"]   # IVORN prefixes allowed ("*" = any)
    mqtt = true                         # listen on {root}/external
    directory = ""                      # watched for *.xml packets; "" = none
    buffer_hours = 24.0                 # our own data kept for searching the past
    offsource_max = 200                 # off-source windows per search, at most
    offsource_hours = 2.0               # data searched around the event (cost: see README)
    max_packet_bytes = 1_000_000
    parse_timeout_s = 5.0
    level = "internal"                  # "public" also sends answers to subscribers
    detection_p = 0.0027                # p at or below this is reported as a detection

    [[followup.remotes]]                # VOEvent transport brokers to subscribe to
    host = "alerts.far-observatory.example"
    port = 8099

    [followup.windows.gw]               # search window per messenger (s)
    before_s = 500.0
    after_s = 500.0

The default windows (``DEFAULT_WINDOWS``) and their reasons are in the README.
"""

from __future__ import annotations

import re
from pathlib import Path
from typing import Annotated

from pydantic import BaseModel, ConfigDict, Field, field_validator, model_validator

MESSENGERS = ("gw", "neutrino", "gamma", "default")
"""Messenger classes with their own search window; ``default`` when the packet says none."""

_HOST_RE = re.compile(r"^[A-Za-z0-9]([A-Za-z0-9.-]{0,252})$|^\[?[0-9A-Fa-f:.]+\]?$")


class Remote(BaseModel):
    """One VOEvent transport broker we subscribe to."""

    model_config = ConfigDict(extra="forbid")
    host: str
    port: Annotated[int, Field(ge=1, le=65535)]

    @field_validator("host")
    @classmethod
    def _host(cls, v: str) -> str:
        if not _HOST_RE.match(v):
            raise ValueError(f"remote host {v!r} is not a host name or IP address")
        return v


class Window(BaseModel):
    """Seconds searched before and after the outside event time."""

    model_config = ConfigDict(extra="forbid")
    before_s: Annotated[float, Field(ge=0.0, le=86_400.0)]
    after_s: Annotated[float, Field(ge=0.0, le=86_400.0)]

    @model_validator(mode="after")
    def _positive(self) -> Window:
        if self.before_s + self.after_s <= 0:
            raise ValueError("before_s + after_s must be > 0")
        return self


DEFAULT_WINDOWS: dict[str, Window] = {
    # common practice, values from memory: see the README's "Follow-up windows"
    "gw": Window(before_s=500.0, after_s=500.0),
    "neutrino": Window(before_s=500.0, after_s=500.0),
    "gamma": Window(before_s=30.0, after_s=300.0),
    "default": Window(before_s=300.0, after_s=300.0),
}


class FollowupConfig(BaseModel):
    """Which outside alerts are followed up, where they come from, and how we search."""

    model_config = ConfigDict(extra="forbid")
    enabled: bool = False
    roles: list[str] = ["observation"]
    authors: list[str] = []
    """Author IVORN prefixes accepted (compared with the packet's AuthorIVORN, or its
    IVORN when there is none); ``"*"`` accepts any. Empty: nothing is accepted."""
    mqtt: bool = True
    directory: Path | None = None
    remotes: list[Remote] = []
    buffer_hours: Annotated[float, Field(gt=0.0, le=168.0)] = 24.0
    offsource_max: Annotated[int, Field(ge=0, le=100_000)] = 200
    """Off-source windows per search, at most."""
    offsource_hours: Annotated[float, Field(gt=0.0, le=168.0)] = 2.0
    """Data searched around the event (h, on- and off-source together): the search
    costs about 2 min per hour of the shipped scenario's data on one core (README)."""
    max_packet_bytes: Annotated[int, Field(ge=1024, le=16_000_000)] = 1_000_000
    parse_timeout_s: Annotated[float, Field(gt=0.0, le=120.0)] = 5.0
    level: str = "internal"
    detection_p: Annotated[float, Field(gt=0.0, lt=1.0)] = 0.0027
    """At or below this corrected p the answer is a detection (0.0027: 3 sigma two-sided,
    common practice); above it, an upper limit."""
    windows: dict[str, Window] = {}

    @field_validator("roles")
    @classmethod
    def _roles(cls, v: list[str]) -> list[str]:
        allowed = ("observation", "prediction", "utility", "test")
        bad = [r for r in v if r not in allowed]
        if bad:
            raise ValueError(f"roles {bad!r} are not VOEvent roles {allowed}")
        return v

    @field_validator("authors")
    @classmethod
    def _authors(cls, v: list[str]) -> list[str]:
        bad = [a for a in v if a != "*" and not a.startswith("ivo://")]
        if bad:
            raise ValueError(f"authors {bad!r} must be IVORN prefixes starting 'ivo://' or '*'")
        return v

    @field_validator("level")
    @classmethod
    def _level(cls, v: str) -> str:
        if v not in ("internal", "public"):
            raise ValueError(f"level {v!r} must be 'internal' or 'public'")
        return v

    @field_validator("windows")
    @classmethod
    def _windows(cls, v: dict[str, Window]) -> dict[str, Window]:
        bad = [k for k in v if k not in MESSENGERS]
        if bad:
            raise ValueError(f"windows {bad!r}: messengers must be among {MESSENGERS}")
        return v

    def window_for(self, messenger: str | None) -> Window:
        """The configured window of ``messenger`` (falling back to ``default``)."""
        key = messenger if messenger in MESSENGERS else "default"
        merged = {**DEFAULT_WINDOWS, **self.windows}
        return merged[key]

    def author_allowed(self, author: str) -> bool:
        """Whether ``author`` (an IVORN) starts with an allowed prefix (case-insensitive
        authority, IVOA Identifiers 2.0 §2.1)."""
        a = author.lower()
        return any(p == "*" or a.startswith(p.lower()) for p in self.authors)


def load_followup_config(path: str | Path | None) -> FollowupConfig:
    """Read the ``[followup]`` table of a TOML file (defaults when ``path`` is None)."""
    from pydantic import ValidationError

    from tocsin.model.config import read_toml, validation_error

    if path is None:
        return FollowupConfig()
    data = read_toml(path)
    try:
        return FollowupConfig.model_validate(data.get("followup", {}))
    except ValidationError as exc:
        raise validation_error(path, exc, "followup.") from exc

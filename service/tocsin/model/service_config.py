"""Service configuration (one TOML file), validated at start with errors naming the key.

Layout::

    registry = "replay_data/network.toml"   # site registry (relative to this file)
    data_dir = "/var/lib/tocsin"            # journal, checkpoints, candidates (relative ok)
    journal_keep_days = 14                  # older journal segments are deleted (0: keep all)

    [broker]
    url = "mqtt://127.0.0.1:1883"           # mqtt:// or mqtts:// ; omit the table for the
    client_id = "tocsin-service"            #   embedded broker on localhost
    username = "tocsin-service"
    password = ""                           # better: TOCSIN_BROKER_PASSWORD in the environment
    ca_file = ""                            # TLS: CA, and client cert/key if the broker wants them
    cert_file = ""
    key_file = ""
    keepalive_s = 30
    topic_root = "tocsin"
    max_message_bytes = 4_000_000

    [metrics]
    host = "127.0.0.1"
    port = 9464                             # 0 = off

    [engine]                                # as in deploy/tocsin.toml
    ...

    [alerts]                                # see tocsin.model.alert_config
    role = "observation"
    ...

Environment variables override secrets and the broker address:
``TOCSIN_BROKER_URL``, ``TOCSIN_BROKER_USERNAME``, ``TOCSIN_BROKER_PASSWORD``.
"""

from __future__ import annotations

import os
from pathlib import Path
from typing import Annotated, Any
from urllib.parse import urlsplit

from pydantic import BaseModel, ConfigDict, Field, ValidationError, field_validator

from tocsin.errors import ConfigError
from tocsin.live.topics import DEFAULT_ROOT, check_root
from tocsin.model.alert_config import AlertConfig
from tocsin.model.config import EngineConfig, read_toml, validation_error
from tocsin.model.followup_config import FollowupConfig

ENV_URL = "TOCSIN_BROKER_URL"
ENV_USER = "TOCSIN_BROKER_USERNAME"
ENV_PASSWORD = "TOCSIN_BROKER_PASSWORD"


class BrokerConfig(BaseModel):
    """Where the MQTT broker is and how to log in."""

    model_config = ConfigDict(extra="forbid")
    url: str = "mqtt://127.0.0.1:1883"
    client_id: Annotated[str, Field(min_length=1, max_length=64)] = "tocsin-service"
    username: str | None = None
    password: str | None = None
    ca_file: Path | None = None
    cert_file: Path | None = None
    key_file: Path | None = None
    keepalive_s: Annotated[int, Field(ge=5, le=3600)] = 30
    topic_root: str = DEFAULT_ROOT
    max_message_bytes: Annotated[int, Field(ge=1024, le=256 * 1024 * 1024)] = 4_000_000

    @field_validator("url")
    @classmethod
    def _url(cls, v: str) -> str:
        u = urlsplit(v)
        if u.scheme not in ("mqtt", "mqtts") or not u.hostname:
            raise ValueError(
                f"broker url {v!r} must look like mqtt://host:port or mqtts://host:port"
            )
        return v

    @field_validator("topic_root")
    @classmethod
    def _root(cls, v: str) -> str:
        return check_root(v)

    @property
    def host(self) -> str:
        return urlsplit(self.url).hostname or "127.0.0.1"

    @property
    def port(self) -> int:
        u = urlsplit(self.url)
        return u.port or (8883 if u.scheme == "mqtts" else 1883)

    @property
    def tls(self) -> bool:
        return urlsplit(self.url).scheme == "mqtts"


class MetricsConfig(BaseModel):
    model_config = ConfigDict(extra="forbid")
    host: str = "127.0.0.1"
    port: Annotated[int, Field(ge=0, le=65535)] = 9464


class ServiceConfig(BaseModel):
    """Everything ``tocsin serve`` needs. ``broker`` None means the embedded broker."""

    model_config = ConfigDict(extra="forbid")
    registry: Path
    data_dir: Path = Path("tocsin-data")
    broker: BrokerConfig | None = None
    metrics: MetricsConfig = MetricsConfig()
    engine: EngineConfig = EngineConfig()
    alerts: AlertConfig = AlertConfig()
    followup: FollowupConfig = FollowupConfig()
    engine_threads: Annotated[int, Field(ge=1, le=64)] | None = None
    """Threads the engine evaluates with (None: the cores available, at most 4). The
    candidates do not depend on it."""
    journal_keep_days: Annotated[float, Field(ge=0.0)] = 14.0
    """Journal segments whose batches all arrived longer ago than this (days) are
    deleted after a checkpoint; 0 keeps them all. Otherwise at least a day: a
    restart replays the journal after its checkpoint, and the follow-up search
    reads the last hours of it. Disk: about 35 bytes a hit, e.g. 30 GB a day for
    1000 sites at 10 Hz."""

    @field_validator("journal_keep_days")
    @classmethod
    def _keep_a_day(cls, v: float) -> float:
        if 0.0 < v < 1.0:
            raise ValueError(f"journal_keep_days {v!r} must be 0 (keep all) or at least 1 day")
        return v


def load_service_config(path: str | Path, *, env: dict[str, str] | None = None) -> ServiceConfig:
    """Read and validate a service config; relative paths are relative to the file.

    ``env`` (default ``os.environ``) supplies the overrides listed in the module doc.
    """
    p = Path(path)
    environ = dict(os.environ) if env is None else env
    data = read_toml(p)
    overrides = {
        k: environ[e]
        for k, e in (("url", ENV_URL), ("username", ENV_USER), ("password", ENV_PASSWORD))
        if e in environ
    }
    if overrides:
        data.setdefault("broker", {}).update(overrides)
    try:
        cfg = ServiceConfig.model_validate(data)
    except ValidationError as exc:
        raise validation_error(p, exc) from exc
    base = p.resolve().parent
    upd: dict[str, Any] = {
        "registry": _rel(base, cfg.registry),
        "data_dir": _rel(base, cfg.data_dir),
    }
    if cfg.alerts.directory is not None:
        upd["alerts"] = cfg.alerts.model_copy(
            update={"directory": _rel(base, cfg.alerts.directory)}
        )
    if cfg.followup.directory is not None:
        upd["followup"] = cfg.followup.model_copy(
            update={"directory": _rel(base, cfg.followup.directory)}
        )
    if cfg.broker is not None:
        b = cfg.broker
        upd["broker"] = b.model_copy(
            update={
                k: _rel(base, getattr(b, k))
                for k in ("ca_file", "cert_file", "key_file")
                if getattr(b, k) is not None
            }
        )
    cfg = cfg.model_copy(update=upd)
    if not cfg.registry.is_file():
        raise ConfigError(f"config file {str(p)!r}: registry {str(cfg.registry)!r} does not exist")
    if cfg.broker is not None:
        for key in ("ca_file", "cert_file", "key_file"):
            f = getattr(cfg.broker, key)
            if f is not None and not f.is_file():
                raise ConfigError(f"config file {str(p)!r}: broker.{key} {str(f)!r} does not exist")
    return cfg


def _rel(base: Path, p: Path) -> Path:
    return p if p.is_absolute() else base / p

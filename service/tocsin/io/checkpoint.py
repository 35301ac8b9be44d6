"""Checkpoints of the service's state: the pipeline (ordering stage and engine,
with every rate estimate) and the journal position it has consumed.

Written atomically (temporary file, fsync, rename), so a crash leaves either the
old or the new checkpoint. A checkpoint records the code version and a digest of
the registry and engine configuration; one that does not match is not loaded
(the service then rebuilds its state from the journal instead).
"""

from __future__ import annotations

import hashlib
import os
import pickle
from dataclasses import dataclass
from pathlib import Path

from tocsin import __version__
from tocsin.io.journal import Position
from tocsin.model.config import EngineConfig
from tocsin.model.registry import SiteRegistry
from tocsin.pipeline import Pipeline

FORMAT = "tocsin-checkpoint/1"


@dataclass(frozen=True, slots=True)
class Checkpoint:
    pipeline: Pipeline
    position: Position | None
    key: str


def state_key(registry: SiteRegistry, cfg: EngineConfig) -> str:
    """Digest of what the state depends on: code version, registry and engine config."""
    h = hashlib.sha256()
    h.update(__version__.encode())
    h.update(registry.to_toml().encode())
    h.update(cfg.model_dump_json().encode())
    return h.hexdigest()[:16]


def save(path: Path, ckpt: Checkpoint) -> None:
    """Write ``ckpt`` atomically to ``path``."""
    tmp = path.with_name(path.name + ".tmp")
    with open(tmp, "wb") as fh:
        pickle.dump((FORMAT, ckpt.key, ckpt.position, ckpt.pipeline), fh, protocol=5)
        fh.flush()
        os.fsync(fh.fileno())
    os.replace(tmp, path)
    dfd = os.open(path.parent, os.O_RDONLY)
    try:
        os.fsync(dfd)
    finally:
        os.close(dfd)


def load(path: Path, key: str) -> Checkpoint | None:
    """The checkpoint at ``path`` if it exists and matches ``key``, else None.

    Only checkpoints this service wrote itself are read (pickle is not for
    untrusted files): the data directory must not be writable by others.
    """
    if not path.is_file():
        return None
    try:
        with open(path, "rb") as fh:
            fmt, k, pos, pipe = pickle.load(fh)
    except (OSError, pickle.UnpicklingError, EOFError, ValueError, AttributeError):
        return None
    if fmt != FORMAT or k != key or not isinstance(pipe, Pipeline):
        return None
    return Checkpoint(pipe, pos, k)

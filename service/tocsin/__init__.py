"""Tocsin: coincidence and excess search over networks of particle detectors.

All times inside the package are integer nanoseconds since the GPS epoch
(1980-01-06T00:00:00 UTC, no leap seconds); see :mod:`tocsin.gpstime`.
"""

from tocsin.errors import BatchRejected, ConfigError, TocsinError
from tocsin.model.batch import HitBatch, parse_batch
from tocsin.model.registry import Site, SiteRegistry

__all__ = [
    "BatchRejected",
    "ConfigError",
    "HitBatch",
    "Site",
    "SiteRegistry",
    "TocsinError",
    "parse_batch",
]
__version__ = "0.7.0"

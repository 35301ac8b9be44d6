"""Shared type aliases. Times are GPS nanoseconds (int64), never float seconds."""

from typing import TypeAlias

import numpy as np
from numpy.typing import NDArray

GpsNs: TypeAlias = int
"""Nanoseconds since 1980-01-06T00:00:00 UTC, GPS time scale (no leap seconds)."""

SiteId: TypeAlias = str
I64Array: TypeAlias = NDArray[np.int64]
I32Array: TypeAlias = NDArray[np.int32]
F64Array: TypeAlias = NDArray[np.float64]
BoolArray: TypeAlias = NDArray[np.bool_]

NS_PER_S: int = 1_000_000_000
SECONDS_PER_YEAR: float = 365.25 * 86400.0
"""Julian year in seconds; false alarm rates are quoted per Julian year."""
C_M_PER_NS: float = 0.299792458
"""Speed of light in metres per nanosecond (SI definition: 299 792 458 m/s)."""

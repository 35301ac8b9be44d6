"""Upper limits on extra hits over a known background.

R. P. Kraft, D. N. Burrows & J. A. Nousek 1991, ApJ 374, 344: the Bayesian
interval for a Poisson source mean with a known background and a flat prior on
the (non-negative) source mean. Computed by astropy's
``poisson_conf_interval(..., interval='kraft-burrows-nousek')``, which implements
that paper; here only the arguments are checked and the upper end returned.
"""

from __future__ import annotations

import math
import warnings

import numpy as np
from astropy.stats import poisson_conf_interval
from scipy.integrate import IntegrationWarning

CONFIDENCE = 0.9
"""Confidence level of the reported limits (90 %, common practice for upper limits)."""


def kbn_upper_limit(n: int, background: float, *, confidence: float = CONFIDENCE) -> float:
    """Upper end of the KBN interval (counts) on extra hits, given ``n`` observed hits
    and an expected ``background`` (counts) in the same window."""
    if n < 0:
        raise ValueError(f"observed count {n!r} must be >= 0")
    if not (background >= 0.0 and math.isfinite(background)):
        raise ValueError(f"background {background!r} must be finite and >= 0")
    if not 0.0 < confidence < 1.0:
        raise ValueError(f"confidence {confidence!r} must lie in (0, 1)")
    if n == 0:
        # With no hits the KBN posterior of the source mean S is exp(-S) whatever the
        # background (the background factor cancels in eq. 5), so the limit is
        # -ln(1 - CL); astropy's root finder fails on this case (log of 0).
        return -math.log1p(-confidence)
    with warnings.catch_warnings():
        # scipy's quad may warn about the integrand's shape at large counts; the
        # root found is still the KBN limit (checked against astropy in the tests)
        warnings.simplefilter("ignore", IntegrationWarning)
        lo_hi = poisson_conf_interval(
            int(n),
            interval="kraft-burrows-nousek",
            background=float(background),
            confidence_level=confidence,
        )
    return float(np.ravel(lo_hi)[-1])

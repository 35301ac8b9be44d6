"""A picture of an alert's localisation: where on the sky, and how sure.

Drawn from the packet alone (what a receiver has): the fitted direction, the 1σ
and 2σ error ellipses (``err_ellipse_*`` parameters; 39.3 % and 86.5 % of the
probability for a 2-D Gaussian) over the probability density, and the circle of
the packet's ``Error2Radius`` for comparison. Axes are offsets from the fitted
direction on the sky (east to the left, as on the sky seen from inside), in the
unit that suits the error's size. A test alert says so in the title.
"""

from __future__ import annotations

import math

import numpy as np

from tocsin.alerts.packet import ParsedAlert
from tocsin.errors import TocsinError
from tocsin.figures import plt, png_bytes
from tocsin.types import F64Array

SIGMA_LEVELS = (1.0, 2.0)
"""Ellipses drawn, in units of the 1σ ellipse (probability 1 - exp(-k²/2) inside)."""


class NoDirection(TocsinError):
    """The alert has no fitted direction to draw."""


def ellipse_outline(
    major: float, minor: float, pa_deg: float, k: float = 1.0, n: int = 181
) -> tuple[F64Array, F64Array]:
    """Points (east offset, north offset), in the unit of the axes, of the ellipse of
    semi-axes ``k * major``, ``k * minor`` whose major axis points at position angle
    ``pa_deg`` (north through east)."""
    t = np.linspace(0.0, 2.0 * math.pi, n)
    along, across = k * major * np.cos(t), k * minor * np.sin(t)
    p = math.radians(pa_deg)
    east = along * math.sin(p) + across * math.cos(p)
    north = along * math.cos(p) - across * math.sin(p)
    return east, north


def _unit(size_deg: float) -> tuple[float, str]:
    """(degrees per unit, unit name) for axes spanning about ``size_deg``."""
    if size_deg >= 1.0:
        return 1.0, "deg"
    if size_deg >= 1.0 / 60.0:
        return 1.0 / 60.0, "arcmin"
    return 1.0 / 3600.0, "arcsec"


def error_shape(alert: ParsedAlert) -> tuple[float, float, float, str]:
    """(semi-major, semi-minor, position angle, what they are) in degrees: the
    packet's ``err_ellipse_*`` parameters, or for a packet without them (an older
    one, another writer's) the circle of its ``Error2Radius``."""
    p = alert.params
    try:
        major = float(p["err_ellipse_major"])
        minor = float(p["err_ellipse_minor"])
        pa = float(p["err_ellipse_pa"])
    except (KeyError, ValueError):
        r = float(alert.err_deg or 0.0)
        return r, r, 0.0, "1σ and 2σ error circles"
    return major, minor, pa, "1σ and 2σ error ellipses"


def sky_plot(alert: ParsedAlert) -> bytes:
    """PNG of the alert's localisation (raises :class:`NoDirection` without one)."""
    if alert.ra_deg is None or alert.dec_deg is None or not alert.err_deg:
        raise NoDirection(f"alert {alert.ivorn} has no fitted direction to plot")
    p = alert.params
    major, minor, pa, shape = error_shape(alert)
    scale, unit = _unit(3.0 * major)
    a, b, r = major / scale, minor / scale, float(alert.err_deg) / scale
    span = 3.0 * a
    grid = np.linspace(-span, span, 241)
    ee, nn = np.meshgrid(grid, grid)
    rad = math.radians(pa)
    along = nn * math.cos(rad) + ee * math.sin(rad)
    across = -nn * math.sin(rad) + ee * math.cos(rad)
    density = np.exp(-0.5 * ((along / a) ** 2 + (across / b) ** 2))

    fig, ax = plt.subplots(figsize=(6.4, 6.0))
    ax.imshow(
        density,
        extent=(-span, span, -span, span),
        origin="lower",
        cmap="Blues",
        alpha=0.8,
    )
    for k, style in zip(SIGMA_LEVELS, ("-", "--"), strict=True):
        e, n = ellipse_outline(a, b, pa, k)
        inside = 100.0 * -math.expm1(-0.5 * k * k)
        ax.plot(e, n, style, color="navy", lw=1.5, label=f"{k:g}σ ellipse ({inside:.1f} %)")
    t = np.linspace(0.0, 2.0 * math.pi, 181)
    ax.plot(
        r * np.cos(t),
        r * np.sin(t),
        ":",
        color="darkorange",
        lw=1.5,
        label="Error2Radius circle (same area as 1σ)",
    )
    ax.plot([0.0], [0.0], "+", color="crimson", ms=12, mew=2, label="fitted direction")
    ax.set_xlim(span, -span)  # east to the left, as on the sky
    ax.set_ylim(-span, span)
    ax.set_aspect("equal")
    ax.set_xlabel(f"east offset ({unit})")
    ax.set_ylabel(f"north offset ({unit})")
    far = p.get("false_alarm_rate")
    far_text = f", FAR {float(far):.3g}/yr" if far else ""
    test = "TEST ALERT — " if alert.role == "test" else ""
    ax.set_title(
        f"{test}{alert.ivorn.split('#', 1)[-1]}\n"
        f"RA {alert.ra_deg:.5f}°, Dec {alert.dec_deg:.5f}° (ICRS){far_text}\n{shape}",
        fontsize=9,
    )
    ax.legend(loc="upper left", bbox_to_anchor=(1.02, 1.0), fontsize=8)
    return png_bytes(fig)

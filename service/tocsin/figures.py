"""Headless figures: matplotlib with its file-only (Agg) backend, and a figure as
PNG bytes. Every module that draws imports ``plt`` from here."""

from __future__ import annotations

import io
from typing import Any

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt

__all__ = ["DPI", "plt", "png_bytes"]

DPI = 100
"""Resolution of the PNG figures (dots per inch)."""


def png_bytes(fig: Any) -> bytes:
    """The figure as PNG (``DPI``, cropped to its content); the figure is closed."""
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=DPI, bbox_inches="tight")
    plt.close(fig)
    return buf.getvalue()

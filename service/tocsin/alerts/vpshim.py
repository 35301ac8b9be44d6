"""voevent-parse, imported through one place that makes it work on Python ≥ 3.10.

voevent-parse 1.0.3 calls ``collections.Iterable`` (removed in Python 3.10) in
its ``_listify`` helper, so ``add_how(references=…)``, ``add_why(inferences=…)``
and ``add_citations(…)`` raise ``AttributeError`` (VOEVENT.md §4, tested there
with voevent-parse 1.0.3 on Python 3.11). Restoring the alias before the first
call fixes them. Import ``vp`` from here rather than ``voeventparse`` directly::

    from tocsin.alerts.vpshim import vp
"""

from __future__ import annotations

import collections
import collections.abc

if not hasattr(collections, "Iterable"):
    collections.Iterable = collections.abc.Iterable  # type: ignore[attr-defined]

import voeventparse as vp  # after the alias above

__all__ = ["vp"]

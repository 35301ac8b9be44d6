"""MQTT topic layout, under a configurable root (default ``tocsin``).

====================================  ==========================================
topic                                 carries
====================================  ==========================================
``{root}/site/{site_id}/hits``        hit batches v1 of one site (QoS 1), written
                                      only by that site (broker ACL)
``{root}/site/{site_id}/status``      that site's agent status (retained JSON;
                                      the last will sets ``"state": "offline"``)
``{root}/alerts``                     alerts sent out by the service
``{root}/external``                   other facilities' alerts coming in
====================================  ==========================================

One topic per site lets a broker ACL limit each site's credentials to its own
topics (``pattern write tocsin/site/%u/#`` with the site id as user name).
"""

from __future__ import annotations

import re

from tocsin.model.registry import SITE_ID_PATTERN

DEFAULT_ROOT = "tocsin"
_ROOT_RE = re.compile(r"^[A-Za-z0-9_-]+(/[A-Za-z0-9_-]+)*$")
_SITE_RE = re.compile(SITE_ID_PATTERN)


def check_root(root: str) -> str:
    """Return ``root`` if it is a valid topic root (no wildcards, no empty levels)."""
    if not _ROOT_RE.match(root):
        raise ValueError(
            f"topic root {root!r} must be letters, digits, '_' or '-' in '/'-separated levels"
        )
    return root


def hits_topic(root: str, site_id: str) -> str:
    return f"{root}/site/{site_id}/hits"


def status_topic(root: str, site_id: str) -> str:
    return f"{root}/site/{site_id}/status"


def all_hits_filter(root: str) -> str:
    """Subscription filter for every site's hits."""
    return f"{root}/site/+/hits"


def all_status_filter(root: str) -> str:
    return f"{root}/site/+/status"


def alerts_topic(root: str) -> str:
    return f"{root}/alerts"


def external_topic(root: str) -> str:
    return f"{root}/external"


def site_of(root: str, topic: str) -> tuple[str, str] | None:
    """``(site_id, kind)`` of a per-site topic (kind ``hits`` or ``status``), else None.

    The site segment is returned as it is, even if it is not a valid site id,
    so that the caller can reject it with a reason.
    """
    prefix = f"{root}/site/"
    if not topic.startswith(prefix):
        return None
    rest = topic[len(prefix) :].split("/")
    if len(rest) != 2 or rest[1] not in ("hits", "status"):
        return None
    return rest[0], rest[1]


def valid_site_id(site_id: str) -> bool:
    return bool(_SITE_RE.match(site_id))

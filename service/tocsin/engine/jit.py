"""The one way the engine compiles a kernel: numba, no Python objects, GIL released.

Compiled code is cached on disk (beside the sources, or in ``NUMBA_CACHE_DIR``) so
that only the first run after an install pays the compilation (~10 s for all
kernels). Where numba finds no writable place for its cache (a read-only install
under a locked-down service manager, with no writable home) ``cache=True`` would
make the import fail; the kernel is then compiled in memory at every start
instead, which is slower to start but computes the same.
"""

from __future__ import annotations

from collections.abc import Callable
from typing import Any, TypeVar, cast

import numba

F = TypeVar("F", bound=Callable[..., Any])


def kernel(fn: F) -> F:
    """``numba.njit(nogil=True, error_model="numpy")``, cached on disk when possible
    (``error_model="numpy"``: a float division by zero gives inf/nan, as in numpy,
    instead of raising)."""
    try:
        return cast(F, numba.njit(cache=True, nogil=True, error_model="numpy")(fn))
    except RuntimeError:  # "cannot cache function ...: no locator available"
        return cast(F, numba.njit(cache=False, nogil=True, error_model="numpy")(fn))

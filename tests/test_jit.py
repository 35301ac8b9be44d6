"""Kernels still work where numba cannot write its cache (engine/jit.py).

A locked-down service (read-only install, no writable home) leaves numba no place
for its on-disk cache; with ``cache=True`` the import itself would then fail. The
condition is made here with ``NUMBA_CACHE_LOCATOR_CLASSES=ZipCacheLocator`` (a
locator that only serves zipped sources, so none applies), in a fresh process:
plain ``numba.njit(cache=True)`` fails there, Tocsin's kernels compile in memory
and count exactly as the cached kernels of this process do.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np

from tocsin.engine.slot_counts import slot_counts, slot_tables

CHILD = """
import json, sys
import numpy as np
import numba
sys.path.insert(0, {tmp!r})
try:
    import plain_kernel  # numba.njit(cache=True) on a real file
    plain = "imported"
except RuntimeError as exc:
    plain = str(exc)
from tocsin.engine.slot_counts import slot_counts, slot_tables
d = json.loads(sys.stdin.read())
a = {{k: np.asarray(v, dtype=np.int64) for k, v in d.items() if k != "n"}}
tab = slot_tables(a["lo"], a["hi"], d["n"])
kk = slot_counts(
    a["t"], a["s"], a["prev"], a["ts"], a["ss"], tab.edges, tab.counted, tab.rows, d["n"],
    500, 40000, np.zeros(d["n"], dtype=np.int64),
)
print(json.dumps({{"plain": plain, "kk": kk.tolist()}}))
"""


def test_kernels_compile_in_memory_without_a_cache(tmp_path: Path) -> None:
    (tmp_path / "plain_kernel.py").write_text(
        "import numba\n\n@numba.njit(cache=True)\ndef f(x):\n    return x + 1\n"
    )
    rng = np.random.default_rng(2)
    n = 6
    t = np.sort(rng.integers(0, 5_000_000, 800))
    s = rng.integers(0, n, 800)
    prev = np.full(800, -(2**62), dtype=np.int64)
    for k in range(n):  # previous hit of the same site
        idx = np.flatnonzero(s == k)
        prev[idx[1:]] = t[idx[:-1]]
    data = {
        "t": t.tolist(),
        "s": s.tolist(),
        "prev": prev.tolist(),
        "ts": t[::7].tolist(),
        "ss": s[::7].tolist(),
        "lo": (-rng.integers(0, 500, n * n)).tolist(),
        "hi": rng.integers(0, 40_000, n * n).tolist(),
        "n": n,
    }
    env = dict(os.environ, NUMBA_CACHE_LOCATOR_CLASSES="ZipCacheLocator")
    env.pop("NUMBA_CACHE_DIR", None)
    out = subprocess.run(
        [sys.executable, "-c", CHILD.format(tmp=str(tmp_path))],
        input=json.dumps(data),
        capture_output=True,
        text=True,
        env=env,
        timeout=300,
        check=True,
    )
    got = json.loads(out.stdout)
    assert "no locator available" in got["plain"]  # the condition really holds
    a = {k: np.asarray(v, dtype=np.int64) for k, v in data.items() if k != "n"}
    tab = slot_tables(a["lo"], a["hi"], n)
    here = slot_counts(
        a["t"],
        a["s"],
        a["prev"],
        a["ts"],
        a["ss"],
        tab.edges,
        tab.counted,
        tab.rows,
        n,
        500,
        40000,
        np.zeros(n, dtype=np.int64),
    )
    assert got["kk"] == here.tolist()
    assert max(got["kk"]) >= 2

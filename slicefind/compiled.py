"""The numba kernels every stage shares, compiled on first use and cached on disk.

`numba_kernels` imports `slicefind._kernels` (so numba loads only when a kernel is
needed) after pointing numba's cache at a per-user folder (`cache_dir`), so a read-only
install still caches what it compiles.
"""
from __future__ import annotations

import os

__all__ = ["numba_kernels", "cache_dir"]


def numba_kernels():
    """The compiled kernels module (compiled on first use, then loaded from numba's disk cache)."""
    os.environ.setdefault("NUMBA_CACHE_DIR", cache_dir())
    from slicefind import _kernels  # numba is imported here, on first use: start-up time

    return _kernels


def cache_dir() -> str:
    """Where numba caches compiled kernels: a per-user folder, so a read-only install still caches."""
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return os.path.join(base, "slicefind", "numba")

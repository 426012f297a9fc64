"""Compiled kernels (numba): the fused block loop of the engine.

One compiled call advances a chunk of basins over a block of days: forcing errors, the
counter-based normals, the model step, the one-observation analysis and the recorded
outputs, basin by basin, so that a basin's members stay in cache for the whole block. The
numpy path (:mod:`assim.models`, :mod:`assim.filters`, :mod:`assim.perturb`) is the
specification: every model formula is written once there as an element-wise function that
numpy applies to arrays and numba compiles for one member, and the tests hold the kernel
to the numpy path.

Compiled code is cached on disk (``cache=True``). Numba writes its cache beside the
sources; when the installed package is read-only (a system or container install) the cache
goes to a user folder instead, ``$XDG_CACHE_HOME/assim/numba`` (else
``~/.cache/assim/numba``), chosen here before numba is imported. An explicit
``NUMBA_CACHE_DIR`` is always respected.

This package imports numpy and numba only.
"""

from __future__ import annotations

import os
from pathlib import Path


def _writable(folder: Path) -> bool:
    return os.access(folder, os.W_OK)


def cache_dir(package: Path, environ, writable=_writable) -> str | None:
    """The folder numba should cache in: None (beside the sources, numba's default) when an
    explicit ``NUMBA_CACHE_DIR`` is set or ``package`` (its ``__pycache__``) is writable,
    else the user folder ``$XDG_CACHE_HOME/assim/numba`` (default ``~/.cache``)."""
    if environ.get("NUMBA_CACHE_DIR"):
        return None
    pycache = package / "__pycache__"
    if writable(pycache if pycache.exists() else package):
        return None
    base = environ.get("XDG_CACHE_HOME") or str(Path.home() / ".cache")
    return str(Path(base) / "assim" / "numba")


def _choose_cache_dir() -> None:
    """Set ``NUMBA_CACHE_DIR`` before numba is imported when the install is read-only."""
    chosen = cache_dir(Path(__file__).resolve().parent, os.environ)
    if chosen is not None:
        os.environ["NUMBA_CACHE_DIR"] = chosen


_choose_cache_dir()

from assim.kernels.block import COMPILED_MODELS, compiled_model, run_block, run_leads  # noqa: E402

__all__ = ["COMPILED_MODELS", "cache_dir", "compiled_model", "run_block", "run_leads"]

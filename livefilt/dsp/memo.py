"""Designed arrays kept on disk between runs, so start-up need not design again.

Designing a chain's sections takes scipy.signal, whose import alone costs
about a second; the live start-up loads the sections it designed last time
instead.  :func:`remembered` returns what ``make()`` returns, from memory,
else from the cache folder, else by calling it (and then stores it).

An entry's name is a hash of everything the result depends on: the caller's
key, livefilt's, scipy's and numpy's versions, so an upgrade designs again.
Files are ``.npy`` (exact float64 bits), written to a temporary name and
renamed, so a reader never sees half a file; an unreadable entry is designed
again, and a cache folder that cannot be written is only a slower start.

Folder: ``$LIVEFILT_CACHE_DIR``, else ``$XDG_CACHE_HOME/livefilt``, else
``~/.cache/livefilt``; ``LIVEFILT_CACHE_DIR=""`` keeps nothing on disk.
"""

from __future__ import annotations

import hashlib
import logging
import os
import tempfile
from pathlib import Path
from typing import Callable

import numpy as np
import scipy

from livefilt import __version__

__all__ = ["remembered", "cache_folder"]

log = logging.getLogger(__name__)

_MEMORY: dict[str, np.ndarray] = {}
_MEMORY_MAX = 4096


def cache_folder() -> Path | None:
    """Where designed arrays are kept (None: on disk nowhere)."""
    env = os.environ.get("LIVEFILT_CACHE_DIR")
    if env is not None:
        return Path(env) if env else None
    base = os.environ.get("XDG_CACHE_HOME") or os.path.join(os.path.expanduser("~"), ".cache")
    return Path(base) / "livefilt"


def remembered(kind: str, key: str, make: Callable[[], np.ndarray]) -> np.ndarray:
    """``make()``'s array for ``key`` (a text naming every input), a fresh copy.

    ``kind`` names the sub-folder (``"sections"``).  Exceptions from ``make``
    pass through and nothing is stored.
    """
    name = hashlib.sha256("\n".join(
        (kind, key, __version__, scipy.__version__, np.__version__)).encode()).hexdigest()[:40]
    got = _MEMORY.get(name)
    folder = cache_folder()
    path = None if folder is None else folder / kind / f"{name}.npy"
    if got is None and path is not None:
        got = _load(path)
    if got is None:
        got = np.array(make(), dtype=np.float64, order="C")
        if path is not None:
            _store(path, got)
    if len(_MEMORY) < _MEMORY_MAX:
        _MEMORY[name] = got
    return got.copy()


def _load(path: Path) -> np.ndarray | None:
    try:
        got = np.load(path, allow_pickle=False)
    except FileNotFoundError:
        return None
    except (OSError, ValueError) as exc:  # unreadable or cut short: design again
        log.debug("design cache entry %s unreadable (%s), designing again", path, exc)
        return None
    if got.dtype != np.float64:
        return None
    return got


def _store(path: Path, value: np.ndarray) -> None:
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(dir=path.parent, suffix=".part")
        try:
            with os.fdopen(fd, "wb") as f:
                np.save(f, value, allow_pickle=False)
            os.replace(tmp, path)
        except BaseException:
            os.unlink(tmp)
            raise
    except OSError as exc:  # a read-only or full disk: only a slower start next time
        log.debug("design cache %s not written (%s)", path, exc)

"""Progress for long work (replays, sweeps, reports): one library (tqdm), on stderr,
silent when stderr is not a terminal so logs and pipes stay clean.

    with progress(total=run_seconds, desc="replay", unit="s") as bar:
        bar.update(block_seconds)

tqdm shows the rate and the time to go; a disabled bar accepts the same calls.
"""

from __future__ import annotations

import sys

__all__ = ["progress"]


def progress(total: float | None, desc: str, unit: str = "it", enabled: bool | None = None,
             scale: bool = False):
    """A tqdm bar on stderr; ``enabled=None`` means "only on a terminal"."""
    from tqdm import tqdm
    if enabled is None:
        enabled = sys.stderr.isatty()
    fmt = "{desc}: {percentage:3.0f}%|{bar}| {n:.4g}/{total:.4g} {unit} [{elapsed}<{remaining}]"
    return tqdm(total=total, desc=desc, unit=unit, disable=not enabled, file=sys.stderr,
                leave=False, dynamic_ncols=True, unit_scale=scale,
                bar_format=fmt if total and not scale else None)

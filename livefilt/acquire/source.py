"""The input-driver contract and the driver registry.

A driver is a :class:`Source` subclass registered under a short name in the
entry-point group ``livefilt.drivers`` (the built-ins exactly like a third
party's plug-in).  Drivers live in ``drivers/`` (installed as
``livefilt.drivers``) and know nothing of filters, the engine or Qt.

Real-time contract
------------------
A driver's thread or audio callback only copies samples into the
:class:`~livefilt.acquire.ring.Ring` it was given in :meth:`Source.start` (``ring.write``)
and reports losses with ``ring.mark_gap``; it does no filtering, no file I/O
and no logging per block.  When its data ends for good (end of a file) it
calls ``ring.close()``.

Lifecycle::

    src = load_driver("simulated").from_settings(options, rate_hz=48000, block=256)
    src.open()             # opens the device; may learn rate_hz / channels from it
    ring = Ring(src.channels, capacity)
    src.start(ring)        # returns at once; samples flow
    ...
    src.stop()             # idempotent; joins threads, closes the device

``livefilt.drivers`` modules are imported only when chosen, so importing
livefilt needs neither PortAudio nor Qt.
"""

from __future__ import annotations

import logging
import time
from importlib import metadata
from typing import Any, ClassVar

import numpy as np

from livefilt import fields
from livefilt.errors import SettingError, SourceUnavailable

__all__ = ["Source", "DeviceInfo", "Pacer", "driver_names", "load_driver", "ENTRY_POINT_GROUP",
           "SOURCE_KEYS"]

log = logging.getLogger(__name__)

ENTRY_POINT_GROUP = "livefilt.drivers"

#: Keys every ``[source]`` table takes, whatever the driver.
SOURCE_KEYS = ("driver", "rate_hz", "block")


class DeviceInfo(dict):
    """One device a driver can see now: ``name`` plus free-form details."""


class Source:
    """Base class of input drivers.

    Class attributes
    ----------------
    driver : str
        The registry name (``"simulated"``, ``"soundcard"`` ...).
    options : dict
        Driver-specific keys of the ``[source]`` table it accepts, each mapped
        to a one-line description (shown by ``livefilt sources``).

    Instance attributes set by ``from_settings``
    --------------------------------------------
    rate_hz : float
        Sample rate of the frames written to the ring.
    channels : int
        Channels per frame.
    channel_names : list of str
        One name per channel (``"detector"``, ``"reference"`` ...).
    units : str
        ``"V"`` when calibrated, else ``"FS"`` (full scale, 1.0 = clipping).
    device : str
        Human-readable device description for the status line and run.toml.
    realtime : bool
        True when samples arrive paced by a clock (hardware or simulated real
        time), False when the source runs as fast as the consumer reads.
    reference_hint : dict or None
        What the source knows about the modulation (``frequency_hz``,
        ``phase_deg``), e.g. from a firmware's self-description.
    full_scale : float
        The sample value of full scale in ``units`` (1.0 for FS).
    resolution_bits : int or None
        Bits per sample of an integer digitizer or file (None: float or unknown).
    markers : list of dict
        Distance markers the source knows in advance (``time_s`` of its data,
        ``distance_m`` or none while the target moves, ``note``): a simulated
        scene's truth, a replayed run's own markers.  The engine adds each one
        when its time has been processed.
    length_s : float or None
        How long the source's data lasts when it ends by itself (a file, a
        walk-away scene); None for a live device.
    """

    driver: ClassVar[str] = ""
    options: ClassVar[dict[str, str]] = {}

    rate_hz: float = 0.0
    channels: int = 1
    channel_names: list[str] = ["in0"]
    units: str = "FS"
    device: str = ""
    realtime: bool = True
    reference_hint: dict | None = None
    full_scale: float = 1.0
    resolution_bits: int | None = None
    #: The driver's options as used, defaults filled in (None: unset); run.toml
    #: saves them so a replay with a later version reads the same.
    resolved: dict[str, Any] = {}
    markers: list = []
    length_s: float | None = None

    # -- construction --------------------------------------------------
    @classmethod
    def from_settings(cls, options: dict[str, Any], rate_hz: float, block: int) -> "Source":
        """Build the source from the ``[source]`` table's driver-specific keys.

        Raises :class:`~livefilt.errors.SettingError` with field paths
        relative to ``source`` (``"port"``) for invalid options.
        """
        raise NotImplementedError

    @classmethod
    def probe(cls) -> list[DeviceInfo]:
        """Devices this driver can see now.

        Raises :class:`~livefilt.errors.SourceUnavailable` with a one-line
        reason (e.g. how to install a missing library) when it cannot look.
        """
        return []

    # -- running -------------------------------------------------------
    def open(self) -> None:
        """Open the device.  After this, ``rate_hz``, ``channels``,
        ``channel_names``, ``units`` and ``device`` are final (a device that
        describes itself, such as the serial firmware, sets them here).
        Raises :class:`~livefilt.errors.SourceError` with a one-line reason."""

    def start(self, ring) -> None:
        """Begin writing frames into ``ring``; return at once."""
        raise NotImplementedError

    def stop(self) -> None:
        """Stop producing and release the device; safe to call twice."""

    def info(self) -> dict[str, Any]:
        """Facts for run.toml: driver, device, counters of errors and gaps."""
        return {"driver": self.driver, "device": self.device,
                "rate_hz": self.rate_hz, "channels": self.channels,
                "channel_names": list(self.channel_names), "units": self.units}

    def status(self) -> dict[str, Any]:
        """Live counters for the read-out (overflows, CRC errors, state)."""
        return {}

    def clip_levels(self) -> tuple[np.ndarray, np.ndarray]:
        """Per channel (low, high): a sample at or beyond either is at full scale.

        Default: +-``full_scale``; for an N-bit integer source the top code,
        ``full_scale * (1 - 2**(1 - N))`` (int16 32767 reads 0.99997 FS).
        """
        fs = float(self.full_scale)
        bits = self.resolution_bits
        top = fs * (1.0 - 2.0 ** (1 - bits)) if bits else fs
        return np.full(self.channels, -fs), np.full(self.channels, top)

    @classmethod
    def check_unknown(cls, options: dict[str, Any], known) -> None:
        """Refuse keys the ``[source]`` table does not take, listing every key it
        takes: the common ones (:data:`SOURCE_KEYS`) and this driver's."""
        what = f'a [source] table with driver = "{cls.driver}"' if cls.driver else "[source]"
        fields.check_keys(options, SOURCE_KEYS + tuple(sorted(known)), what)


class Pacer:
    """Hand-over timing for a source that makes its own samples (simulation, file).

    ``realtime``: piece ``k`` may go once the wall clock has reached the time
    its last frame was acquired, so the engine sees a live device's rhythm.
    Otherwise as fast as the consumer reads: wait while the ring has no room
    (such a source never overruns the ring).

    Parameters
    ----------
    rate_hz : float
    realtime : bool
    stop : threading.Event
        Set by the source's ``stop``; every wait returns early on it.
    """

    def __init__(self, rate_hz: float, realtime: bool, stop):
        self.rate_hz, self.realtime, self.stop = rate_hz, realtime, stop
        self.t0 = time.monotonic()

    def wait(self, ring, sent: int, piece: int) -> bool:
        """Wait until ``piece`` frames after ``sent`` may be written; False when stopped."""
        if self.realtime:
            while not self.stop.is_set():
                wait = self.t0 + (sent + piece) / self.rate_hz - time.monotonic()
                if wait <= 0:
                    return True
                self.stop.wait(min(wait, 0.05))
            return False
        # woken by the consumer's reads (polling every 0.5 ms cost a fast replay a
        # third of a core in wake-ups and GIL hand-overs); stop is seen within 50 ms
        while not self.stop.is_set():
            if ring.wait_for_room(piece, 0.05):
                return True
        return False


def _entry_points():
    return {ep.name: ep for ep in metadata.entry_points(group=ENTRY_POINT_GROUP)}


# Fallback when the package runs from a source tree that was never installed:
# the same names the built-ins register in pyproject.toml.
_BUILTIN = {
    "simulated": "livefilt.drivers.simulated:SimulatedSource",
    "file": "livefilt.drivers.file:FileSource",
    "soundcard": "livefilt.drivers.soundcard:SoundCardSource",
    "serial": "livefilt.drivers.serialport:SerialSource",
}


def driver_names() -> list[str]:
    """Names of every registered driver, built-ins first."""
    names = list(_BUILTIN)
    names += sorted(n for n in _entry_points() if n not in _BUILTIN)
    return names


def load_driver(name: str) -> type[Source]:
    """Import and return the driver class registered as ``name``.

    Raises SettingError (field ``source.driver``) naming the known drivers
    when ``name`` is unknown.
    """
    eps = _entry_points()
    if name in eps:
        cls = eps[name].load()
    elif name in _BUILTIN:
        module, _, attr = _BUILTIN[name].partition(":")
        import importlib
        cls = getattr(importlib.import_module(module), attr)
    else:
        raise SettingError("source.driver", name,
                           "unknown driver; known: " + ", ".join(driver_names()))
    if not (isinstance(cls, type) and issubclass(cls, Source)):
        raise SourceUnavailable(f"driver {name!r} does not provide a livefilt Source class")
    return cls

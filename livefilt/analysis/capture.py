"""Take a stretch of samples from any source, with the host's clock at every hand-over.

The check and the survey need the raw samples, not the chains' output, and
the check needs to know *when* each piece arrived: :class:`TimedRing` is the
engine's ring with one addition on the producer side, the host's monotonic
time and the running frame count at every ``write`` (into a preallocated
log; no allocation in the driver's thread).  That is the moment a driver
hands samples over (for the sound card: once per PortAudio callback), so the
intervals are the callback timing.

API map
-------
- :func:`capture`: open, start, read ``seconds`` of frames, stop; returns a
  :class:`Capture` (frames, arrival log, the ring's loss counters, the
  source's own status and info).
- :func:`stream_health`: rate error in ppm with its uncertainty, delivery
  interval and jitter, longest gap, from a :class:`Capture`.
- :func:`channel_index`, :func:`detector_enbw`: which captured channel the
  first chain reads, and its detector's ENBW (what a report is about).
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, field

import numpy as np

from livefilt.acquire.ring import Ring
from livefilt.dsp.detect import RmsDetector
from livefilt.errors import SourceError
from livefilt.progress import progress

__all__ = ["TimedRing", "Capture", "capture", "stream_health", "channel_index",
           "detector_enbw", "STALL_S"]

#: A live source that delivers nothing for this long has stalled (an error, never a hang).
STALL_S = 5.0


class TimedRing(Ring):
    """A :class:`Ring` that logs ``(time.monotonic(), frames written)`` at each write.

    Parameters
    ----------
    channels, capacity : int
    log_size : int
        Writes logged; later writes are counted but not logged.
    """

    def __init__(self, channels: int, capacity: int, log_size: int):
        super().__init__(channels, capacity)
        self.log_t = np.zeros(log_size)
        self.log_n = np.zeros(log_size, dtype=np.int64)
        self.logged = 0
        self._arrived = 0  # frames offered by the driver, kept or not

    def write(self, frames: np.ndarray) -> int:
        now = time.monotonic()
        kept = super().write(frames)
        self._arrived += frames.shape[0]
        i = self.logged
        if i < self.log_t.size:
            self.log_t[i] = now
            self.log_n[i] = self._arrived + self.device_lost_frames
            self.logged = i + 1
        return kept


@dataclass
class Capture:
    """What :func:`capture` brought back."""

    data: np.ndarray               # (frames, channels) float32, gaps not filled
    rate_hz: float
    channel_names: list
    units: str
    realtime: bool
    arrival_t: np.ndarray          # host monotonic time of each write
    arrival_n: np.ndarray          # frames offered up to and including that write (losses included)
    dropped_frames: int = 0        # ring overruns + device-reported losses
    overruns: int = 0
    device_events: int = 0
    gaps: list = field(default_factory=list)  # (frame position, kind, frames, note)
    status: dict = field(default_factory=dict)
    info: dict = field(default_factory=dict)
    device: str = ""
    ended: bool = False            # the source ended before the duration (a file)

    @property
    def seconds(self) -> float:
        return self.data.shape[0] / self.rate_hz


def capture(source, seconds: float | None, desc: str = "acquiring", settle_s: float = 0.0) -> Capture:
    """Read ``seconds`` of frames (all of a file when None) from an unopened ``source``.

    ``settle_s`` of frames are read first and thrown away (a stream's start).
    Raises SourceError when a live source delivers nothing for STALL_S seconds.
    """
    source.open()
    try:
        rate = float(source.rate_hz)
        total_known = getattr(source, "frames_total", None)
        if seconds is None:
            if total_known is None:
                raise SourceError(f"{source.device}: a live source needs a duration")
            want = int(total_known)
        else:
            want = int(round(seconds * rate))
            if total_known is not None:
                want = min(want, int(total_known))
        skip = int(round(settle_s * rate))
        block = max(256, int(rate / 50))
        ring = TimedRing(source.channels, max(int(rate * 2), block * 8),
                         log_size=int((want + skip) / 16) + 1024)
        out = np.zeros((want, source.channels), dtype=np.float32)
        got, ended, gaps = 0, False, []
        source.start(ring)
        last = time.monotonic()
        with progress(want / rate, desc, unit="s") as bar:
            while got < want:
                blk = ring.read(block, min_frames=1, timeout=0.2)
                now = time.monotonic()
                if blk is None:
                    if ring.closed:
                        ended = True
                        break
                    if source.realtime and now - last > STALL_S:
                        raise SourceError(f"{source.device or source.driver}: no samples for "
                                          f"{STALL_S:g} s (device stalled or unplugged?)")
                    continue
                last = now
                for kind, lost, note in blk.gaps:
                    gaps.append((got, kind, lost, note))
                n = blk.frames
                if skip:
                    drop = min(skip, n)
                    skip -= drop
                    if drop == n:
                        continue
                    data = blk.data[drop:]
                else:
                    data = blk.data
                n = min(data.shape[0], want - got)
                out[got:got + n] = data[:n]
                got += n
                bar.update(n / rate)
        status, info = source.status(), source.info()
    finally:
        source.stop()
    k = ring.logged
    return Capture(out[:got], rate, list(source.channel_names), source.units, bool(source.realtime),
                   ring.log_t[:k].copy(), ring.log_n[:k].copy(),
                   ring.overrun_frames + ring.device_lost_frames, ring.overruns, ring.device_events,
                   gaps, status, info, source.device, ended)


def stream_health(cap: Capture, skip_s: float = 0.5) -> dict:
    """Rate and timing of a live capture, against the host's monotonic clock.

    Rate: a least-squares line through (frames offered, host time) of every
    hand-over after the first ``skip_s`` or tenth of the record (a stream's
    start often comes in a burst: what a port buffered before it was read),
    refitted without hand-overs more than 4 median absolute deviations late
    until none is (a busy host delays a hand-over; it never makes one
    early).  ``rate_ppm`` is the rate the slope gives against the nominal
    rate.  Its uncertainty is the jitter allowance of the two ends of the
    record, ``sqrt(2) sigma / T`` with ``sigma`` the residual spread and T the
    span (conservative: the line uses every point).  The host clock is itself
    only as good as its crystal, typically tens of ppm unless NTP disciplines
    it (common practice, from memory).

    Returns a dict: ``rate_ppm``, ``rate_ppm_uncertainty``, ``measured_rate_hz``,
    ``deliveries``, ``delivery_interval_s`` (median), ``delivery_jitter_s``
    (standard deviation of the intervals), ``longest_gap_s``, ``span_s``.
    """
    t, n = cap.arrival_t, cap.arrival_n.astype(np.float64)
    out = {"deliveries": int(t.size)}
    if t.size < 8:
        return out
    dt = np.diff(t)
    out["delivery_interval_s"] = float(np.median(dt))
    out["delivery_jitter_s"] = float(np.std(dt))
    out["longest_gap_s"] = float(dt.max())
    keep = t >= t[0] + max(skip_s, 0.1 * (t[-1] - t[0]))
    if keep.sum() < 8:
        keep[:] = True
    tt, nn = t[keep] - t[keep][0], n[keep]
    out["span_s"] = float(tt[-1])
    if not cap.realtime or tt[-1] <= 0:
        return out
    for _ in range(5):
        slope, icpt = np.polyfit(nn, tt, 1)  # seconds per frame
        r = tt - (slope * nn + icpt)
        mad = float(np.median(np.abs(r - np.median(r)))) or 1e-9
        good = r < np.median(r) + 4 * 1.4826 * mad
        if good.all() or good.sum() < 8:
            break
        tt, nn = tt[good], nn[good]
    sigma = float(np.std(r))
    measured = 1.0 / slope
    out["measured_rate_hz"] = float(measured)
    out["rate_ppm"] = float((measured / cap.rate_hz - 1) * 1e6)
    out["rate_ppm_uncertainty"] = float(math.sqrt(2) * sigma / (tt[-1] - tt[0]) * 1e6)
    return out


def channel_index(settings, names: list) -> int:
    """The captured channel the first chain reads (0 when it names none here)."""
    inp = settings.chains[0].input if settings.chains else 0
    if isinstance(inp, str):
        return names.index(inp) if inp in names else 0
    return inp if 0 <= inp < len(names) else 0


def detector_enbw(settings, rate_hz: float) -> float:
    """ENBW of the first chain's detector output low-pass, Hz (1 Hz when there
    is no chain); the same closed form the live detector uses."""
    if not settings.chains:
        return 1.0
    return float(RmsDetector(settings.chains[0].detector, rate_hz, 1, exact_path=True).enbw_hz)

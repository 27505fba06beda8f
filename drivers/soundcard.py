"""Sound-card input through PortAudio (``sounddevice``), with optional modulation drive.

A PortAudio callback stream copies the chosen input channels into the ring.
With a ``drive`` table the same stream is full duplex: it also writes the
modulation waveform (square with a duty cycle, or sine) to one output channel,
so the light source is switched by the card's own sample clock and the lock-in
reference is sample-locked to acquisition with no reference cable.

API map
-------
- :class:`SoundCardSource` (registry name ``"soundcard"``): ``from_settings``,
  ``probe``, ``open``, ``start(ring)``, ``stop``, ``info``, ``status``,
  ``reference_hint``, ``loopback_delay_frames``.
- :class:`DriveSpec`: the validated ``drive`` table and its waveform table.

Options (``[source]`` table)
----------------------------
device : str or int, optional
    Input device: a part of its name (case-insensitive; an exact name wins)
    or its PortAudio index as ``livefilt sources`` lists it.  Default: the
    system's default input.  A name that fits several devices is refused with
    every candidate listed.
channels : list of int, default [0]
    Input channels carrying detector signals, **0-based** (0 is the card's
    first input, often labelled 1 or L), like every channel number in the
    config.  They become ring channels 0, 1, ... in this order.
reference_channel : int, optional
    An input channel (0-based) carrying a measured reference; it becomes the
    last ring channel (ring channel ``len(channels)``, for ``[reference]
    channel``), named ``"reference"``.
latency : "low" | "high" | float, default "high"
    PortAudio's suggested latency: its low or high default for the device, or
    seconds.
volts_full_scale : float, optional
    Volts at the input for a full-scale sample (1.0); samples are then scaled
    to volts and ``units`` is ``"V"`` (else ``"FS"``).
drive : table, optional
    Modulation drive on an output channel of the same device:

    - ``output_channel`` (int, default 0, 0-based),
    - ``waveform`` (``"square"`` | ``"sine"``, default ``"square"``),
    - ``frequency_hz`` (required, at least 0.1 Hz and below Nyquist),
    - ``duty`` (square only, fraction of the period at the high level,
      0 < duty < 1, default 0.5),
    - ``amplitude`` (required, 0 < a <= 1 full scale: the sine's peak, or the
      square's levels +a / -a),
    - ``loopback_channel`` (int, 0-based input channel on which the delay
      burst is looked for; default the first of ``channels``),
    - ``measure_delay`` (bool, default true).

Drive, delay and reference phase
--------------------------------
The waveform is one table of ``q`` samples holding exactly ``p`` periods,
``f = rate_hz * p / q`` (the requested frequency as the nearest fraction with
``q`` up to 10 s of samples; ``reference_hint["frequency_hz"]`` is that exact
value).  Its fundamental is ``cos``-phased: the square's high part is centred
on phase 0 (a sample exactly on an edge takes the mid level, 0), so both
waveforms read phase 0 at table index 0.

``open`` starts the stream and, unless ``measure_delay`` is false, plays a
pseudo-random +-amplitude burst of 4096 samples (after 0.2 s of silence, then
every 0.49 s) and finds each on ``loopback_channel`` by cross-correlation:
the card's output-to-input delay ``D`` in whole samples (searched up to
0.4 s).  Two bursts in a row must give the same ``D`` (within one frame; up to
four bursts are played) with no device flag (underflow, overflow) from the
first burst on, because a stream that is still settling or glitches shifts
between them.  The phase of the loop at the drive frequency with ``D`` taken
out (analog phase shift, sub-sample delay) becomes
``reference_hint["phase_deg"]``.

``start(ring)`` restarts the drive table at the next block and lets the ring's
first frame be the input sample ``D`` frames later, so at ring index ``n`` the
drive's fundamental arrives as ``cos(2 pi f n / rate_hz + phase_deg)``: the
lock-in's phase read-out (signal minus reference, :mod:`livefilt.dsp.detect`)
then means the phase the sensor path adds.  When the delay is not measured,
``reference_hint`` holds ``frequency_hz`` only.  An output underflow or input
overflow moves that alignment by an unknown number of frames; both are
counted and marked on the ring.

Real-time contract
------------------
The callback copies the chosen input columns (scaled to volts if calibrated)
into a preallocated buffer and ``ring.write``\\s it, marks device flags with
``ring.mark_gap(0, note=...)`` and bumps integer counters; it fills the whole
output buffer from the precomputed table by slicing at a running index.  No
array allocation in steady state, no I/O, no logging, no locks but the ring's.

Safety
------
A sound-card output is a small-signal line or headphone output.  Drive a LED
or a laser diode only through a proper driver stage (current-limited, with its
own supply); never connect the headphone output straight to a laser diode.
Observe the eye-safety rules for your laser class and light source as your
local codes and licensed practice require; the ``amplitude`` option has no
default so the drive level is always chosen on purpose.

References
----------
PortAudio callback status flags (``paInputOverflow``, ``paOutputUnderflow``)
as exposed by python-sounddevice's ``CallbackFlags``.
"""

from __future__ import annotations

import logging
import math
import time
from contextlib import contextmanager
from dataclasses import dataclass
from fractions import Fraction
from typing import Any

import numpy as np

from livefilt import fields
from livefilt.errors import SettingError, SourceError, SourceUnavailable
from livefilt.acquire.source import DeviceInfo, Source

__all__ = ["SoundCardSource", "DriveSpec"]

log = logging.getLogger(__name__)

#: Delay measurement: silence before the first burst, burst length, longest
#: delay searched, most bursts played (two in a row must agree).
LEAD_S = 0.2
BURST_FRAMES = 4096
MAX_DELAY_S = 0.4
MAX_BURSTS = 4
#: An input-only stream's first frames are not passed on (some ALSA plug-ins
#: deliver stale or uninitialised samples when a stream starts).
SETTLE_S = 0.1
#: The correlation peak must stand this many times above every lag more than
#: PEAK_WIDTH frames away (a band-limited card widens the peak).
PEAK_MARGIN = 3.0
PEAK_WIDTH = 16
#: Longest waveform table, in seconds of samples (bounds the frequency's fraction).
MAX_TABLE_S = 10.0
_BURST_SEED = 1057

_WAVEFORMS = ("square", "sine")
_LATENCIES = ("low", "high")
_OPTIONS = {
    "device": "input device: part of its name or its index (default: system default input)",
    "channels": "input channels for detector signals, 0-based list (default [0])",
    "reference_channel": "input channel (0-based) carrying a measured reference (optional)",
    "latency": '"low", "high" (default) or seconds: PortAudio suggested latency',
    "volts_full_scale": "volts per full-scale sample; amplitudes then read in V (optional)",
    "drive": "modulation output table: output_channel, waveform (square|sine), frequency_hz, "
             "duty, amplitude (0..1 FS), loopback_channel, measure_delay",
}
_DRIVE_KEYS = ("output_channel", "waveform", "frequency_hz", "duty", "amplitude",
               "loopback_channel", "measure_delay")


@dataclass(frozen=True)
class DriveSpec:
    """The validated ``drive`` table.

    Attributes
    ----------
    output_channel : int
        Output channel, 0-based.
    waveform : {"square", "sine"}
    frequency_hz : float
        Requested frequency, Hz.
    duty : float
        Square: fraction of the period at the high level.
    amplitude : float
        Peak (sine) or level (square, +a / -a), full scale.
    loopback_channel : int or None
        Input channel for the delay burst (None: the first detector channel).
    measure_delay : bool
    """

    output_channel: int
    waveform: str
    frequency_hz: float
    duty: float
    amplitude: float
    loopback_channel: int | None
    measure_delay: bool

    @classmethod
    def from_mapping(cls, table: Any, rate_hz: float) -> "DriveSpec":
        """Validate the ``drive`` table; field paths are relative to it."""
        if not isinstance(table, dict):
            raise SettingError("", table, "must be a table {output_channel, waveform, "
                               "frequency_hz, duty, amplitude}")
        fields.check_keys(table, _DRIVE_KEYS, "a drive table")
        waveform = fields.choice(table.get("waveform", "square"), "waveform", _WAVEFORMS)
        if "frequency_hz" not in table:
            raise SettingError("frequency_hz", None, "required: the modulation frequency, Hz")
        freq = fields.real(table.get("frequency_hz"), "frequency_hz")
        if not 1 / MAX_TABLE_S <= freq < rate_hz / 2:
            raise SettingError("frequency_hz", table["frequency_hz"],
                               f"must be at least {1 / MAX_TABLE_S:g} Hz and below Nyquist, "
                               f"{rate_hz / 2:g} Hz")
        if "duty" in table and waveform != "square":
            raise SettingError("duty", table["duty"], 'only for waveform = "square"')
        duty = fields.real(table.get("duty", 0.5), "duty")
        if not 0 < duty < 1:
            raise SettingError("duty", table["duty"], "must be above 0 and below 1")
        if "amplitude" not in table:
            raise SettingError("amplitude", None,
                               "required: drive level, above 0 and at most 1 (full scale)")
        amplitude = fields.real(table.get("amplitude"), "amplitude")
        if not 0 < amplitude <= 1:
            raise SettingError("amplitude", table["amplitude"],
                               "must be above 0 and at most 1 (full scale)")
        out = fields.channel(table.get("output_channel", 0), "output_channel")
        loop = fields.channel(table.get("loopback_channel", None), "loopback_channel")
        measure = fields.boolean(table.get("measure_delay", True), "measure_delay")
        return cls(out, waveform, freq, duty, amplitude, loop, measure)

    def table(self, rate_hz: float) -> tuple[np.ndarray, float]:
        """One table of ``q`` samples holding ``p`` whole periods.

        Returns
        -------
        table : ndarray, float32, shape (q,)
        frequency_hz : float
            The exact frequency played, ``rate_hz * p / q``.
        """
        ratio = (Fraction(self.frequency_hz) / Fraction(rate_hz)).limit_denominator(
            max(1, int(MAX_TABLE_S * rate_hz)))
        p, q = ratio.numerator, ratio.denominator
        # phase of sample j as an exact integer fraction r/q of a period
        r = (np.arange(q, dtype=np.int64) * p) % q
        if self.waveform == "sine":
            wave = self.amplitude * np.cos(2 * np.pi * r / q)
        else:
            # distance from phase 0 in periods, doubled; high inside the duty span
            d2 = 2 * np.minimum(r, q - r)
            wave = np.where(d2 < self.duty * q, self.amplitude, -self.amplitude)
            wave[d2 == self.duty * q] = 0.0
        return wave.astype(np.float32), rate_hz * p / q


class SoundCardSource(Source):
    """Sound-card input (and optional modulation drive) through sounddevice.

    See the module docstring for the options, the drive and the real-time
    contract.  ``open`` starts the PortAudio stream (and measures the loopback
    delay when driving); ``start`` attaches the ring.
    """

    driver = "soundcard"
    options = _OPTIONS

    def __init__(self, rate_hz: float, block: int, device=None, channels=(0,),
                 reference_channel: int | None = None, latency="high",
                 volts_full_scale: float | None = None, drive: DriveSpec | None = None):
        self.rate_hz = float(rate_hz)
        self.block = int(block)
        self.device_setting = device
        self.input_channels = list(channels)
        self.reference_channel = reference_channel
        self.latency = latency
        self.volts_full_scale = volts_full_scale
        self.drive = drive
        self._columns = self.input_channels + (
            [reference_channel] if reference_channel is not None else [])
        self.channels = len(self._columns)
        self.channel_names = [f"in{c}" for c in self.input_channels] + (
            ["reference"] if reference_channel is not None else [])
        self.units = "V" if volts_full_scale is not None else "FS"
        self.full_scale = volts_full_scale if volts_full_scale is not None else 1.0
        self.device = "" if device is None else str(device)
        self.reference_hint = None
        #: Output-to-input delay in whole frames (None until measured).
        self.loopback_delay_frames: int | None = None
        self._loop_phase_deg: float | None = None
        self._drive_hz: float | None = None
        self._stream = None
        self._state = "closed"
        self._reset_counters()

    # -- construction --------------------------------------------------
    @classmethod
    def from_settings(cls, options: dict[str, Any], rate_hz: float, block: int) -> "SoundCardSource":
        """Validate the ``[source]`` table's sound-card keys (fields relative to ``source``)."""
        cls.check_unknown(options, _OPTIONS)
        fields.number(rate_hz, "rate_hz", 0, None, inclusive=False,
                      allowed="must be a sample rate above 0 Hz")
        fields.integer(block, "block", 1, 65536, "must be a whole number of frames, 1 to 65536")
        device = options.get("device")
        if device is not None:
            if isinstance(device, bool) or not isinstance(device, (int, str)) \
                    or (isinstance(device, int) and device < 0) \
                    or (isinstance(device, str) and not device.strip()):
                raise SettingError("device", device,
                                   "must be a part of a device name or its index (0 or more)")
        channels = options.get("channels", [0])
        if isinstance(channels, int) and not isinstance(channels, bool):
            channels = [channels]
        if not isinstance(channels, list) or not channels \
                or any(isinstance(c, bool) or not isinstance(c, int) or c < 0 for c in channels):
            raise SettingError("channels", options.get("channels"),
                               "must be a list of input channel numbers, 0-based (e.g. [0])")
        if len(set(channels)) != len(channels):
            raise SettingError("channels", channels, "must not repeat a channel")
        reference = fields.channel(options.get("reference_channel", None), "reference_channel")
        if reference is not None and reference in channels:
            raise SettingError("reference_channel", reference,
                               "must differ from the detector channels " + str(channels))
        latency = options.get("latency", "high")
        if not (latency in _LATENCIES or (isinstance(latency, (int, float))
                                          and not isinstance(latency, bool)
                                          and 0 < latency <= 2)):
            raise SettingError("latency", latency, '"low", "high" or seconds (0 < s <= 2)')
        vfs = None
        if "volts_full_scale" in options:
            vfs = fields.real(options.get("volts_full_scale"), "volts_full_scale")
            if not 0 < vfs < math.inf:
                raise SettingError("volts_full_scale", options["volts_full_scale"],
                                   "must be volts above 0 (the input voltage of a 1.0 sample)")
        drive = None
        if "drive" in options:
            try:
                drive = DriveSpec.from_mapping(options["drive"], float(rate_hz))
            except SettingError as exc:
                raise exc.within("drive") from None
        src = cls(rate_hz, block, device, channels, reference, latency, vfs, drive)
        src.resolved = {"device": device, "channels": channels, "reference_channel": reference,
                        "latency": latency, "volts_full_scale": vfs}
        return src

    @classmethod
    def probe(cls) -> list[DeviceInfo]:
        """Input devices PortAudio sees now, with channel counts and default rates.

        Raises
        ------
        SourceUnavailable
            PortAudio or sounddevice is missing (the text says how to get it).
        """
        sd = _sounddevice()
        with _portaudio_errors("cannot list sound devices"):
            devices = sd.query_devices()
            apis = sd.query_hostapis()
            default_in = sd.default.device[0]
        found = []
        for d in devices:
            if d["max_input_channels"] < 1:
                continue
            found.append(DeviceInfo(
                name=d["name"], index=d["index"], hostapi=apis[d["hostapi"]]["name"],
                input_channels=d["max_input_channels"],
                output_channels=d["max_output_channels"],
                default_rate_hz=float(d["default_samplerate"]),
                default=d["index"] == default_in))
        return found

    # -- running -------------------------------------------------------
    def open(self) -> None:
        """Find the device, open and start the stream, measure the loopback delay.

        Raises
        ------
        SettingError
            ``device`` fits no or several input devices; a channel the device
            does not have.
        SourceError
            PortAudio refuses the stream (the text names device and rate).
        SourceUnavailable
            PortAudio or sounddevice is missing.
        """
        if self._stream is not None:
            return
        sd = _sounddevice()
        index, dev = self._find_device(sd)
        self.device = dev["name"]
        need_in = max(self._columns + ([self.drive.loopback_channel]
                                       if self.drive and self.drive.loopback_channel is not None
                                       else [])) + 1
        if need_in > dev["max_input_channels"]:
            raise SettingError("channels", self._columns,
                               f"device {dev['name']!r} has {dev['max_input_channels']} "
                               f"input channels (0 to {dev['max_input_channels'] - 1})")
        self._prepare_buffers(need_in)
        kwargs = dict(samplerate=self.rate_hz, blocksize=self.block, dtype="float32",
                      latency=self.latency, callback=self._callback,
                      finished_callback=self._finished)
        with _portaudio_errors(f"cannot open {dev['name']!r} at {self.rate_hz:g} Hz"):
            if self.drive is None:
                kwargs["callback"] = self._input_callback
                self._stream = sd.InputStream(device=index, channels=need_in, **kwargs)
            else:
                n_out = self.drive.output_channel + 1
                if n_out > dev["max_output_channels"]:
                    raise SettingError("drive.output_channel", self.drive.output_channel,
                                       f"device {dev['name']!r} has "
                                       f"{dev['max_output_channels']} output channels")
                self._stream = sd.Stream(device=(index, index), channels=(need_in, n_out),
                                         **kwargs)
            self._state = "measuring" if self._measuring else "open"
            self._stream.start()
        lat = self._stream.latency
        self._stream_latency = list(lat) if isinstance(lat, tuple) else [lat]
        log.info("opened %s: %d in, rate %g Hz, block %d, latency %s",
                 self.device, need_in, self.rate_hz, self.block, self._stream.latency)
        if self.drive is not None:
            if self._measuring:
                self._await_measurement()
            self.reference_hint = {"frequency_hz": self._drive_hz}
            if self.loopback_delay_frames is not None:
                self.reference_hint["phase_deg"] = self._loop_phase_deg
        self._state = "open"

    def start(self, ring) -> None:
        """Attach ``ring``: frames flow from the next block on."""
        if self._stream is None:
            self.open()
        if ring.channels != self.channels:
            raise SourceError(f"the ring has {ring.channels} channels; "
                              f"this source writes {self.channels}")
        self._pending_ring = ring
        self._state = "running"

    def stop(self) -> None:
        """Stop and close the stream; safe to call twice."""
        stream, self._stream = self._stream, None
        if stream is None:
            return
        self._stopping = True
        try:
            stream.stop()
            stream.close()
        except Exception as exc:  # a device that vanished: nothing left to release
            log.warning("closing %s: %s", self.device, exc)
        self._state = "stopped"

    def clip_levels(self):
        """+-full scale, the positive side at a 16-bit converter's top code
        (32767/32768): PortAudio hands over float32 whatever the converter's
        depth, and that code is as far as a 16-bit card goes (common practice)."""
        lo, hi = super().clip_levels()
        return lo, hi * (1.0 - 2.0 ** -15)

    def info(self) -> dict[str, Any]:
        """Facts for run.toml (no None values: TOML has no null)."""
        out = super().info()
        out.update(block=self.block, latency=self.latency, input_columns=list(self._columns))
        if self.volts_full_scale is not None:
            out["volts_full_scale"] = self.volts_full_scale
        if self._stream_latency is not None:
            out["stream_latency_s"] = list(self._stream_latency)
        out.update(self._counters())
        if self.drive is not None:
            d = self.drive
            drive = {"output_channel": d.output_channel, "waveform": d.waveform,
                     "frequency_hz": self._drive_hz or d.frequency_hz,
                     "requested_frequency_hz": d.frequency_hz,
                     "amplitude": d.amplitude}
            if d.waveform == "square":
                drive["duty"] = d.duty
            if self.loopback_delay_frames is not None:
                drive["loopback_delay_frames"] = self.loopback_delay_frames
                drive["loopback_delay_s"] = self.loopback_delay_frames / self.rate_hz
                drive["loop_phase_deg"] = self._loop_phase_deg
                # one per burst played; -1: that burst was not found
                drive["loopback_delay_trials"] = list(self._delay_trials)
            else:
                drive["loopback_delay"] = self._delay_note or "not measured"
            out["drive"] = drive
        return out

    def status(self) -> dict[str, Any]:
        """Live counters: state, input overflows, output underflows, ring overruns, delay."""
        out = {"state": self._state}
        out.update(self._counters())
        ring = self._ring
        if ring is not None:
            out["ring_overruns"] = ring.overruns
        if self.loopback_delay_frames is not None:
            out["loopback_delay_ms"] = 1e3 * self.loopback_delay_frames / self.rate_hz
        return out

    # -- private -------------------------------------------------------
    def _reset_counters(self) -> None:
        self.input_overflows = 0
        self.output_underflows = 0
        self.input_underflows = 0
        self.output_overflows = 0
        self._ring = None
        self._pending_ring = None
        self._frame = 0          # callback frames since the stream started
        self._ring_from = 0      # first callback frame that goes to the ring
        self._table_pos = 0
        self._measuring = False
        self._stopping = False
        self._stream_latency = None
        self._delay_note = ""
        self._delay_trials = []
        self._last_flag_frame = -1  # callback frame of the latest status flag

    def _counters(self) -> dict[str, int]:
        return {"input_overflows": self.input_overflows,
                "output_underflows": self.output_underflows,
                "input_underflows": self.input_underflows,
                "output_overflows": self.output_overflows}

    def _find_device(self, sd) -> tuple[int, dict]:
        """Resolve the ``device`` option to (index, PortAudio device dict)."""
        with _portaudio_errors("cannot list sound devices"):
            devices = list(sd.query_devices())
            default_in = sd.default.device[0]
        inputs = [d for d in devices if d["max_input_channels"] > 0]
        listing = "; ".join(f"{d['index']}: {d['name']}" for d in inputs) or "none"
        want = self.device_setting
        if want is None:
            if default_in is None or default_in < 0:
                raise SourceError("no default input device; set source.device "
                                  f"(input devices: {listing})")
            return default_in, devices[default_in]
        if isinstance(want, int):
            if want >= len(devices) or devices[want]["max_input_channels"] < 1:
                raise SettingError("device", want, f"no input device has this index; "
                                   f"input devices: {listing}")
            return want, devices[want]
        key = want.strip().lower()
        exact = [d for d in inputs if d["name"].lower() == key]
        hits = exact or [d for d in inputs if key in d["name"].lower()]
        if not hits:
            raise SettingError("device", want, f"no input device name contains it; "
                               f"input devices: {listing}")
        if len(hits) > 1:
            raise SettingError("device", want, f"fits {len(hits)} input devices: "
                               + "; ".join(f"{d['index']}: {d['name']}" for d in hits)
                               + "; give more of the name or the index")
        return hits[0]["index"], hits[0]

    def _prepare_buffers(self, n_in: int) -> None:
        """Everything the callback touches, allocated before the stream starts."""
        self._reset_counters()
        self.loopback_delay_frames = self._loop_phase_deg = self.reference_hint = None
        self._scale = np.float32(self.volts_full_scale or 1.0)
        self._settle = int(SETTLE_S * self.rate_hz)
        self._buf = np.zeros((self.block, self.channels), dtype=np.float32)
        if self.drive is None:
            return
        table, self._drive_hz = self.drive.table(self.rate_hz)
        self._q = table.size
        # one slice always fits: the table followed by its own start again
        self._table = np.resize(table, self._q + self.block)
        if not self.drive.measure_delay:
            self._delay_note = "measurement off (drive.measure_delay = false)"
            return
        lead = int(LEAD_S * self.rate_hz)
        self._window = BURST_FRAMES + int(MAX_DELAY_S * self.rate_hz)
        self._capture_len = lead + MAX_BURSTS * self._window
        rng = np.random.default_rng(_BURST_SEED)
        self._burst = np.where(rng.random(BURST_FRAMES) < 0.5, -1.0, 1.0) * self.drive.amplitude
        self._burst_lead = lead
        self._play = np.zeros(self._capture_len + self.block, dtype=np.float32)
        for k in range(MAX_BURSTS):
            at = lead + k * self._window
            self._play[at:at + BURST_FRAMES] = self._burst
        self._capture = np.zeros(self._capture_len + self.block, dtype=np.float32)
        loop = self.drive.loopback_channel
        self._loop_col = self.input_channels[0] if loop is None else loop
        self._measuring = True

    def _await_frame(self, frame: int) -> None:
        """Wait until the callback has passed ``frame``; a stalled device is a SourceError."""
        limit = (frame - self._frame) / self.rate_hz + 5.0
        deadline = time.monotonic() + limit
        while self._frame < frame:
            if time.monotonic() > deadline or self._stream is None or not self._stream.active:
                self.stop()
                raise SourceError(f"{self.device!r}: the stream stalled while measuring the "
                                  f"loopback delay (no audio for {limit:.1f} s)")
            time.sleep(0.01)

    def _await_measurement(self) -> None:
        """Find each burst as it comes back until two in a row agree; then the loop phase."""
        delays, margin, delay = [], 0.0, None
        for k in range(MAX_BURSTS):
            at = self._burst_lead + k * self._window
            self._await_frame(at + self._window)
            rec = self._capture[at:at + self._window].astype(np.float64)
            # stale or uninitialised samples at a stream's start must not swamp the FFT
            rec[~(np.abs(rec) < 1e3)] = 0.0
            found, margin = _find_burst(rec, self._burst)
            delays.append(found if margin >= PEAK_MARGIN else None)
            # both bursts of the pair, and the time between, free of device flags
            clean = self._last_flag_frame < at - self._window
            if k and clean and found is not None and delays[-2] is not None \
                    and abs(found - delays[-2]) <= 1:
                delay = found
                break
        self._measuring = False
        self._delay_trials = [-1 if d is None else d for d in delays]
        if delay is None:
            if all(d is None for d in delays):
                self._delay_note = (f"burst not found on input {self._loop_col} "
                                    f"(peak only {margin:.1f}x the next lag)")
            elif self._last_flag_frame >= self._burst_lead:
                self._delay_note = (f"device underflows or overflows during the "
                                    f"{len(delays)} bursts (delays found: {delays})")
            else:
                self._delay_note = f"delay not steady over {len(delays)} bursts: {delays}"
            log.warning("%s: loopback delay not measured: %s; the reference phase is unknown",
                        self.device, self._delay_note)
            return
        self.loopback_delay_frames = delay
        back = rec[delay:delay + BURST_FRAMES]
        w = np.exp(2j * np.pi * self._drive_hz / self.rate_hz * np.arange(BURST_FRAMES))
        # vdot conjugates w: these are DFTs at the drive frequency; their ratio is H(f)
        loop = np.vdot(w, back) * np.conj(np.vdot(w, self._burst))
        self._loop_phase_deg = float(np.degrees(np.angle(loop)))
        log.info("%s: loopback delay %d frames (%.3f ms), loop phase %.2f deg at %g Hz",
                 self.device, delay, 1e3 * delay / self.rate_hz, self._loop_phase_deg,
                 self._drive_hz)

    # The PortAudio callback (see "Real-time contract" in the module docstring).
    def _input_callback(self, indata, frames, time_info, status):
        self._callback(indata, None, frames, time_info, status)

    def _callback(self, indata, outdata, frames, time_info, status):
        c0 = self._frame
        ring = self._ring
        if status:
            self._last_flag_frame = c0
            if status.input_overflow:
                self.input_overflows += 1
                if ring is not None:
                    ring.mark_gap(0, note="input overflow")
            if status.input_underflow:
                self.input_underflows += 1
            if outdata is not None:
                if status.output_underflow:
                    self.output_underflows += 1
                    if ring is not None:
                        ring.mark_gap(0, note="output underflow")
                if status.output_overflow:
                    self.output_overflows += 1
        if outdata is not None:
            outdata.fill(0)
            col = self.drive.output_channel
            if self._measuring:
                outdata[:, col] = self._play[c0:c0 + frames]
                self._capture[c0:c0 + frames] = indata[:, self._loop_col]
                if c0 + frames >= self._capture_len:
                    self._measuring = False
            else:
                if ring is None and self._pending_ring is not None:
                    # drive table restarts here; input D frames later is ring index 0
                    self._table_pos = 0
                    self._ring_from = c0 + (self.loopback_delay_frames or 0)
                    ring = self._ring = self._pending_ring
                pos = self._table_pos
                outdata[:, col] = self._table[pos:pos + frames]
                self._table_pos = (pos + frames) % self._q
        elif ring is None and self._pending_ring is not None:
            self._ring_from = max(c0, self._settle)
            ring = self._ring = self._pending_ring
        self._frame = c0 + frames
        if ring is None or c0 + frames <= self._ring_from:
            return
        buf = self._buf
        for j, c in enumerate(self._columns):
            np.multiply(indata[:, c], self._scale, out=buf[:frames, j])
        ring.write(buf[max(0, self._ring_from - c0):frames])

    def _finished(self) -> None:
        # PortAudio ended the stream without stop(): the device is gone for good
        if not self._stopping:
            self._state = "device stopped"
            if self._ring is not None:
                self._ring.close()


# -- helpers ------------------------------------------------------------------
def _sounddevice():
    """Import sounddevice, turning a missing library into a one-line SourceUnavailable."""
    try:
        import sounddevice
    except ImportError as exc:
        raise SourceUnavailable("the sounddevice package is not installed: "
                                "pip install 'livefilt[audio]'") from exc
    except OSError as exc:
        raise SourceUnavailable(f"{exc}: install it with your system's package manager, "
                                "e.g. libportaudio2") from exc
    return sounddevice


@contextmanager
def _portaudio_errors(action: str):
    """The one place PortAudio errors become a one-line SourceError (chained)."""
    import sounddevice
    try:
        yield
    except SettingError:
        raise
    except (sounddevice.PortAudioError, ValueError) as exc:
        text = exc.args[0] if exc.args else str(exc)
        raise SourceError(f"{action}: {text}") from exc


def _find_burst(rec: np.ndarray, burst: np.ndarray) -> tuple[int, float]:
    """Delay (frames) of ``burst`` in ``rec``, which starts where it was played.

    Returns the lag of the largest cross-correlation magnitude and how many
    times it stands above the largest lag more than ``PEAK_WIDTH`` frames away.
    """
    n = rec.size + burst.size
    nfft = 1 << (n - 1).bit_length()
    corr = np.fft.irfft(np.fft.rfft(rec, nfft) * np.conj(np.fft.rfft(burst, nfft)), nfft)
    corr = np.abs(corr[:rec.size - burst.size + 1])
    k = int(np.argmax(corr))
    rest = np.concatenate([corr[:max(0, k - PEAK_WIDTH)], corr[k + PEAK_WIDTH + 1:]])
    second = float(rest.max()) if rest.size else 0.0
    margin = float(corr[k]) / second if second > 0 else (math.inf if corr[k] > 0 else 0.0)
    return k, margin


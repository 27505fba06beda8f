"""Serial microcontroller driver (registry name ``"serial"``).

Reads a board that streams samples over a serial port (USB CDC, a UART
adapter, or any pyserial URL such as ``socket://host:port``), either in the
framed binary protocol of ``drivers/firmware/PROTOCOL.md`` or as text lines.
The bytes are parsed by the pure module :mod:`livefilt.drivers.wire`.

Options (the ``[source]`` table)
--------------------------------
port : str, required
    Device path (``/dev/ttyACM0``, ``COM3``) or pyserial URL
    (``socket://192.168.1.20:7000``, ``rfc2217://...``).
baud : int, default 500000
    Line speed in bit/s; the reference firmware sends at 500000.  Ignored by
    USB CDC boards and pseudo-terminals.
format : "framed" | "text", default "framed"
    ``framed``: the board describes itself (rate, channels, ADC bits,
    reference voltage, modulation frequency, LED bit); channels come out in
    volts (units ``"V"``) named ``adc0, adc1, ...`` plus ``led`` (0.0 / 1.0,
    the light source's state at each sample) when the board sends it.
    ``text``: one line per sample, numbers separated by commas; the sample
    rate is ``[source] rate_hz``; channels are ``in0, in1, ...``.
channels : int, default 1 (text only)
    Numbers on each text line.
full_scale : float, default 1.0 (text only)
    The printed value that means full scale; values are divided by it and
    reported in units ``"FS"`` (e.g. 1023 for a 10-bit ADC printed raw).
describe_timeout_s : float, default 3.0 (framed only)
    How long :meth:`SerialSource.open` waits for the self-description (the
    reference firmware repeats it every second).

Behaviour
---------
- Unplugging the board is not an error: :meth:`~SerialSource.status` says
  ``"waiting for the device"``, the port is reopened when it comes back, and
  the loss is marked in the ring (frames counted from the sequence counter
  when it agrees with the time elapsed, else 0 with a note).
- CRC errors, sequence gaps, garbage bytes and bad text lines are counted
  (:meth:`~SerialSource.status`, :meth:`~SerialSource.info`) and marked as gaps;
  the reader thread never splices the two sides of a loss together.
- pyserial is imported only when a port is probed or opened.
"""

from __future__ import annotations

import logging
import os
import threading
import time
from typing import Any

import numpy as np

from livefilt import fields
from livefilt.errors import SettingError, SourceError, SourceUnavailable
from livefilt.acquire.source import DeviceInfo, Source

from livefilt.drivers import wire

__all__ = ["SerialSource", "DEFAULT_BAUD"]

log = logging.getLogger(__name__)

#: The reference firmware's line speed (exact at 16 MHz).
DEFAULT_BAUD = 500_000
_FORMATS = ("framed", "text")
_READ_TIMEOUT_S = 0.05  # how long one read waits; bounds stop() latency
_RETRY_S = 0.2  # how often a lost device is looked for
_NO_PYSERIAL = "pyserial not installed: pip install pyserial"


class SerialSource(Source):
    """A microcontroller streaming over a serial port (see the module docstring).

    Build it with :meth:`from_settings`; ``open`` learns the layout from a
    framed board's self-description.
    """

    driver = "serial"
    options = {
        "port": "device path (/dev/ttyACM0, COM3) or pyserial URL (socket://host:port); required",
        "baud": f"line speed in bit/s, default {DEFAULT_BAUD} (the reference firmware's)",
        "format": '"framed" (the board describes itself; default) or "text" (one line per sample)',
        "channels": "text only: numbers per line, default 1",
        "full_scale": "text only: printed value meaning full scale (values / full_scale, units FS), default 1.0",
        "describe_timeout_s": "framed only: seconds open() waits for the self-description, default 3.0",
    }

    def __init__(self, port: str, baud: int = DEFAULT_BAUD, format: str = "framed",
                 channels: int = 1, full_scale: float = 1.0,
                 describe_timeout_s: float = 3.0, rate_hz: float = 0.0):
        self.port = port
        self.baud = baud
        self.format = format
        self.full_scale = full_scale
        self.describe_timeout_s = describe_timeout_s
        self.rate_hz = float(rate_hz)
        self.channels = channels
        self.channel_names = [f"in{i}" for i in range(channels)]
        self.units = "FS"
        self.device = f"{format} serial on {port}"
        self.realtime = True
        self.reference_hint = None
        self.description: wire.Description | None = None
        self._port = None
        self._parser: wire.FrameParser | None = None
        self._text: wire.TextParser | None = None
        self._thread: threading.Thread | None = None
        self._stop = threading.Event()
        self._state = "closed"
        self._written = 0
        self._reconnects = 0
        self._reconnect_lost = 0
        self._lost_at: tuple[float, int | None] | None = None  # (time, last seq) of a loss
        self._last_data = 0.0
        self._first_seq: int | None = None
        self._last_problem = ""
        self._refusing = False

    # -- construction --------------------------------------------------
    @classmethod
    def from_settings(cls, options: dict[str, Any], rate_hz: float, block: int) -> "SerialSource":
        """Validate the ``[source]`` options (fields relative to ``source``)."""
        cls.check_unknown(options, cls.options)
        port = options.get("port")
        if not isinstance(port, str) or not port.strip():
            raise SettingError("port", port, "required: a device path (/dev/ttyACM0, COM3) "
                                             "or a pyserial URL (socket://host:port)")
        baud = fields.integer(options.get("baud", DEFAULT_BAUD), "baud", 1, None,
                              f"must be a whole number of bit/s above 0, e.g. {DEFAULT_BAUD}")
        fmt = fields.choice(options.get("format", "framed"), "format", _FORMATS)
        text_only = [k for k in ("channels", "full_scale") if k in options]
        if fmt == "framed" and text_only:
            raise SettingError(text_only[0], options[text_only[0]],
                               'only for format = "text"; a framed board describes itself')
        if fmt == "text" and "describe_timeout_s" in options:
            raise SettingError("describe_timeout_s", options["describe_timeout_s"],
                               'only for format = "framed"')
        channels = fields.integer(options.get("channels", 1), "channels", 1, 64)
        full_scale = fields.positive(options.get("full_scale", 1.0), "full_scale")
        timeout = fields.positive(options.get("describe_timeout_s", 3.0), "describe_timeout_s")
        if fmt == "text" and not (isinstance(rate_hz, (int, float)) and rate_hz > 0):
            raise SettingError("rate_hz", rate_hz,
                               'format = "text" needs the board\'s sample rate in Hz, above 0')
        src = cls(port.strip(), baud, fmt, channels, float(full_scale), float(timeout),
                   rate_hz if fmt == "text" else 0.0)
        src.resolved = {"port": port.strip(), "baud": baud, "format": fmt}
        src.resolved.update({"channels": channels, "full_scale": float(full_scale)} if fmt == "text"
                            else {"describe_timeout_s": float(timeout)})
        return src

    @classmethod
    def probe(cls) -> list[DeviceInfo]:
        """Serial ports present now, with their descriptions."""
        try:
            from serial.tools import list_ports
        except ImportError as exc:
            raise SourceUnavailable(_NO_PYSERIAL) from exc
        return [DeviceInfo(name=p.device, description=p.description, hwid=p.hwid)
                for p in sorted(list_ports.comports(), key=lambda p: p.device)]

    # -- running -------------------------------------------------------
    def open(self) -> None:
        """Open the port; for ``framed``, wait for the board's self-description."""
        self._port = self._connect()
        if self.format == "text":
            self._text = wire.TextParser(self.channels)
            self._state = "streaming"
            return
        self._parser = wire.FrameParser()
        try:
            desc = self._await_description()
        except BaseException:
            self._close_port()
            raise
        self.description = desc
        self.rate_hz = desc.rate_hz
        self.channel_names = [f"adc{i}" for i in range(desc.channels)]
        if desc.led_channel is not None:
            self.channel_names.append("led")
        self.channels = len(self.channel_names)
        self.units = "V"
        self.resolution_bits = desc.adc_bits
        self.device = (f"{desc.name or 'board'} on {self.port}: {desc.channels} x "
                       f"{desc.adc_bits}-bit at {desc.rate_hz:g} Hz, reference {desc.vref_v:g} V")
        self.reference_hint = ({"frequency_hz": desc.modulation_hz}
                               if desc.modulation_hz > 0 else None)
        self._state = "streaming"

    def start(self, ring) -> None:
        """Start the reader thread writing into ``ring``."""
        if self._port is None:
            raise SourceError(f"serial port {self.port!r}: start() before open()")
        if self._parser is not None:
            self._parser.forget_sequence()  # the ring starts here: no gap before it
        self._stop.clear()
        self._thread = threading.Thread(target=self._run, args=(ring,),
                                        name=f"serial {self.port}", daemon=True)
        self._thread.start()

    def stop(self) -> None:
        """Stop the reader and close the port; safe to call twice."""
        self._stop.set()
        if self._thread is not None and self._thread is not threading.current_thread():
            self._thread.join()
        self._thread = None
        self._close_port()
        self._state = "stopped"

    def status(self) -> dict[str, Any]:
        """Live counters: state, frames written, errors and gaps."""
        p, t = self._parser, self._text
        return {
            "state": self._state,
            "frames": self._written,
            "crc_errors": p.crc_errors if p else 0,
            "seq_gaps": p.seq_gaps if p else 0,
            "lost_frames": (p.lost_frames if p else 0) + self._reconnect_lost,
            "skipped_bytes": (p or t).skipped_bytes if (p or t) else 0,
            "garbage_bytes": p.garbage_bytes if p else 0,
            "text_bad_lines": t.bad_lines if t else 0,
            "reconnects": self._reconnects,
            "first_seq": self._first_seq,
            "last_seq": p.last_seq if p else None,
            "last_problem": self._last_problem,
        }

    def clip_levels(self):
        """Framed: a unipolar ADC, at full scale on code 0 or the top code
        ``(2**bits - 1) / 2**bits * vref`` (to_frames' transfer); the LED column
        never clips.  Text: +-full scale."""
        d = getattr(self, "description", None)
        if self.format != "framed" or d is None:
            return super().clip_levels()
        lo = np.zeros(self.channels)
        hi = np.full(self.channels, d.vref_v * ((1 << d.adc_bits) - 1) / (1 << d.adc_bits))
        if d.led_channel is not None:
            lo[-1], hi[-1] = -np.inf, np.inf
        return lo, hi

    def info(self) -> dict[str, Any]:
        """run.toml facts: the base facts, port settings, the board's description
        and the counters of :meth:`status`."""
        out = super().info()
        out.update(port=self.port, baud=self.baud, format=self.format)
        d = self.description
        if d is not None:
            out.update(board=d.name, adc_bits=d.adc_bits, vref_v=d.vref_v,
                       block=d.block, modulation_hz=d.modulation_hz, led_pin=d.led_pin)
        out.update({k: v for k, v in self.status().items() if v is not None})
        return out

    # -- private: port handling ----------------------------------------
    def _connect(self):
        serial = _pyserial()
        try:
            return serial.serial_for_url(self.port, baudrate=self.baud, timeout=_READ_TIMEOUT_S)
        except (serial.SerialException, OSError, ValueError) as exc:
            raise SourceError(f"serial port {self.port!r}: cannot open: {exc}") from exc

    def _close_port(self) -> None:
        port, self._port = self._port, None
        if port is not None:
            try:
                port.close()
            except Exception:  # a vanished device may fail to close; nothing to save
                pass

    def _await_description(self) -> wire.Description:
        serial = _pyserial()
        head = bytearray()
        deadline = time.monotonic() + self.describe_timeout_s
        while time.monotonic() < deadline:
            try:
                data = self._port.read(max(1, self._port.in_waiting))
            except (serial.SerialException, OSError) as exc:
                raise SourceError(f"serial port {self.port!r}: read failed while waiting "
                                  f"for the self-description: {exc}") from exc
            if len(head) < 24:
                head += data[:24 - len(head)]
            for ev in self._parser.feed(data):
                if isinstance(ev, wire.Described):
                    return ev.description
        p = self._parser
        seen = (f"received {p.offset} bytes" + (f", starting {head.hex(' ')}" if head else "")
                + f"; {p.undescribed} sample frame(s), {p.crc_errors} CRC error(s)")
        if head and all(32 <= b < 127 or b in (9, 10, 13) for b in head):
            seen += '; this looks like text: try format = "text"'
        raise SourceError(f"serial port {self.port!r}: no self-description within "
                          f"{self.describe_timeout_s:g} s ({seen})")

    # -- private: the reader thread ------------------------------------
    def _run(self, ring) -> None:
        serial = _pyserial()
        try:
            while not self._stop.is_set():
                port = self._port
                if port is None:
                    self._reconnect()
                    continue
                try:
                    data = port.read(max(1, port.in_waiting))
                except (serial.SerialException, OSError) as exc:
                    self._device_lost(exc)
                    continue
                if data:
                    if self._text is not None:
                        self._consume_text(data, ring)
                    else:
                        self._consume_framed(data, ring)
        except Exception as exc:  # keep the reason visible instead of a silent thread death
            log.exception("serial reader on %s failed", self.port)
            self._state = f"failed: {exc}"

    def _device_lost(self, exc: Exception) -> None:
        log.info("serial port %s lost (%s); waiting for the device", self.port, exc)
        self._close_port()
        last = self._parser.last_seq if self._parser else None
        if self._lost_at is None:
            self._lost_at = (self._last_data or time.monotonic(), last)
        self._state = "waiting for the device"

    def _reconnect(self) -> None:
        if self._stop.wait(_RETRY_S):
            return
        if "://" not in self.port and not os.path.exists(self.port):
            return
        try:
            self._port = self._connect()
        except SourceError:
            return
        log.info("serial port %s is back", self.port)
        self._reconnects += 1
        for parser in (self._parser, self._text):
            if parser is not None:
                parser.resync()
        self._state = "streaming"

    def _reconnect_gap(self, seq: int | None) -> tuple[int, str]:
        """Frames lost while the device was away, and a note; clears the pending loss."""
        (t_lost, last_seq), self._lost_at = self._lost_at, None
        elapsed = time.monotonic() - t_lost
        head = f"device away for {elapsed:.1f} s"
        if seq is None or last_seq is None or self.description is None:
            return 0, f"{head}; frames lost unknown (no sequence counter)"
        per_s = self.description.rate_hz / self.description.block
        # tolerance: half the time away, at least half a second (buffers, polling)
        blocks = _blocks_between(last_seq, seq, elapsed * per_s,
                                 tolerance=max(0.5 * elapsed * per_s, 0.5 * per_s))
        if blocks is None:
            return 0, (f"{head}; sequence {last_seq} -> {seq} does not fit the time "
                       f"(board restarted?); frames lost unknown")
        return (blocks * self.description.block,
                f"{head}; {blocks} sample frame(s) lost by the sequence counter")

    def _consume_framed(self, data: bytes, ring) -> None:
        desc = self.description
        pending: list = []
        for ev in self._parser.feed(data):
            kind = type(ev)
            if kind is wire.Samples:
                if self._refusing:
                    continue
                if self._lost_at is not None:
                    self._flush(pending, ring)
                    lost, note = self._reconnect_gap(ev.seq)
                    self._reconnect_lost += lost
                    ring.mark_gap(lost, note=note)
                if self._first_seq is None:
                    self._first_seq = ev.seq
                pending.append(ev.words)
            elif kind is wire.Gap:
                self._flush(pending, ring)
                if not self._refusing:
                    ring.mark_gap((ev.lost_blocks or 0) * desc.block, note=ev.note)
            elif kind is wire.Described:
                same = _same_layout(ev.description, desc)
                if same == self._refusing:
                    # a board that changes its layout mid-run cannot feed the same
                    # ring: drop its frames until it is back to the layout opened with
                    self._flush(pending, ring)
                    self._refusing = not same
                    if self._refusing:
                        self._last_problem = (
                            f"the board now describes itself differently "
                            f"({ev.description.channels} channel(s) at "
                            f"{ev.description.rate_hz:g} Hz); stop and open the source again")
                        ring.mark_gap(0, note=self._last_problem)
            elif kind is wire.CrcError:
                self._last_problem = f"CRC error in the frame at byte {ev.offset}"
            elif kind is wire.Garbage:
                self._last_problem = f"{ev.length} stray byte(s) at byte {ev.offset}"
            elif kind is wire.Unsupported:
                self._last_problem = f"frame at byte {ev.offset} not used: {ev.reason}"
        self._flush(pending, ring)
        self._last_data = time.monotonic()

    def _flush(self, pending: list, ring) -> None:
        if not pending:
            return
        words = pending[0] if len(pending) == 1 else np.concatenate(pending)
        pending.clear()
        ring.write(wire.to_frames(self.description, words))
        self._written += words.shape[0]

    def _consume_text(self, data: bytes, ring) -> None:
        for ev in self._text.feed(data):
            kind = type(ev)
            if self._lost_at is not None and kind is not wire.Skipped:
                lost, note = self._reconnect_gap(None)
                ring.mark_gap(lost, note=note)
            if kind is wire.Rows:
                values = ev.values / self.full_scale
                ring.write(values.astype(np.float32))
                self._written += values.shape[0]
            elif kind is wire.BadLine:
                self._last_problem = f"text line {ev.line} at byte {ev.offset}: {ev.reason}"
                ring.mark_gap(1, note=self._last_problem)
        self._last_data = time.monotonic()


def _same_layout(a: wire.Description, b: wire.Description | None) -> bool:
    return b is not None and all(getattr(a, f) == getattr(b, f) for f in (
        "channels", "block", "adc_bits", "vref_v", "rate_hz", "led_channel", "led_bit"))


def _blocks_between(last_seq: int, seq: int, expected: float, tolerance: float) -> int | None:
    """Frames missing between ``last_seq`` and ``seq`` on a wrapping 16-bit
    counter, taking the wrap count that best fits ``expected`` frames (from the
    time elapsed); None when no count is within ``tolerance`` of it."""
    base = (seq - last_seq - 1) % wire.SEQ_MODULO
    wraps = max(0, round((expected - base) / wire.SEQ_MODULO))
    blocks = base + wraps * wire.SEQ_MODULO
    return blocks if abs(blocks - expected) <= tolerance else None


def _pyserial():
    try:
        import serial
    except ImportError as exc:
        raise SourceUnavailable(_NO_PYSERIAL) from exc
    return serial

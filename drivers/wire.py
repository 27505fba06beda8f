"""The serial wire protocol: a pure parser and frame builder (bytes in, events out).

No I/O, no threads, no livefilt imports: everything here can be fed any bytes
(fuzzed) and never raises on them.  The byte layout is documented in
``drivers/firmware/PROTOCOL.md``; this module is its executable form.

API map
-------
Framed format
    :class:`Description`                  the self-description a board sends
    :func:`build_frame`, :func:`build_samples`, :func:`build_description`
    :class:`FrameParser`                  ``feed(bytes) -> list of events``
    events: :class:`Samples`, :class:`Described`, :class:`Gap`,
    :class:`Garbage`, :class:`Skipped`, :class:`CrcError`, :class:`Unsupported`
    :func:`to_frames`                     raw words -> float32 volts (+ LED channel)
    :func:`crc16`                         CRC-16/CCITT-FALSE
Text format
    :class:`TextParser`                   ``feed(bytes) -> list of events``
    events: :class:`Rows`, :class:`BadLine`, :class:`Skipped`

Counting rules (what the driver reports)
----------------------------------------
- Bytes discarded before the first valid frame (or first line end, in text)
  are *skipped*: opening a port mid-frame is normal, not an error.
- After that, bytes outside any frame are *garbage*, reported with their
  stream offset.
- A candidate frame (sync word found, length known) whose CRC fails is one
  *CRC error*; candidates that start inside a region already found bad are
  not counted again.  Bytes of a bad region are neither garbage nor skipped.
- A sample frame whose sequence number is not the expected one is one
  *sequence gap*: a :class:`Gap` event comes before its :class:`Samples`, so
  the two sides of a loss are never spliced together.
"""

from __future__ import annotations

import binascii
import struct
from dataclasses import dataclass

import numpy as np

__all__ = [
    "SYNC", "MAJOR", "KIND_SAMPLES", "KIND_DESCRIPTION", "HEADER_BYTES", "CRC_BYTES",
    "MAX_PAYLOAD", "SEQ_MODULO",
    "crc16", "build_frame", "build_samples", "build_description",
    "Description", "FrameParser", "TextParser", "to_frames",
    "Samples", "Described", "Gap", "Garbage", "Skipped", "CrcError", "Unsupported",
    "Rows", "BadLine",
]

#: Two bytes that open every frame.  0xE7 never starts a text line of digits.
SYNC = b"\xE7\x1A"
#: Protocol major version, carried in the high nibble of every frame's kind byte.
MAJOR = 1
#: Frame types (low nibble of the kind byte).
KIND_SAMPLES = 0x1
KIND_DESCRIPTION = 0x2
#: sync (2) + kind (1) + length (1) + sequence (2)
HEADER_BYTES = 6
CRC_BYTES = 2
MAX_PAYLOAD = 255
SEQ_MODULO = 1 << 16
#: A forward jump of at least this many frames is read as a restart, not a loss.
_RESTART_JUMP = SEQ_MODULO // 2
_HEADER = struct.Struct("<2sBBH")
_DESCRIPTION = struct.Struct("<BBBBIIHBBBBB")  # see PROTOCOL.md, "Self-description"
_NO_LED = 0xFF


def crc16(data: bytes) -> int:
    """CRC-16/CCITT-FALSE of ``data``.

    Catalogue parameters: width 16, poly 0x1021, init 0xFFFF, not reflected,
    xorout 0x0000, check value 0x29B1 for ``b"123456789"`` (Greg Cook,
    *Catalogue of parametrised CRC algorithms*, entry CRC-16/IBM-3740, alias
    CRC-16/CCITT-FALSE).  ``binascii.crc_hqx`` implements exactly this.
    """
    return binascii.crc_hqx(data, 0xFFFF)


def build_frame(kind: int, seq: int, payload: bytes, major: int = MAJOR) -> bytes:
    """One frame: sync, kind, length, sequence, payload, CRC (big-endian)."""
    if len(payload) > MAX_PAYLOAD:
        raise ValueError(f"payload of {len(payload)} bytes; at most {MAX_PAYLOAD}")
    body = _HEADER.pack(SYNC, (major << 4) | kind, len(payload), seq % SEQ_MODULO) + payload
    return body + crc16(body[2:]).to_bytes(2, "big")


def build_samples(seq: int, words) -> bytes:
    """A sample frame from raw words, shape (block, channels), uint16."""
    data = np.ascontiguousarray(words, dtype="<u2")
    return build_frame(KIND_SAMPLES, seq, data.tobytes())


@dataclass(frozen=True)
class Description:
    """What a board says about itself (PROTOCOL.md, "Self-description").

    Attributes
    ----------
    rate_hz : float
        Sample rate per channel, Hz.
    channels : int
        ADC channels per sample (1..16).
    block : int
        Samples per channel in one sample frame.
    adc_bits : int
        ADC resolution; the value sits in the low ``adc_bits`` of each word.
    vref_v : float
        ADC reference voltage, V (code 2**adc_bits would equal vref_v).
    modulation_hz : float
        Frequency the light source is switched at, Hz (0: not switched).
    led_channel : int or None
        Index of the channel whose word carries the LED state bit.
    led_bit : int
        Bit number (adc_bits..15) of that word holding the LED state.
    led_pin : str
        The microcontroller pin driving the LED, e.g. ``"PB5"`` (for people).
    name : str
        Board and firmware name.
    version : int
        Description layout version (1).
    """

    rate_hz: float
    channels: int = 1
    block: int = 16
    adc_bits: int = 10
    vref_v: float = 5.0
    modulation_hz: float = 0.0
    led_channel: int | None = 0
    led_bit: int = 15
    led_pin: str = "PB5"
    name: str = ""
    version: int = 1

    def problem(self) -> str:
        """Empty when usable, else why not (one line)."""
        if not 1 <= self.channels <= 16:
            return f"channels = {self.channels}: must be 1..16"
        if self.block < 1 or 2 * self.block * self.channels > MAX_PAYLOAD:
            return (f"block = {self.block} with {self.channels} channel(s): "
                    f"a sample frame must fit {MAX_PAYLOAD} bytes")
        if not 1 <= self.adc_bits <= 16:
            return f"adc_bits = {self.adc_bits}: must be 1..16"
        if not self.rate_hz > 0 or not self.vref_v > 0:
            return f"rate {self.rate_hz} Hz, reference {self.vref_v} V: both must be > 0"
        if self.led_channel is not None:
            if self.led_channel >= self.channels:
                return f"led_channel = {self.led_channel}: only {self.channels} channel(s)"
            if not self.adc_bits <= self.led_bit <= 15:
                return f"led_bit = {self.led_bit}: must be {self.adc_bits}..15 (above the ADC bits)"
        return ""

    def payload(self) -> bytes:
        """The description frame's payload bytes."""
        port, pin = (self.led_pin[1:2] or "?", self.led_pin[2:]) if self.led_pin else ("?", "")
        name = self.name.encode("ascii", "replace")[:MAX_PAYLOAD - _DESCRIPTION.size]
        return _DESCRIPTION.pack(
            self.version, self.channels, self.block, self.adc_bits,
            round(self.rate_hz * 1000), round(self.modulation_hz * 1000),
            round(self.vref_v * 1000),
            _NO_LED if self.led_channel is None else self.led_channel, self.led_bit,
            ord(port), int(pin) if pin.isdigit() else 0xFF, len(name)) + name

    @classmethod
    def from_payload(cls, payload: bytes) -> "Description":
        """Decode a description payload; ValueError names what is wrong."""
        if len(payload) < _DESCRIPTION.size:
            raise ValueError(f"description payload of {len(payload)} bytes; "
                             f"version 1 needs at least {_DESCRIPTION.size}")
        (version, channels, block, bits, rate_mhz, mod_mhz, vref_mv, led_ch, led_bit,
         port, pin, name_len) = _DESCRIPTION.unpack_from(payload)
        name = payload[_DESCRIPTION.size:_DESCRIPTION.size + name_len]
        desc = cls(rate_hz=rate_mhz / 1000.0, channels=channels, block=block,
                   adc_bits=bits, vref_v=vref_mv / 1000.0, modulation_hz=mod_mhz / 1000.0,
                   led_channel=None if led_ch == _NO_LED else led_ch, led_bit=led_bit,
                   led_pin=f"P{chr(port)}{pin}" if 0x41 <= port <= 0x5A else "",
                   name=name.decode("ascii", "replace"), version=version)
        why = desc.problem()
        if why:
            raise ValueError(why)
        return desc


def build_description(desc: Description, seq: int = 0) -> bytes:
    """A description frame; ``seq`` is the number the next sample frame will carry."""
    return build_frame(KIND_DESCRIPTION, seq, desc.payload())


def to_frames(desc: Description, words: np.ndarray, out: np.ndarray | None = None) -> np.ndarray:
    """Raw words (n, channels) -> float32 (n, channels [+1]) in volts.

    The ADC value is the low ``adc_bits`` of each word, scaled by
    ``vref_v / 2**adc_bits`` (the usual ideal transfer of a unipolar ADC,
    common practice).  When the description names an LED bit, one more
    column holds the LED state as 0.0 / 1.0.
    """
    n, ch = words.shape
    cols = ch + (desc.led_channel is not None)
    if out is None:
        out = np.empty((n, cols), dtype=np.float32)
    mask = (1 << desc.adc_bits) - 1
    np.multiply(words & mask, desc.vref_v / (1 << desc.adc_bits), out=out[:, :ch],
                casting="unsafe")
    if desc.led_channel is not None:
        out[:, ch] = (words[:, desc.led_channel] >> desc.led_bit) & 1
    return out


# -- events --------------------------------------------------------------
@dataclass(frozen=True, slots=True)
class Samples:
    """A good sample frame: ``words`` shape (block, channels), uint16."""
    offset: int
    seq: int
    words: np.ndarray


@dataclass(frozen=True, slots=True)
class Described:
    """A good description frame (``seq``: number of the next sample frame)."""
    offset: int
    seq: int
    description: Description


@dataclass(frozen=True, slots=True)
class Gap:
    """Sample frames are missing before the next :class:`Samples`.

    ``lost_blocks`` is None when the count is unknown (the sequence jumped
    back: the board restarted); ``note`` says what happened.
    """
    offset: int
    lost_blocks: int | None
    note: str


@dataclass(frozen=True, slots=True)
class Garbage:
    """``length`` bytes outside any frame, starting at stream byte ``offset``."""
    offset: int
    length: int


@dataclass(frozen=True, slots=True)
class Skipped:
    """``length`` bytes dropped before the stream was in step (partial first frame)."""
    offset: int
    length: int


@dataclass(frozen=True, slots=True)
class CrcError:
    """A frame candidate at ``offset`` whose CRC did not match."""
    offset: int
    length: int


@dataclass(frozen=True, slots=True)
class Unsupported:
    """A frame with a good CRC that this parser cannot use; ``reason`` says why."""
    offset: int
    reason: str


@dataclass(frozen=True, slots=True)
class Rows:
    """Consecutive good text lines: ``values`` shape (n, channels), float64."""
    offset: int
    values: np.ndarray


@dataclass(frozen=True, slots=True)
class BadLine:
    """A text line that could not be read (``line`` counts from 1)."""
    offset: int
    line: int
    reason: str


# -- framed parser -------------------------------------------------------
class FrameParser:
    """Incremental parser of the framed format.

    Parameters
    ----------
    description : Description, optional
        Known layout (e.g. kept across a reconnection); otherwise sample frames
        are dropped (counted in ``undescribed``) until a description arrives.

    Attributes (counters, never reset)
    ----------------------------------
    frames, descriptions, crc_errors, seq_gaps, lost_blocks, garbage_bytes,
    skipped_bytes, undescribed, unsupported : int
    offset : int
        Stream bytes fed so far.
    """

    def __init__(self, description: Description | None = None):
        self.description = description
        self.frames = 0
        self.descriptions = 0
        self.crc_errors = 0
        self.seq_gaps = 0
        self.lost_blocks = 0
        self.garbage_bytes = 0
        self.skipped_bytes = 0
        self.undescribed = 0
        self.unsupported = 0
        self.offset = 0
        #: Sequence number of the last good sample frame (None before one).
        self.last_seq: int | None = None
        self._expect: int | None = None
        self._buf = bytearray()
        self._base = 0  # stream offset of _buf[0]
        self._synced = False
        self._bad_until = 0  # stream offset where the last bad region ends

    @property
    def lost_frames(self) -> int:
        """Samples per channel lost in counted sequence gaps."""
        return self.lost_blocks * (self.description.block if self.description else 0)

    def forget_sequence(self) -> None:
        """The next sample frame starts a new run: no gap is reported before it."""
        self._expect = None

    def resync(self) -> None:
        """A new byte stream begins (port reopened): drop buffered bytes, expect a
        partial first frame again, and forget the sequence."""
        self._base += len(self._buf)
        self._buf.clear()
        self._synced = False
        self._expect = None

    def feed(self, data: bytes) -> list:
        """Parse ``data`` (any bytes, any split); return the events, in stream order."""
        events: list = []
        self.offset += len(data)
        buf = self._buf
        buf += data
        i, n = 0, len(buf)
        while True:
            j = buf.find(SYNC, i)
            if j < 0:
                keep = 1 if n > i and buf[n - 1] == SYNC[0] else 0
                self._discard(i, n - keep, events)
                i = n - keep
                break
            self._discard(i, j, events)
            i = j
            if n - j < HEADER_BYTES:
                break
            length = buf[j + 3]
            end = j + HEADER_BYTES + length + CRC_BYTES
            if end > n:
                break
            got = (buf[end - 2] << 8) | buf[end - 1]
            if binascii.crc_hqx(memoryview(buf)[j + 2:end - 2], 0xFFFF) != got:
                start = self._base + j
                if self._synced and start >= self._bad_until:
                    self.crc_errors += 1
                    events.append(CrcError(start, end - j))
                    # only a counted bad frame covers its bytes: a false candidate
                    # inside it must not hide the bytes past its end from the count
                    self._bad_until = self._base + end
                # the sync word may have been a false one: look again one byte on
                self._discard(j, j + 1, events)
                i = j + 1
                continue
            self._synced = True
            self._frame(j, end, events)
            i = end
        del buf[:i]
        self._base += i
        return events

    # -- private -------------------------------------------------------
    def _discard(self, a: int, b: int, events: list) -> None:
        if b <= a:
            return
        start, stop = self._base + a, self._base + b
        if not self._synced:
            self.skipped_bytes += stop - start
            _extend(events, Skipped, start, stop - start)
            return
        start = max(start, self._bad_until)  # bytes of a bad frame are not garbage
        if stop > start:
            self.garbage_bytes += stop - start
            _extend(events, Garbage, start, stop - start)

    def _frame(self, j: int, end: int, events: list) -> None:
        buf, at = self._buf, self._base + j
        kind, length, seq = buf[j + 2], buf[j + 3], buf[j + 4] | (buf[j + 5] << 8)
        payload = bytes(buf[j + HEADER_BYTES:end - CRC_BYTES])
        if kind >> 4 != MAJOR:
            self.unsupported += 1
            events.append(Unsupported(at, f"protocol version {kind >> 4}; "
                                          f"this parser reads version {MAJOR}"))
            return
        if kind & 0xF == KIND_DESCRIPTION:
            try:
                desc = Description.from_payload(payload)
            except ValueError as exc:
                self.unsupported += 1
                events.append(Unsupported(at, f"bad self-description: {exc}"))
                return
            self.descriptions += 1
            self.description = desc
            events.append(Described(at, seq, desc))
            return
        if kind & 0xF != KIND_SAMPLES:
            self.unsupported += 1
            events.append(Unsupported(at, f"unknown frame type {kind & 0xF}"))
            return
        desc = self.description
        if desc is None:
            self.undescribed += 1
            return
        if length != 2 * desc.block * desc.channels:
            self.unsupported += 1
            events.append(Unsupported(
                at, f"sample frame of {length} bytes; the description says "
                    f"{desc.block} x {desc.channels} words = {2 * desc.block * desc.channels}"))
            return
        if self._expect is not None and seq != self._expect:
            jump = (seq - self._expect) % SEQ_MODULO
            self.seq_gaps += 1
            if jump < _RESTART_JUMP:
                self.lost_blocks += jump
                events.append(Gap(at, jump, f"sequence {self._expect} expected, {seq} came"))
            else:
                events.append(Gap(at, None, f"sequence went back from {self._expect} to "
                                            f"{seq} (board restarted?); frames lost unknown"))
        self._expect = (seq + 1) % SEQ_MODULO
        self.last_seq = seq
        self.frames += 1
        words = np.frombuffer(payload, dtype="<u2").reshape(desc.block, desc.channels)
        events.append(Samples(at, seq, words))


def _extend(events: list, cls, start: int, length: int) -> None:
    """Append a byte-run event, merging with the previous one when contiguous."""
    if events and type(events[-1]) is cls and events[-1].offset + events[-1].length == start:
        events[-1] = cls(events[-1].offset, events[-1].length + length)
    else:
        events.append(cls(start, length))


# -- text parser ---------------------------------------------------------
class TextParser:
    """Incremental parser of the text format: one line per sample, channels
    separated by commas, lines ended by LF (a CR before it is ignored).

    Parameters
    ----------
    channels : int
        Numbers expected on each line.
    max_line : int
        A line longer than this many bytes is bad (a binary stream, a lost LF).

    Attributes
    ----------
    lines, bad_lines, skipped_bytes, offset : int
        Good lines, bad lines, bytes dropped before the first line end, bytes fed.
    """

    def __init__(self, channels: int, max_line: int = 1024):
        self.channels = int(channels)
        self.max_line = int(max_line)
        self.lines = 0
        self.bad_lines = 0
        self.skipped_bytes = 0
        self.offset = 0
        self._line_no = 0
        self._buf = bytearray()
        self._base = 0
        self._synced = False
        self._too_long = False

    def resync(self) -> None:
        """A new byte stream begins: the first (partial) line will be skipped."""
        self._base += len(self._buf)
        self._buf.clear()
        self._synced = False
        self._too_long = False

    def feed(self, data: bytes) -> list:
        """Parse ``data``; return :class:`Rows`, :class:`BadLine` and
        :class:`Skipped` events in stream order."""
        events: list = []
        self.offset += len(data)
        buf = self._buf
        buf += data
        i = 0
        rows: list = []
        rows_at = 0
        while True:
            j = buf.find(b"\n", i)
            if j < 0:
                break
            at = self._base + i
            if not self._synced:
                self._synced = True
                if j > i:
                    self.skipped_bytes += j + 1 - i
                    events.append(Skipped(at, j + 1 - i))
                    i = j + 1
                    continue
            line = bytes(buf[i:j])
            i = j + 1
            self._line_no += 1
            if self._too_long:
                self._too_long = False
                values = f"longer than {self.max_line} bytes"
            elif not line.strip():
                self._line_no -= 1  # blank lines (e.g. CR LF CR LF) are not samples
                continue
            else:
                values = self._numbers(line)
            if isinstance(values, str):
                if rows:
                    events.append(Rows(rows_at, np.array(rows, dtype=np.float64)))
                    rows = []
                self.bad_lines += 1
                events.append(BadLine(at, self._line_no, values))
                continue
            if not rows:
                rows_at = at
            rows.append(values)
            self.lines += 1
        if rows:
            events.append(Rows(rows_at, np.array(rows, dtype=np.float64)))
        if len(buf) - i > self.max_line:  # no line end in sight: drop the bytes
            if self._synced:
                self._too_long = True
            else:
                self.skipped_bytes += len(buf) - i
                events.append(Skipped(self._base + i, len(buf) - i))
            i = len(buf)
        del buf[:i]
        self._base += i
        return events

    def _numbers(self, line: bytes) -> list | str:
        parts = line.split(b",")
        if len(parts) != self.channels:
            return f"{len(parts)} value(s); expected {self.channels} separated by commas"
        try:
            values = [float(p) for p in parts]
        except ValueError:
            shown = line.decode("ascii", "replace").strip()
            return f"not a number in {shown[:40]!r}"
        if not all(np.isfinite(values)):
            return "a value is not finite"
        return values

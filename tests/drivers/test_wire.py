"""The pure wire parser: round trips, fuzzing with exact fault counts, text lines.

Checks against outside sources: the CRC's catalogue check value (Greg Cook's
CRC catalogue, CRC-16/IBM-3740 a.k.a. CCITT-FALSE: 0x29B1 for "123456789");
the ADC transfer code * vref / 2**bits (common practice, e.g. the ATmega328P
datasheet's ADC section).
"""

import pathlib
import re

import numpy as np
import pytest
from hypothesis import HealthCheck, assume, given, settings
from hypothesis import strategies as st

from livefilt.drivers import wire

DESC = wire.Description(rate_hz=2000.0, channels=2, block=4, adc_bits=12, vref_v=3.3,
                        modulation_hz=125.0, led_channel=1, led_bit=15, led_pin="PD6",
                        name="fuzz board")
#: Bytes for garbage and partial first frames: neither sync byte, so they can
#: never form a false sync word with their neighbours, and counts stay exact.
STRAY = bytes(b for b in range(256) if b not in wire.SYNC)
FUZZ = settings(max_examples=150, deadline=None,
                suppress_health_check=[HealthCheck.filter_too_much, HealthCheck.too_slow])


def words_for(seq):
    rng = np.random.default_rng(seq)
    w = rng.integers(0, 1 << DESC.adc_bits, size=(DESC.block, DESC.channels), dtype=np.uint16)
    w[:, DESC.led_channel] |= np.uint16((seq % 2) << DESC.led_bit)
    return w


def feed_split(parser, data, cuts):
    """Feed ``data`` cut at the given positions; return all events."""
    events, last = [], 0
    for cut in sorted(set(cuts)) + [len(data)]:
        events += parser.feed(data[last:cut])
        last = cut
    return events


def test_crc_catalogue_check_value():
    assert wire.crc16(b"123456789") == 0x29B1
    frame = wire.build_samples(7, words_for(7))
    # non-reflected, xorout 0, CRC sent MSB first: the CRC over the covered bytes
    # and the CRC itself is zero (a property of such CRCs, common practice)
    assert wire.crc16(frame[2:]) == 0


def test_round_trip_description_and_samples():
    data = wire.build_description(DESC, 65534)
    data += b"".join(wire.build_samples(s % 65536, words_for(s)) for s in (65534, 65535, 65536))
    parser = wire.FrameParser()
    events = parser.feed(data)
    assert isinstance(events[0], wire.Described) and events[0].description == DESC
    assert [e.seq for e in events[1:]] == [65534, 65535, 0]  # the counter wraps: no gap
    for e, s in zip(events[1:], (65534, 65535, 65536)):
        np.testing.assert_array_equal(e.words, words_for(s))
    assert (parser.frames, parser.seq_gaps, parser.crc_errors, parser.skipped_bytes) == (3, 0, 0, 0)
    assert parser.offset == len(data)


def test_protocol_example_is_what_the_builder_makes():
    doc = (pathlib.Path(wire.__file__).parent / "firmware" / "PROTOCOL.md").read_text()
    line = re.search(r"^ {4}(E7 1A .*)$", doc, re.M).group(1)
    frame = bytes.fromhex(line.replace(" ", ""))
    assert frame == wire.build_frame(wire.KIND_SAMPLES, 3, bytes.fromhex("0082FF01"))
    desc = wire.Description(rate_hz=1000.0, block=2)
    (event,) = wire.FrameParser(desc).feed(frame)
    np.testing.assert_array_equal(wire.to_frames(desc, event.words)[:, 1], [1.0, 0.0])
    assert list(event.words[:, 0] & 0x3FF) == [512, 511]


def test_to_frames_scales_to_volts_and_extracts_the_led():
    w = np.array([[0, 1 << 15], [2048, 4095]], dtype=np.uint16)
    out = wire.to_frames(DESC, w)
    np.testing.assert_allclose(out[:, :2], [[0.0, 0.0], [1.65, 4095 * 3.3 / 4096]], rtol=1e-6)
    np.testing.assert_array_equal(out[:, 2], [1.0, 0.0])
    assert out.dtype == np.float32


@pytest.mark.parametrize("change, words", [
    ({"channels": 0}, "channels"), ({"led_channel": 2}, "led_channel"),
    ({"led_bit": 3}, "led_bit"), ({"block": 100}, "block"), ({"rate_hz": 0.0}, "rate"),
])
def test_bad_descriptions_are_refused_with_the_field(change, words):
    fields = {**DESC.__dict__, **change}
    payload = wire.Description(**fields).payload()
    with pytest.raises(ValueError, match=words):
        wire.Description.from_payload(payload)
    parser = wire.FrameParser()
    (event,) = parser.feed(wire.build_frame(wire.KIND_DESCRIPTION, 0, payload))
    assert isinstance(event, wire.Unsupported) and parser.unsupported == 1


def test_other_major_version_is_skipped_not_misread():
    parser = wire.FrameParser(DESC)
    frame = wire.build_frame(wire.KIND_SAMPLES, 1, words_for(1).tobytes(), major=2)
    events = parser.feed(frame + wire.build_samples(2, words_for(2)))
    assert isinstance(events[0], wire.Unsupported) and "version 2" in events[0].reason
    assert parser.frames == 1 and parser.crc_errors == 0


def test_partial_first_frame_is_skipped_not_an_error():
    frame = wire.build_samples(5, words_for(5))
    parser = wire.FrameParser(DESC)
    events = parser.feed(frame[9:] + frame + b"\x00\x01" + frame)
    assert parser.skipped_bytes == len(frame) - 9 and parser.crc_errors == 0
    assert events[0] == wire.Skipped(0, len(frame) - 9)
    # after the stream is in step, stray bytes are garbage, with their offset
    assert wire.Garbage(2 * len(frame) - 9, 2) in events
    assert parser.garbage_bytes == 2 and parser.seq_gaps == 1  # 5 followed by 5


def test_samples_before_any_description_are_counted_not_guessed():
    parser = wire.FrameParser()
    assert parser.feed(wire.build_samples(0, words_for(0))) == []
    assert parser.undescribed == 1


fates = st.sampled_from(["ok"] * 6 + ["drop", "corrupt"])


@FUZZ
@given(seq0=st.integers(0, 65535),
       plan=st.lists(st.tuples(fates, st.binary(max_size=6)), min_size=1, max_size=40),
       partial=st.binary(max_size=30), cuts=st.lists(st.integers(0, 2000), max_size=30),
       flip=st.integers(0, 10_000))
def test_fuzz_counts_equal_what_was_injected(seq0, plan, partial, cuts, flip):
    partial = bytes(STRAY[b % len(STRAY)] for b in partial)
    head = wire.build_description(DESC, seq0)
    stream = bytearray(partial + head)
    originals, injected_garbage = {}, 0
    for i, (fate, junk) in enumerate(plan):
        seq = (seq0 + i) % wire.SEQ_MODULO
        frame = bytearray(wire.build_samples(seq, words_for(seq)))
        # a sync word inside a frame could start a false candidate in a bad region
        assume(wire.SYNC not in frame[2:])
        originals[seq] = words_for(seq)
        if fate == "corrupt":  # a payload or CRC byte; the sync and length stay
            k = wire.HEADER_BYTES + flip % (len(frame) - wire.HEADER_BYTES)
            frame[k] ^= 1 << (flip % 8)
        if fate != "drop":
            stream += frame
        junk = bytes(STRAY[b % len(STRAY)] for b in junk)
        stream += junk
        injected_garbage += len(junk)
    assume(wire.SYNC not in head[2:])

    parser = wire.FrameParser()
    events = feed_split(parser, bytes(stream), cuts)

    good = [i for i, (fate, _) in enumerate(plan) if fate == "ok"]
    runs = [b - a - 1 for a, b in zip(good, good[1:]) if b - a > 1]
    assert parser.crc_errors == sum(f == "corrupt" for f, _ in plan)
    assert parser.seq_gaps == len(runs) and parser.lost_blocks == sum(runs)
    assert parser.garbage_bytes == injected_garbage
    assert parser.skipped_bytes == len(partial)
    assert parser.frames == len(good)
    assert sum(e.length for e in events if isinstance(e, wire.Garbage)) == injected_garbage
    _assert_never_spliced(events, originals)


@FUZZ
@given(n=st.integers(1, 30), noise=st.lists(st.tuples(st.integers(0, 10_000), st.integers(0, 255)),
                                             max_size=20),
       inserts=st.lists(st.tuples(st.integers(0, 10_000), st.binary(min_size=1, max_size=8)),
                        max_size=5),
       cuts=st.lists(st.integers(0, 2000), max_size=30))
def test_fuzz_any_damage_never_raises_nor_invents_samples(n, noise, inserts, cuts):
    stream = bytearray(wire.build_description(DESC, 100))
    originals = {}
    for seq in range(100, 100 + n):
        stream += wire.build_samples(seq, words_for(seq))
        originals[seq] = words_for(seq)
    for pos, value in noise:  # anywhere, sync and length bytes included
        stream[pos % len(stream)] = value
    for pos, data in inserts:
        pos %= len(stream) + 1
        stream[pos:pos] = data
    parser = wire.FrameParser(DESC)
    events = feed_split(parser, bytes(stream), cuts)
    _assert_never_spliced(events, originals)
    assert parser.garbage_bytes + parser.skipped_bytes <= parser.offset == len(stream)


@FUZZ
@given(data=st.binary(max_size=3000), cuts=st.lists(st.integers(0, 3000), max_size=40))
def test_fuzz_random_bytes_never_raise(data, cuts):
    parser = wire.FrameParser()
    feed_split(parser, data, cuts)
    text = wire.TextParser(3, max_line=64)
    feed_split(text, data, cuts)
    assert text.skipped_bytes <= len(data)


@FUZZ
@given(plan=st.lists(st.one_of(
           st.tuples(st.just("ok"), st.lists(st.integers(-10**6, 10**6), min_size=2, max_size=2)),
           st.tuples(st.just("bad"), st.sampled_from([b"x,1", b"1", b"1,2,3", b"nan,1", b"1,,2"]))),
       min_size=1, max_size=60),
       cuts=st.lists(st.integers(0, 2000), max_size=30), crlf=st.booleans())
def test_fuzz_text_lines_round_trip_and_bad_lines_are_counted(plan, cuts, crlf):
    end = b"\r\n" if crlf else b"\n"
    stream = b"partial line" + end
    for kind, item in plan:
        stream += (b",".join(str(v).encode() for v in item) if kind == "ok" else item) + end
    parser = wire.TextParser(2)
    events = feed_split(parser, stream, cuts)
    rows = [e.values for e in events if isinstance(e, wire.Rows)]
    got = np.concatenate(rows) if rows else np.empty((0, 2))
    want = np.array([item for kind, item in plan if kind == "ok"], dtype=float).reshape(-1, 2)
    np.testing.assert_array_equal(got, want)
    bad = [i + 1 for i, (kind, _) in enumerate(plan) if kind == "bad"]
    assert [e.line for e in events if isinstance(e, wire.BadLine)] == bad
    assert parser.bad_lines == len(bad) and parser.skipped_bytes == len(b"partial line" + end)
    # the order of good and bad lines survives (a bad line is a one-frame gap)
    order = [("bad" if isinstance(e, wire.BadLine) else "ok", 1 if isinstance(e, wire.BadLine)
              else len(e.values)) for e in events if not isinstance(e, wire.Skipped)]
    flat = [k for k, count in order for _ in range(count)]
    assert flat == [kind for kind, _ in plan]


def test_text_bad_line_names_line_and_offset():
    parser = wire.TextParser(2)
    events = parser.feed(b"junk\n1,2\n3;4\n5,6\n")
    (bad,) = [e for e in events if isinstance(e, wire.BadLine)]
    assert (bad.line, bad.offset) == (2, 9) and "expected 2" in bad.reason


def test_overlong_text_line_is_one_bad_line():
    parser = wire.TextParser(1, max_line=16)
    events = parser.feed(b"\n" + b"7" * 40) + parser.feed(b"7" * 40 + b"\n1\n")
    assert parser.bad_lines == 1 and parser.lines == 1
    assert "longer than 16" in [e for e in events if isinstance(e, wire.BadLine)][0].reason


def _assert_never_spliced(events, originals):
    """Every sample frame is an original one; every jump has a Gap just before it."""
    previous, gap_since = None, None
    for e in events:
        if isinstance(e, wire.Gap):
            gap_since = e
        elif isinstance(e, wire.Samples):
            assert e.seq in originals
            np.testing.assert_array_equal(e.words, originals[e.seq])
            if previous is not None and e.seq != (previous + 1) % wire.SEQ_MODULO:
                assert gap_since is not None
                if gap_since.lost_blocks is not None:
                    assert gap_since.lost_blocks == (e.seq - previous - 1) % wire.SEQ_MODULO
            else:
                assert gap_since is None
            previous, gap_since = e.seq, None


def test_fuzz_1e5_mutated_frames_every_byte_accounted_for():
    """1e5 sample frames with byte flips, insertions and deletions, fed in random pieces:
    no exception, and every byte of the stream lies in a good frame, a counted CRC-error
    frame, or a counted garbage/skipped run."""
    from tests.fuzzing import SCALE
    rng = np.random.default_rng(14)
    n_frames = int(100_000 * max(1.0, SCALE))
    head = wire.build_description(DESC, 0)
    table = [words_for(k) for k in range(64)]
    frames = [wire.build_samples(seq % wire.SEQ_MODULO, table[seq % 64])
              for seq in range(n_frames)]
    stream = bytearray(head + b"".join(frames))
    for p in rng.integers(len(head), len(stream), n_frames // 50):  # flips, sync bytes included
        stream[p] ^= int(rng.integers(1, 256))
    for p in sorted(rng.integers(len(head), len(stream), n_frames // 200), reverse=True):
        if rng.random() < 0.5:
            stream[p:p] = rng.integers(0, 256, int(rng.integers(1, 30)), dtype=np.uint8).tobytes()
        else:
            del stream[p:p + int(rng.integers(1, 30))]
    data = bytes(stream)
    cuts = np.sort(rng.integers(0, len(data), n_frames // 20))
    parser = wire.FrameParser()
    events, last = [], 0
    for c in list(cuts) + [len(data)]:
        events += parser.feed(data[last:c])
        last = int(c)
    covered = np.zeros(len(data), bool)
    frame_len = len(frames[0])
    for e in events:
        if isinstance(e, wire.Samples):
            covered[e.offset:e.offset + frame_len] = True
        elif isinstance(e, wire.Described):
            covered[e.offset:e.offset + len(head)] = True
        elif isinstance(e, (wire.Garbage, wire.Skipped, wire.CrcError)):
            covered[e.offset:e.offset + e.length] = True
    assert parser.offset == len(data)
    assert parser.crc_errors == sum(isinstance(e, wire.CrcError) for e in events) > 0
    assert parser.garbage_bytes == sum(e.length for e in events if isinstance(e, wire.Garbage)) > 0
    # bytes still held for a frame candidate not yet complete: at most one longest frame
    held = len(data) - parser._base
    assert held <= wire.HEADER_BYTES + 255 + wire.CRC_BYTES
    covered[len(data) - held:] = True
    if not parser.unsupported:  # a frame whose damage kept a valid CRC has no length event
        assert covered.all(), f"{np.count_nonzero(~covered)} bytes unaccounted"
    assert parser.frames > 0.9 * n_frames

"""The one worker-thread error policy: one line, no traceback, no hang."""

from __future__ import annotations

import errno
import logging
import threading


from livefilt.config import demo_config
from livefilt.drivers.simulated import SimulatedSource
from livefilt.errors import SettingError, SourceError
from livefilt.stream.engine import Engine
from livefilt.threads import Worker, install_excepthook, one_line


def test_one_line_for_each_kind_of_error():
    assert one_line(OSError(errno.ENOSPC, "No space left on device", "/x/raw.wav")) == \
        "no space left on device: /x/raw.wav"
    assert one_line(SettingError("distance", "abc", "type a distance")) == "distance = 'abc': type a distance"
    assert one_line(MemoryError()) == "out of memory"
    line = one_line(KeyError("k"))
    assert line.startswith("internal error (KeyError") and "\n" not in line


def test_worker_keeps_the_error_and_calls_its_handler():
    woke = threading.Event()
    w = Worker(lambda: 1 / 0, "t", on_error=lambda w: woke.set())
    w.start()
    w.join(5)
    assert woke.is_set() and isinstance(w.error, ZeroDivisionError)
    assert w.error_line.startswith("internal error (ZeroDivisionError")


class _Failing(SimulatedSource):
    def _generate_chunk(self, start, n):
        if start >= 4096 * 3:
            raise ValueError("the generator broke")
        return super()._generate_chunk(start, n)


def test_an_engine_whose_source_thread_dies_ends_with_one_line():
    s = demo_config()
    src = _Failing.from_settings({"pace": "fast"}, s.source.rate_hz, s.source.block)
    e = Engine(s, src)
    e.start(60.0)
    assert e.wait(10), "the engine hung after its source died"
    assert isinstance(e.error, SourceError)
    assert str(e.error) == ("simulated: the source stopped: internal error (ValueError: the generator "
                            "broke); run with -v for the details")


def test_threads_of_others_log_one_line(caplog):
    old = threading.excepthook
    install_excepthook()
    try:
        with caplog.at_level(logging.ERROR, logger="livefilt"):
            t = threading.Thread(target=lambda: {}["missing"], name="plug-in")
            t.start()
            t.join(5)
        msgs = [r.getMessage() for r in caplog.records if r.levelno == logging.ERROR]
        assert msgs == ["plug-in stopped: internal error (KeyError: 'missing'); run with -v for the details"]
    finally:
        threading.excepthook = old

"""One error policy for every worker thread (engine, recorder, drivers).

A worker that fails never shows a traceback to a user and never leaves the
process hanging:

- :func:`one_line` turns any exception into one line a person can act on
  (``OSError``: the system's words and the file; a ``LivefiltError``: its
  own text; anything else: its type and text, marked as an internal error).
- :class:`Worker` runs a target in a daemon thread, keeps the exception and
  its line, logs the traceback only at debug level (``livefilt -v``), and
  calls ``on_error`` so its owner can close what the thread fed (a ring, a
  file) and the waiting side wakes up.
- :func:`install_excepthook` applies the same to threads not started through
  :class:`Worker` (a third party's driver): one line on the log, no traceback.

And one rule for threads livefilt does not start: :func:`one_blas_thread`.
"""

from __future__ import annotations

import logging
import threading
from typing import Callable

__all__ = ["one_line", "Worker", "install_excepthook", "one_blas_thread"]

log = logging.getLogger("livefilt")


def one_line(exc: BaseException) -> str:
    """A single line describing ``exc`` for a user."""
    from livefilt.errors import LivefiltError
    if isinstance(exc, LivefiltError):
        text = str(exc)
    elif isinstance(exc, OSError):
        what = exc.strerror or str(exc) or type(exc).__name__
        text = what[:1].lower() + what[1:]
        if exc.filename:
            text += f": {exc.filename}"
    elif isinstance(exc, MemoryError):
        text = "out of memory"
    else:
        text = f"internal error ({type(exc).__name__}: {exc}); run with -v for the details"
    return " ".join(text.split())


class Worker(threading.Thread):
    """A daemon thread that follows the error policy.

    Parameters
    ----------
    target : callable
        Runs in the thread.
    name : str
        Thread name (shown in debug logs).
    on_error : callable(Worker), optional
        Called in the thread after a failure, before it ends; its own errors
        are logged at debug level and otherwise ignored.
    """

    def __init__(self, target: Callable[[], None], name: str,
                 on_error: Callable[["Worker"], None] | None = None):
        super().__init__(name=name, daemon=True)
        self._work = target
        self._on_error = on_error
        self.error: BaseException | None = None
        self.error_line: str | None = None

    def run(self) -> None:
        try:
            self._work()
        except BaseException as e:  # the policy: keep it, one line, never a traceback
            self.error, self.error_line = e, one_line(e)
            log.debug("%s stopped on error", self.name, exc_info=True)
            if self._on_error is not None:
                try:
                    self._on_error(self)
                except BaseException:
                    log.debug("%s: error handler failed", self.name, exc_info=True)


def install_excepthook() -> None:
    """Uncaught exceptions in any other thread: one log line, traceback only at debug."""
    def hook(args):
        if args.exc_type is SystemExit:
            return
        name = args.thread.name if args.thread is not None else "a thread"
        log.error("%s stopped: %s", name, one_line(args.exc_value))
        log.debug("traceback", exc_info=(args.exc_type, args.exc_value, args.exc_traceback))
    threading.excepthook = hook


_blas = {"limited": False}


def one_blas_thread() -> None:
    """Run the BLAS library numpy loaded on one thread, for the rest of the process.

    The engine's matrix products are small (a block's lock-in segments:
    a few (segments x 9600) @ (9600 x 4) products per step), and between them
    OpenBLAS's own worker threads spin on the other cores, taking them from
    the recorder, the file reader and the engine's second worker. Measured
    on a fast 192 kHz replay with the recorder on (3 runs each, alternately):
    engine 120-186 x real time with BLAS's threads, 229-235 x on one.
    Idempotent; done through threadpoolctl (the library made for this).
    """
    if _blas["limited"]:
        return
    _blas["limited"] = True
    try:
        from threadpoolctl import threadpool_limits
        threadpool_limits(limits=1, user_api="blas")
    except Exception as e:  # missing or failing: slower, never wrong
        log.debug("BLAS threads not limited: %s", one_line(e))

"""Command line: ``livefilt live | run | sources | speed | range | design | survey | check | tune``.

Every user mistake ends in one line on stderr (``livefilt: <what>``) and exit
status 2; a failure while running (a recording stopped by a write error, an
internal error in any thread) ends in one line and status 1, on time and with
the files closed; Ctrl-C ends a run cleanly with its files closed (130).
Only this module configures logging.
"""

from __future__ import annotations

import argparse
import logging
import os
import sys

from livefilt import __version__
from livefilt.errors import LivefiltError
from livefilt.safety import CAUTION

__all__ = ["main"]

log = logging.getLogger("livefilt")

def _settings(args):
    from livefilt.config import demo_config, load_config, parse_config
    if getattr(args, "config", None):
        s = load_config(args.config)
    elif getattr(args, "input", None) and _run_config(args.input) is not None:
        s = parse_config(_run_config(args.input), f"{args.input}/run.toml")  # replay with its own settings
    else:
        s = demo_config()
    if getattr(args, "input", None):
        doc = s.to_mapping()
        doc["source"] = {"driver": "file", "rate_hz": s.source.rate_hz, "block": s.source.block,
                         "path": args.input, "pace": "fast" if args.fast else "realtime"}
        s = parse_config(doc, s.origin)
    elif getattr(args, "fast", False):
        if "pace" in _pace_drivers(s.source.driver):
            doc = s.to_mapping()
            doc["source"]["pace"] = "fast"
            s = parse_config(doc, s.origin)
    return s


def _run_config(path: str):
    """The ``[config]`` of a run folder's run.toml, or None for anything else."""
    import tomllib
    from pathlib import Path
    meta = Path(path) / "run.toml"
    if not meta.is_file():
        return None
    try:
        return tomllib.loads(meta.read_text(encoding="utf-8")).get("config") or None
    except (OSError, UnicodeDecodeError, tomllib.TOMLDecodeError):
        return None  # the file driver names the problem when it opens the folder


def _marks(args, engine, duration_s):
    """Schedule ``--marks FILE.csv`` into ``engine`` (replacing a replayed run's own)."""
    from livefilt.runs.markers import check_marks_within, read_marks
    marks = read_marks(args.marks)
    ends = [x for x in (duration_s, getattr(engine.source, "length_s", None)) if x]
    if ends:
        check_marks_within(marks, min(ends), args.marks)
    engine.schedule_markers(marks, replace=True)
    return marks


def _typing_input() -> bool:
    """Read typed markers from a terminal or a pipe (not from files or /dev/null)."""
    import stat
    try:
        return sys.stdin is not None and (sys.stdin.isatty()
                                          or stat.S_ISFIFO(os.fstat(sys.stdin.fileno()).st_mode))
    except (OSError, ValueError):
        return False


def _typing(engine, readout):
    """Distance markers typed on stdin while a headless run goes on (a worker
    thread under the one error policy; it ends at end of input)."""
    from livefilt.errors import SettingError
    from livefilt.runs.markers import parse_distance
    from livefilt.threads import Worker

    def read():
        for line in sys.stdin:
            if readout.tty:
                readout.typed_line()
            if not line.strip():
                continue
            try:
                d, note = parse_distance(line)
            except SettingError as e:
                readout.say(f"not a marker: {e.allowed}")
                continue
            m = engine.add_marker(d, note)
            readout.say("marker at {:.2f} s: {}{}".format(
                m["time_s"], f"{d:.3g} m" if d is not None else "target moving",
                f" ({note})" if note and d is not None else ""))

    w = Worker(read, "livefilt-typing")
    w.start()
    return w


def _pace_drivers(driver: str) -> set:
    from livefilt.acquire.source import load_driver
    return set(load_driver(driver).options)


def cmd_run(args) -> int:
    from livefilt.stream.engine import Engine
    from livefilt.readout import Readout

    from livefilt.progress import progress

    settings = _settings(args)
    engine = Engine(settings)
    try:
        if getattr(args, "marks", None):
            _marks(args, engine, args.duration)
        if args.out:
            rec = engine.start_recording(args.out)
            print(f"recording to {rec.folder}", file=sys.stderr)
    except BaseException:
        engine.stop()
        raise
    readout = Readout(engine)
    replay = getattr(engine.source, "length_s", None) if engine.source.driver == "file" else None
    total = min(x for x in (replay, args.duration) if x) if replay else None
    bar = progress(total, "replay", "s") if total else None
    quiet = bar is not None and not bar.disable  # the bar stands in for the table meanwhile
    period = 0.25 if readout.tty or quiet else 1.0
    if _typing_input():
        _typing(engine, readout)
    engine.start(args.duration)
    failed_shown = None
    try:
        while not engine.finished.wait(period):
            if bar is not None:
                bar.update(min(engine.stats.index / engine.rate_hz, total) - bar.n)
            failed = engine.recording_failed
            if failed and failed != failed_shown:
                print(f"livefilt: {failed}", file=sys.stderr)
                readout.reset()
                failed_shown = failed
            if not quiet:
                readout.draw()
        if bar is not None:
            bar.close()
        readout.draw()
    except KeyboardInterrupt:
        print("\nstopping…", file=sys.stderr)
    finally:
        engine.stop()
        if bar is not None:
            bar.close()
    if engine.error is not None:  # printed in one line by main()
        raise engine.error
    left = engine.pending_markers()
    if getattr(args, "marks", None) and left:
        print(f"livefilt: {len(left)} marker(s) of {args.marks} fell after the run's end "
              f"(from {left[0]['time_s']:g} s): not recorded", file=sys.stderr)
    failed = engine.recording_failed
    if failed:
        if failed != failed_shown:
            print(f"livefilt: {failed}", file=sys.stderr)
        return 1
    if args.out and engine.stats.frames:
        print(f"saved {engine.stats.frames} frames ({engine.stats.frames / engine.rate_hz:.2f} s) "
              f"to {rec.folder}", file=sys.stderr)
    return 0


def _has_display() -> bool:
    if os.environ.get("QT_QPA_PLATFORM", "").startswith(("offscreen", "minimal")):
        return True
    if sys.platform.startswith("linux"):
        return bool(os.environ.get("DISPLAY") or os.environ.get("WAYLAND_DISPLAY"))
    return True


def cmd_live(args) -> int:
    if not _has_display() and not args.screenshot:
        print("livefilt: no display found (DISPLAY/WAYLAND_DISPLAY unset): showing the terminal "
              "read-out instead; " + ("it stops after --duration or on Ctrl-C" if args.duration
                                      else "press Ctrl-C to stop (or give --duration S)"),
              file=sys.stderr)
        return cmd_run(args)
    if args.screenshot and not _has_display():
        os.environ["QT_QPA_PLATFORM"] = "offscreen"
    try:
        from livefilt.window import run_window
    except ImportError as e:
        print(f"livefilt: the window needs pyqtgraph and PySide6 ({e.name or e} missing: "
              "pip install 'livefilt[window]'): showing the terminal read-out instead", file=sys.stderr)
        return cmd_run(args)
    print(CAUTION, file=sys.stderr)
    extra = {}
    if getattr(args, "marks", None):
        import inspect
        from livefilt.runs.markers import read_marks
        if "marks" not in inspect.signature(run_window).parameters:
            raise LivefiltError("--marks: this window cannot take a marker schedule yet; "
                                "use 'livefilt run --marks FILE' or replay the run with --marks")
        extra["marks"] = read_marks(args.marks)
    return run_window(_settings(args), duration_s=args.duration, screenshot=args.screenshot,
                      out=args.out, **extra)


def cmd_sources(args) -> int:
    from livefilt.acquire.source import driver_names, load_driver
    for name in driver_names():
        try:
            cls = load_driver(name)
            devices = cls.probe()
        except LivefiltError as e:
            print(f"{name}: unavailable: {e}")
            continue
        except Exception as e:  # a third party's plug-in failing must not hide the others
            print(f"{name}: unavailable: {type(e).__name__}: {e}")
            continue
        print(f"{name}: {len(devices)} device(s)")
        for d in devices:
            extra = ", ".join(f"{k} {v}" for k, v in d.items() if k != "name")
            print(f"  {d.get('name', '?')}" + (f"  ({extra})" if extra else ""))
        if args.verbose and cls.options:
            for k, v in cls.options.items():
                print(f"    option {k}: {v}")
    return 0


def cmd_speed(args) -> int:
    from livefilt.speed import run_speed
    args.window_bench = None
    if args.window:
        if not _has_display():
            os.environ["QT_QPA_PLATFORM"] = "offscreen"
        try:
            from livefilt.window.bench import measure_window
        except ImportError as e:
            print(f"livefilt: --window needs pyqtgraph and PySide6 ({e.name or e} missing: "
                  "pip install 'livefilt[window]')", file=sys.stderr)
            return 2
        args.window_bench = measure_window
    return run_speed(args)


def _analysis(module: str):
    """The ``main(args)`` of an analysis command, imported only when it runs (start-up)."""
    def run(args) -> int:
        import importlib
        return importlib.import_module(f"livefilt.analysis.{module}").main(args)
    return run


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(prog="livefilt", description=(
        "Live acquisition and causal filtering for modulated-light sensors. "
        "With no command: the live window on the built-in greenhouse demo."))
    p.add_argument("--version", action="version", version=f"livefilt {__version__}")
    p.add_argument("-v", "--verbose", action="store_true", help="more log messages")
    sub = p.add_subparsers(dest="command")

    def common(sp):
        sp.add_argument("--config", metavar="FILE", help="TOML settings (default: the built-in demo scene)")
        sp.add_argument("--input", metavar="FILE.wav", help="replay a WAV file or a run folder")
        sp.add_argument("--fast", action="store_true", help="replay/simulate as fast as possible")
        sp.add_argument("--duration", type=_seconds, metavar="S", help="stop after S seconds of data")
        sp.add_argument("--out", metavar="DIR", help="record the run into a new folder under DIR")
        sp.add_argument("--marks", metavar="FILE.csv",
                        help="distance markers at given times: rows time_s,distance_m[,note]")

    r = sub.add_parser("run", help="headless processing with a terminal read-out")
    common(r)
    r.set_defaults(func=cmd_run)
    lv = sub.add_parser("live", help="the live window")
    common(lv)
    lv.add_argument("--screenshot", metavar="FILE.png", help="save a PNG of the window before closing")
    lv.set_defaults(func=cmd_live)
    s = sub.add_parser("sources", help="list drivers and the devices each can see")
    s.add_argument("-v", "--verbose", action="store_true", help="also list each driver's options")
    s.set_defaults(func=cmd_sources)
    sp = sub.add_parser("speed", help="measure throughput and real-time factor on this machine")
    sp.add_argument("--config", metavar="FILE", help="measure this config's chains")
    sp.add_argument("--json", metavar="FILE", help="also write the table as JSON")
    sp.add_argument("--quick", action="store_true", help="shorter measurements (noisier)")
    sp.add_argument("--window", action="store_true", help="also measure the live window (frame rate, CPU, latency)")
    sp.add_argument("--channels", type=_channel_count, metavar="N",
                    help="also measure N inputs at 192 kHz with chains A and B on each, on one and on every core")
    sp.set_defaults(func=cmd_speed)

    # -- before and after the bench: each lives in livefilt/analysis/ ----------------
    rg = sub.add_parser("range", help="recorded runs -> detection range with its interval")
    rg.add_argument("runs", nargs="+", metavar="RUN", help="run folders")
    rg.add_argument("--snr-db", type=float, default=10.0, metavar="DB", help="detection threshold (default 10 dB)")
    rg.add_argument("--want-m", type=float, metavar="D", help="advise the time constant that reaches D metres")
    rg.add_argument("--out", metavar="DIR", help="report folder (default: beside the first run)")
    rg.set_defaults(func=_analysis("range_report"))
    dg = sub.add_parser("design", help="the front end and chains on paper: parts, alias, interferers, ENBW, lag")
    dg.add_argument("--config", metavar="FILE", help="TOML settings (default: the built-in demo scene)")
    dg.add_argument("--out", metavar="DIR", help="report folder")
    dg.set_defaults(func=_analysis("design_report"))
    sv = sub.add_parser("survey", help="ambient recording -> quiet modulation frequencies")
    sv.add_argument("recording", metavar="RECORDING", help="WAV file or run folder, light source off")
    sv.add_argument("--config", metavar="FILE", help="settings with the front end and digitizer")
    sv.add_argument("--drift-pct", type=float, metavar="PCT",
                    help="expected drift of the modulation frequency, %% (default 0.1)")
    sv.add_argument("--out", metavar="DIR", help="report folder (default: RECORDING-survey beside it)")
    sv.set_defaults(func=_analysis("survey"))
    ck = sub.add_parser("check", help="is this digitizer good enough, and is the stream whole?")
    ck.add_argument("--config", metavar="FILE", help="TOML settings naming the source to check")
    ck.add_argument("--input", metavar="RECORDING", help="check a recording instead of a live source")
    ck.add_argument("--duration", type=_seconds, metavar="S", help="seconds of live data (default 10)")
    ck.add_argument("--tone", type=float, metavar="HZ", help="the test tone's frequency")
    ck.add_argument("--out", metavar="DIR", help="report folder")
    ck.set_defaults(func=_analysis("check"))
    tn = sub.add_parser("tune", help="recorded runs x a grid of settings -> the best range within a lag budget")
    tn.add_argument("runs", nargs="+", metavar="RUN", help="run folders")
    tn.add_argument("--grid", required=True, metavar="GRID.toml", help="the settings to vary")
    tn.add_argument("--chain", metavar="NAME", help="the chain to vary (default: the first)")
    tn.add_argument("--snr-db", type=float, default=10.0, metavar="DB", help="detection threshold (default 10 dB)")
    tn.add_argument("--max-settling-s", type=float, metavar="S", help="the lag budget")
    tn.add_argument("--workers", type=int, metavar="N", help="processes (default: the cores)")
    tn.add_argument("--cluster", metavar="ADDRESS", help="a dask.distributed scheduler, tcp://HOST:PORT")
    tn.add_argument("--out", metavar="DIR", help="report folder")
    tn.set_defaults(func=_analysis("tune"))
    return p


def _seconds(text: str) -> float:
    try:
        v = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a number of seconds") from None
    if not v > 0:
        raise argparse.ArgumentTypeError(f"{text!r}: must be more than 0 seconds")
    return v


def _channel_count(text: str) -> int:
    try:
        v = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"{text!r} is not a whole number of inputs") from None
    if not 1 <= v <= 64:
        raise argparse.ArgumentTypeError(f"{text!r}: must be 1 to 64 inputs")
    return v


def main(argv=None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    logging.basicConfig(level=logging.INFO if args.verbose else logging.WARNING,
                        format="livefilt: %(message)s")
    if args.command is None:
        args = parser.parse_args(list(sys.argv[1:] if argv is None else argv) + ["live"])
    from livefilt.threads import install_excepthook, one_line
    install_excepthook()
    try:
        return args.func(args)
    except LivefiltError as e:
        print(f"livefilt: {e}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        return 130
    except Exception as e:  # the one policy: a line, not a traceback (-v logs it)
        log.debug("internal error", exc_info=True)
        print(f"livefilt: {one_line(e)}", file=sys.stderr)
        return 1


if __name__ == "__main__":
    sys.exit(main())

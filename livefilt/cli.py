"""Command line: ``livefilt live | run | sources | speed | range | design | survey | check | tune``.

Every user mistake ends in one line on stderr (``livefilt: <what>``) and exit
status 2; Ctrl-C ends a run cleanly with its files closed.  Only this module
configures logging.
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
    s = load_config(args.config) if getattr(args, "config", None) else demo_config()
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


def _pace_drivers(driver: str) -> set:
    from livefilt.acquire.source import load_driver
    return set(load_driver(driver).options)


def cmd_run(args) -> int:
    from livefilt.stream.engine import Engine
    from livefilt.readout import Readout

    settings = _settings(args)
    engine = Engine(settings)
    if args.out:
        rec = engine.start_recording(args.out)
        print(f"recording to {rec.folder}", file=sys.stderr)
    readout = Readout(engine)
    period = 0.25 if readout.tty else 1.0
    engine.start(args.duration)
    try:
        while not engine.finished.wait(period):
            readout.draw()
        readout.draw()
    except KeyboardInterrupt:
        print("\nstopping…", file=sys.stderr)
    finally:
        engine.stop()
    if engine.error is not None:  # a LivefiltError is printed in one line by main()
        raise engine.error
    if args.out and engine.stats.frames:
        print(f"saved {engine.stats.frames} frames ({engine.stats.frames / engine.rate_hz:.2f} s) "
              f"to {args.out}", file=sys.stderr)
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
              "read-out instead", file=sys.stderr)
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
    return run_window(_settings(args), duration_s=args.duration, screenshot=args.screenshot,
                      out=args.out)


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


def main(argv=None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    logging.basicConfig(level=logging.INFO if args.verbose else logging.WARNING,
                        format="livefilt: %(message)s")
    if args.command is None:
        args = parser.parse_args(list(sys.argv[1:] if argv is None else argv) + ["live"])
    try:
        return args.func(args)
    except LivefiltError as e:
        print(f"livefilt: {e}", file=sys.stderr)
        return 2
    except KeyboardInterrupt:
        return 130


if __name__ == "__main__":
    sys.exit(main())

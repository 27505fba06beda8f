"""``livefilt tune``: which settings see farthest, swept over recorded runs.

Every trial is one candidate chain (the base chain with the grid's values put
in, or a whole ``[[candidate]]`` chain). Each recorded run is replayed through
the one engine (:class:`livefilt.stream.engine.Engine` on the file driver, as
fast as it goes): the very filters and detectors that run live, so the winner
behaves the same on the bench. The range analysis of ``livefilt range`` then
turns each trial's rows into a detection range with its interval.

Work sharing: trials with the same stages (and input) share one replay: the
engine filters once and every detector variant of that group reads the same
filtered blocks (:func:`run_unit`). A sweep over time constants and slopes,
the common case, therefore filters each run once.

Execution: a local process pool (``--workers``) or a dask.distributed
scheduler (``--cluster tcp://HOST:PORT``); both call the same :func:`run_unit`
on the same jobs, so their tables agree (tested within 1e-9). Finished units
are stored in ``DIR/units/`` as they arrive (a second run with the same
folder resumes); a failing unit is retried once, then reported with its trials
marked failed; a worker that dies is replaced.
"""

from __future__ import annotations

import hashlib
import itertools
import json
import logging
import math
import os
import sys
import time
import tomllib
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Mapping, Sequence

import numpy as np

from livefilt.config import ChainSettings, Settings, parse_chain, parse_config
from livefilt.errors import LivefiltError, SettingError
from livefilt.progress import progress
from livefilt.runs.record import read_run

__all__ = ["Grid", "Trial", "load_grid", "plan_units", "run_unit", "sweep", "main"]

log = logging.getLogger(__name__)

_GRID_TOP = {"vary", "candidate"}


# -- the grid -------------------------------------------------------------------

@dataclass
class Trial:
    """One candidate chain: ``values`` as written in the grid (key -> value)."""

    index: int
    values: dict
    chain: dict                     # a chain table the config loader accepts
    label: str = ""


@dataclass
class Grid:
    keys: list[str]
    trials: list[Trial]
    path: str
    sizes: list[int] = field(default_factory=list)

    def describe(self) -> str:
        parts = [f"{n} {k}" for k, n in zip(self.keys, self.sizes)]
        cands = len(self.trials) - (math.prod(self.sizes) if self.keys else 0)
        if cands > 0:
            parts.append(f"{cands} whole candidate chain(s)")
        return " x ".join(parts) if parts else "no variation"


def _steps(key: str) -> list[str | int]:
    out: list[str | int] = []
    for part in key.split("."):
        if not part:
            raise ValueError("empty part")
        out.append(int(part) if part.isdigit() else part)
    return out


def _put(chain: dict, key: str, value: Any, grid: str) -> None:
    """Set dotted ``key`` (relative to the chain) to ``value`` in place."""
    where = f'{grid}: vary."{key}"'
    try:
        steps = _steps(key)
    except ValueError:
        raise SettingError(where, value, "a dotted key such as detector.time_constant_s or stages.1.q") from None
    node: Any = chain
    for i, s in enumerate(steps[:-1]):
        path = ".".join(str(x) for x in steps[:i + 1])
        if isinstance(s, int):
            if not isinstance(node, list) or not 0 <= s < len(node):
                n = len(node) if isinstance(node, list) else 0
                raise SettingError(where, value, f"the chain has no {path} (its list holds {n} "
                                   f"item(s), numbered from 0)")
            node = node[s]
        else:
            if not isinstance(node, dict) or s not in node:
                have = ", ".join(sorted(node)) if isinstance(node, dict) else "nothing"
                raise SettingError(where, value, f"the chain has no {path}; it has: {have}")
            node = node[s]
    last = steps[-1]
    if isinstance(last, int) or not isinstance(node, dict):
        raise SettingError(where, value, "must end in a setting's name, such as .q or .cutoff_hz")
    node[last] = value


def load_grid(path: str | os.PathLike, base: ChainSettings, fs: float, channels: int) -> Grid:
    """Read GRID.toml and check every trial with the config loader, before any work.

    Raises
    ------
    SettingError
        naming the grid key (and value) that does not exist or is refused.
    """
    p = Path(path)
    name = p.name
    try:
        doc = tomllib.loads(p.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise SettingError("--grid", str(path), "file not found") from None
    except OSError as e:
        raise SettingError("--grid", str(path), f"cannot be read ({e.strerror})") from None
    except tomllib.TOMLDecodeError as e:
        raise SettingError("--grid", str(path), f"is not valid TOML: {e}") from None
    for k in doc:
        if k not in _GRID_TOP:
            raise SettingError(f"{name}: {k}", doc[k], "unknown table; allowed: [vary], [[candidate]]")
    vary = doc.get("vary", {})
    if not isinstance(vary, Mapping):
        raise SettingError(f"{name}: vary", vary, "must be a table of dotted keys, each a list of values")
    base_map = base.to_mapping()
    keys, lists = [], []
    for key, values in vary.items():
        if not isinstance(values, list) or not values:
            raise SettingError(f'{name}: vary."{key}"', values, "must be a non-empty list of values")
        for j, v in enumerate(values):  # each value alone, so the message names it
            trial = json.loads(json.dumps(base_map))
            _put(trial, key, v, name)
            try:
                parse_chain(trial, fs, 0, channels)
            except SettingError as e:
                raise SettingError(f'{name}: vary."{key}"[{j}]', v, f"refused: {e}") from None
        keys.append(key)
        lists.append(values)
    trials: list[Trial] = []
    if keys:
        for combo in itertools.product(*lists):
            chain = json.loads(json.dumps(base_map))
            for k, v in zip(keys, combo):
                _put(chain, k, v, name)
            values = dict(zip(keys, combo))
            try:
                parse_chain(chain, fs, 0, channels)
            except SettingError as e:
                raise SettingError(f"{name}: trial " + ", ".join(f"{k} = {v!r}" for k, v in values.items()),
                                   "", f"refused together: {e}") from None
            trials.append(Trial(len(trials), values, chain))
    cands = doc.get("candidate", [])
    if not isinstance(cands, list):
        raise SettingError(f"{name}: candidate", cands, "must be [[candidate]] tables, each a whole chain")
    for j, c in enumerate(cands):
        if not isinstance(c, Mapping):
            raise SettingError(f"{name}: candidate[{j}]", c, "must be a chain table")
        chain = dict(c)
        label = str(chain.pop("name", f"candidate {j}"))
        chain.setdefault("input", base_map["input"])
        try:
            parse_chain(chain, fs, 0, channels)
        except SettingError as e:
            raise SettingError(f"{name}: candidate[{j}]", label, f"refused: {e}") from None
        trials.append(Trial(len(trials), {"candidate": label}, chain, label))
    if not trials:
        raise SettingError(f"{name}", "", "varies nothing: give [vary] lists or [[candidate]] chains")
    return Grid(keys, trials, str(p), [len(v) for v in lists])


# -- work units -----------------------------------------------------------------

def _canon(x: Any) -> str:
    return json.dumps(x, sort_keys=True, separators=(",", ":"))


def _run_id(folder: Path) -> str:
    """Identity of a recorded run for the unit cache: path, raw.wav size and time."""
    raw = folder / "raw.wav"
    st = raw.stat()
    return f"{folder.resolve()}|{st.st_size}|{st.st_mtime_ns}"


def _unit_key(run_id: str, chain: Mapping, detector: Mapping) -> str:
    from livefilt import __version__
    text = _canon([__version__, run_id, chain.get("input", 0), chain.get("stages", []), detector])
    return hashlib.sha256(text.encode()).hexdigest()[:20]


def plan_units(runs: Sequence[Path], trials: Sequence[Trial], cache: Path | None):
    """Group the (run, trial) pairs into replays: one per run and distinct stages.

    Returns ``(jobs, keys)``: ``jobs`` is a list of job dicts for :func:`run_unit`
    (only the detector variants not already in ``cache``); ``keys[(run, trial)]``
    names the rows file of each pair.
    """
    jobs, keys = [], {}
    for r, folder in enumerate(runs):
        rid = _run_id(folder)
        groups: dict[str, dict] = {}
        for t in trials:
            k = _unit_key(rid, t.chain, t.chain.get("detector", {}))
            keys[(r, t.index)] = k
            if cache is not None and (cache / f"{k}.npy").exists():
                continue
            g = groups.setdefault(_canon([t.chain.get("input", 0), t.chain.get("stages", [])]),
                                  {"run": str(folder), "input": t.chain.get("input", 0),
                                   "stages": t.chain.get("stages", []), "detectors": [], "keys": []})
            if k not in g["keys"]:
                g["detectors"].append(t.chain.get("detector", {}))
                g["keys"].append(k)
        jobs.extend(groups.values())
    return jobs, keys


def run_unit(job: Mapping) -> dict:
    """Replay one run through one set of stages with every detector variant.

    The engine (file driver, as fast as possible) runs the chain with the first
    detector; the other variants read the engine's filtered blocks through a
    listener, block by block, with the same start indices, so their rows equal
    what a live chain with that detector would give (detector rows depend only
    on sample indices, not on the block split: DEVELOPERS.md).

    Returns ``{"keys": [...], "rows": [structured arrays]}``, one per detector.
    """
    from livefilt.dsp.detect import READING_DTYPE, DetectorSpec, make_detector
    from livefilt.stream.engine import Engine

    folder = Path(job["run"])
    run = read_run(folder, raw=False)
    doc = json.loads(json.dumps(run.config))
    src = doc.get("source", {})
    doc["source"] = {"driver": "file", "path": str(folder), "pace": "fast",
                     "rate_hz": src.get("rate_hz", run.rate_hz or 48000), "block": src.get("block", 256)}
    doc["chains"] = [{"name": "trial", "input": job["input"], "stages": job["stages"],
                      "detector": job["detectors"][0]}]
    settings = parse_config(doc, str(folder))
    engine = Engine(settings, tap_seconds=0.0)
    fs, every = engine.rate_hz, engine.output_every
    chain = engine.chains[0]
    extra = [make_detector(DetectorSpec.from_mapping(d, fs), engine.reference, fs, every)
             for d in job["detectors"][1:]]
    collected: list[list[np.ndarray]] = [[] for _ in job["detectors"]]

    def listen(eng, start, data, y, rows_all):
        collected[0].append(rows_all[0].copy())
        ref = data[:, chain.ref_channel] if chain.ref_channel is not None else None
        for j, det in enumerate(extra, start=1):
            collected[j].append(det.process(y[0], start, ref).copy())

    engine.listeners.append(listen)
    engine.run()
    if engine.error is not None:
        raise engine.error
    rows = [np.concatenate(c) if c else np.zeros(0, dtype=READING_DTYPE) for c in collected]
    return {"keys": list(job["keys"]), "rows": rows, "run": str(folder), "rate_hz": fs}


# -- execution --------------------------------------------------------------------

class _Failed(Exception):
    pass


def _save_unit(cache: Path, result: Mapping) -> None:
    for k, rows in zip(result["keys"], result["rows"]):
        tmp = cache / f".{k}.tmp.npy"
        np.save(tmp, rows, allow_pickle=False)
        os.replace(tmp, cache / f"{k}.npy")


def _local(jobs, workers: int, on_done, on_fail) -> None:
    """Run ``jobs`` in a process pool; each failure retried once; dead workers replaced."""
    import concurrent.futures as cf
    import multiprocessing as mp
    from concurrent.futures.process import BrokenProcessPool

    tries = {i: 0 for i in range(len(jobs))}
    todo = list(range(len(jobs)))
    ctx = mp.get_context("spawn")  # no threads inherited half-way (tqdm, numba)
    while todo:
        with cf.ProcessPoolExecutor(max_workers=max(1, workers), mp_context=ctx) as pool:
            futs = {pool.submit(run_unit, jobs[i]): i for i in todo}
            todo = []
            broken = False
            for fut in cf.as_completed(futs):
                i = futs[fut]
                try:
                    on_done(fut.result())
                except BrokenProcessPool:
                    broken = True
                    tries[i] += 1
                    (todo.append(i) if tries[i] < 2 else on_fail(jobs[i], "a worker process died"))
                except LivefiltError as e:
                    tries[i] += 1
                    (todo.append(i) if tries[i] < 2 else on_fail(jobs[i], str(e)))
                except Exception as e:  # a bug or a resource problem: reported, not raised
                    tries[i] += 1
                    (todo.append(i) if tries[i] < 2 else on_fail(jobs[i], f"{type(e).__name__}: {e}"))
            if broken:
                log.warning("a worker process died; starting a new pool for %d unit(s)", len(todo))


def _cluster(jobs, address: str, on_done, on_fail, timeout_s: float = 20.0) -> None:
    """The same jobs on a dask.distributed scheduler (``pip install 'livefilt[cluster]'``)."""
    try:
        from distributed import Client, as_completed
    except ImportError:
        raise LivefiltError("--cluster needs dask.distributed: pip install 'livefilt[cluster]'") from None
    try:
        client = Client(address, timeout=timeout_s)
    except (OSError, TimeoutError) as e:
        raise LivefiltError(f"--cluster {address}: no scheduler answered within {timeout_s:g} s ({e})") from None
    try:
        futs = client.map(run_unit, jobs, pure=False, retries=1)
        index = {f.key: i for i, f in enumerate(futs)}
        for fut in as_completed(futs):
            i = index[fut.key]
            if fut.status == "finished":
                on_done(fut.result())
            else:
                try:
                    fut.result()
                except Exception as e:
                    on_fail(jobs[i], f"{type(e).__name__}: {e}")
    finally:
        client.close()


# -- the sweep --------------------------------------------------------------------

def _trial_group(cs: ChainSettings, fs: float, ref_hz: float | None, every: int):
    """The range report's chain group for a trial: its ENBW and settling margin."""
    from livefilt.analysis.range_report import group_for_chain
    from livefilt.dsp.design import chain_sos
    from livefilt.dsp.detect import ReferenceSpec, make_detector
    ref = ReferenceSpec.from_mapping({"frequency_hz": ref_hz or 1000.0}, fs, 2)
    det = make_detector(cs.detector, ref, fs, every)
    return group_for_chain("trial", cs.name, cs.to_mapping(), fs, det, chain_sos(cs.stages, fs), ref_hz)


def _analyse(g, runs_rows, runs: Sequence[dict], fs: float, snr_db: float) -> dict:
    """Range analysis of one trial over every run (``livefilt range``'s own code)."""
    from livefilt.analysis.range_report import add_segments, analyse_group
    for rows, run in zip(runs_rows, runs):
        t = rows["index"] / fs
        end = float(t[-1]) + run["dt"] if len(t) else 0.0
        add_segments(g, t, rows["in_phase"], rows["quadrature"], run["markers"], run["dt"], end,
                     run["name"])
    res = analyse_group(g, snr_db)
    if "range_m" not in res:
        raise LivefiltError(res.get("problem", "no range"))
    return res


def sweep(runs: Sequence[str | os.PathLike], grid_path, *, chain: str | None = None,
          snr_db: float = 10.0, max_settling_s: float | None = None, workers: int | None = None,
          cluster: str | None = None, out: str | os.PathLike | None = None,
          say=print) -> dict:
    """Plan, run and analyse a sweep; returns the table (and writes it when ``out``)."""
    from livefilt.analysis.range_report import _load, _reference
    folders = [Path(r) for r in runs]
    loaded = [_load(str(f)) for f in folders]  # one line naming the run when one does not load
    settings: Settings = loaded[0][1]
    rate = loaded[0][2]
    for f, (_, _, r, _) in zip(folders[1:], loaded[1:]):
        if abs(r - rate) > 1e-9:
            raise LivefiltError(f"{f}: recorded at {r:g} Hz, {folders[0]} at {rate:g} Hz: "
                                "tune runs of one rate together")
    runs_info = []
    for f, (run, st, r, ch) in zip(folders, loaded):
        ref = _reference(st, run, r, ch)
        runs_info.append({"name": f.name, "markers": run.markers, "dt": st.output.interval_s,
                          "ref_hz": ref.frequency_hz if ref is not None else None,
                          "every": max(1, int(round(st.output.interval_s * r)))})
    if not any(m.get("distance_m") is not None for i in runs_info for m in i["markers"]):
        raise LivefiltError(f"{folders[0]}: no distance markers in these runs: tune needs runs "
                            "with markers (type distances while recording, or replay with --marks)")
    names = [c.name for c in settings.chains]
    if chain is None:
        base = settings.chains[0]
    elif chain in names:
        base = settings.chains[names.index(chain)]
    else:
        raise SettingError("--chain", chain, "no such chain in the run; it has: " + ", ".join(names))
    grid = load_grid(grid_path, base, rate, 64)
    cache = None
    if out is not None:
        from livefilt.analysis.report import ReportFolder
        ReportFolder(out, "Tune")  # creates the folder or says in one line why not
        cache = Path(out) / "units"
        cache.mkdir(exist_ok=True)
    jobs, keys = plan_units(folders, grid.trials, cache)
    passes = len(jobs)
    say(f"tune: {len(grid.trials)} trials ({grid.describe()}) over {len(folders)} run(s): "
        f"{passes} replay(s) to do" + (f", {len(keys) - sum(len(j['keys']) for j in jobs)} "
                                        "result(s) already in the folder" if cache else ""))
    store: dict[str, np.ndarray] = {}
    failed: dict[str, str] = {}
    bar = progress(total=passes, desc="tune", unit="replay")

    def done(result):
        if cache is not None:
            _save_unit(cache, result)
        for k, rows in zip(result["keys"], result["rows"]):
            store[k] = rows
        bar.update(1)

    def fail(job, why):
        for k in job["keys"]:
            failed[k] = why
        say(f"tune: a replay of {job['run']} failed twice ({why}); its trials are marked failed")
        bar.update(1)

    try:
        if jobs:
            if cluster:
                _cluster(jobs, cluster, done, fail)
            else:
                _local(jobs, workers or os.cpu_count() or 1, done, fail)
    finally:
        bar.close()
    table = []
    for t in grid.trials:
        cs = parse_chain(t.chain, rate, 0, 64)
        g = _trial_group(cs, rate, runs_info[0]["ref_hz"], runs_info[0]["every"])
        row = {"trial": t.index, "values": t.values, "settling_s": float(g.settling_s)}
        ks = [keys[(r, t.index)] for r in range(len(folders))]
        bad = [failed[k] for k in ks if k in failed]
        if bad:
            row.update(status="failed: " + bad[0], range_m=math.nan, range_low_m=math.nan,
                       range_high_m=math.nan, exponent=math.nan)
        else:
            rows = [store[k] if k in store else np.load(cache / f"{k}.npy") for k in ks]
            try:
                res = _analyse(g, rows, runs_info, rate, snr_db)
                row.update(status="ok", **{k: float(res[k]) for k in
                                           ("range_m", "range_low_m", "range_high_m", "exponent")})
            except LivefiltError as e:
                row.update(status=f"no range: {e}", range_m=math.nan, range_low_m=math.nan,
                           range_high_m=math.nan, exponent=math.nan)
        table.append(row)
    result = _rank(table, max_settling_s)
    result.update(grid=grid, snr_db=snr_db, max_settling_s=max_settling_s, runs=[str(f) for f in folders])
    if out is not None:
        _write(Path(out), result, say)
    return result


def _rank(table: list[dict], budget: float | None) -> dict:
    ok = [r for r in table if r["status"] == "ok" and math.isfinite(r["range_m"])]
    fits = [r for r in ok if budget is None or r["settling_s"] <= budget]
    best = max(fits, key=lambda r: (r["range_m"], -r["settling_s"])) if fits else None
    # the range-versus-lag front: no other trial settles sooner and sees farther
    front = []
    for r in sorted(ok, key=lambda r: (r["settling_s"], -r["range_m"])):
        if not front or r["range_m"] > front[-1]["range_m"]:
            front.append(r)
    for r in table:
        r["on_front"] = any(r is f for f in front)
        r["fits_budget"] = budget is None or r["settling_s"] <= budget
    return {"trials": table, "best": best, "front": front}


def _plain(v):
    if isinstance(v, (list, tuple)):
        return [_plain(x) for x in v]
    if isinstance(v, (np.floating,)):
        return float(v)
    if isinstance(v, (np.integer,)):
        return int(v)
    return v


def _write(out: Path, result: dict, say) -> None:
    from livefilt.analysis.report import ReportFolder, figure
    grid: Grid = result["grid"]
    keys = grid.keys or ["candidate"]
    rep = ReportFolder(out, "Tune: which settings see farthest")
    metrics = ("range_m", "range_low_m", "range_high_m", "exponent", "settling_s")

    def record(r):
        d = {k: _plain(r["values"].get(k)) for k in keys if k in r["values"]}
        d.update({m: float(r[m]) for m in metrics})
        d["status"] = r["status"]
        d["on_front"] = bool(r["on_front"])
        d["fits_budget"] = bool(r["fits_budget"])
        return d

    doc: dict[str, Any] = {"tune": {"runs": result["runs"], "grid": grid.path, "trials": len(result["trials"]),
                                    "snr_db_threshold": result["snr_db"]}}
    if result["max_settling_s"] is not None:
        doc["tune"]["max_settling_s"] = result["max_settling_s"]
    if result["best"] is not None:
        b = result["best"]
        doc["best"] = {**{k: _plain(b["values"].get(k)) for k in keys if k in b["values"]},
                       **{m: float(b[m]) for m in metrics}}
    doc["trials"] = [record(r) for r in result["trials"]]
    rep.toml("tune.toml", _finite(doc))
    rep.csv("tune.csv", ["trial"] + keys + list(metrics) + ["on_front", "fits_budget", "status"],
            [[r["trial"]] + [json.dumps(_plain(r["values"].get(k))) if isinstance(r["values"].get(k), list)
                             else r["values"].get(k, "") for k in keys]
             + [float(r[m]) for m in metrics] + [int(r["on_front"]), int(r["fits_budget"]), r["status"]]
             for r in result["trials"]])
    ok = [r for r in result["trials"] if r["status"] == "ok"]
    # range against settling, the front marked
    fig, ax = figure(7.0, 4.4)
    if ok:
        s = np.array([r["settling_s"] for r in ok])
        rg = np.array([r["range_m"] for r in ok])
        lo = np.array([r["range_low_m"] for r in ok])
        hi = np.array([r["range_high_m"] for r in ok])
        ax.errorbar(s, rg, yerr=[np.clip(rg - lo, 0, None), np.clip(hi - rg, 0, None)], fmt="o",
                    color="#7a8799", ms=4, lw=0.8, capsize=2, label="trials (range with its interval)")
        fr = result["front"]
        ax.plot([r["settling_s"] for r in fr], [r["range_m"] for r in fr], "-", color="#1b6ca8", lw=1.6,
                label="front: no trial settles sooner and sees farther")
        if result["best"] is not None:
            ax.plot([result["best"]["settling_s"]], [result["best"]["range_m"]], "*", ms=14,
                    color="#d98e04", label="best within the lag budget")
        if result["max_settling_s"] is not None:
            ax.axvline(result["max_settling_s"], color="#a33b00", ls="--", lw=1, label="lag budget")
        ax.set_xscale("log")
        from matplotlib.ticker import FuncFormatter
        plain = FuncFormatter(lambda v, _: f"{v:g}")
        ax.xaxis.set_major_formatter(plain)
        ax.xaxis.set_minor_formatter(FuncFormatter(lambda v, _: f"{v:g}" if f"{v:g}"[0] in "25" else ""))
    ax.set_xlabel("settling time, 99 % (s)")
    ax.set_ylabel("detection range (m)")
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(loc="best", fontsize=8)
    rep.figure("tune-front.png", fig, "Detection range against the lag it costs; the line joins the trials "
               "no other trial beats on both.")
    for j, k in enumerate(grid.keys):
        fig, ax = figure(6.0, 3.6)
        vals = [r["values"][k] for r in ok]
        labels = sorted({json.dumps(v) for v in vals}, key=lambda t: (len(t), t))
        xs = [labels.index(json.dumps(v)) for v in vals]
        ax.plot(xs, [r["range_m"] for r in ok], "o", color="#1b6ca8", ms=5)
        ax.set_xticks(range(len(labels)), labels)
        ax.set_xlabel(k)
        ax.set_ylabel("detection range (m)")
        ax.grid(True, alpha=0.3)
        rep.figure(f"tune-{j + 1}.png", fig, f"Detection range of every trial against {k}.")
    best = result["best"]
    text = []
    if best is not None:
        vals = ", ".join(f"{k} = {json.dumps(_plain(v))}" for k, v in best["values"].items())
        text.append(f"Best within the lag budget: {vals}: range {best['range_m']:.3g} m "
                    f"({best['range_low_m']:.3g} to {best['range_high_m']:.3g} m), settling "
                    f"{best['settling_s']:.3g} s.")
    else:
        text.append("No trial gave a range within the lag budget.")
    rep.section("Answer", rep.paragraphs(*text))
    rep.section("Range against lag", rep.img("tune-front.png"))
    if grid.keys:
        rep.section("Range against each varied setting",
                    "".join(rep.img(f"tune-{j + 1}.png") for j in range(len(grid.keys))))
    rep.section("Trials", rep.table(
        ["trial"] + keys + ["range (m)", "interval (m)", "exponent", "settling (s)", "front", "status"],
        [[r["trial"]] + [json.dumps(_plain(r["values"].get(k))) for k in keys]
         + [f"{r['range_m']:.4g}", f"{r['range_low_m']:.3g} to {r['range_high_m']:.3g}",
            f"{r['exponent']:.3g}", f"{r['settling_s']:.3g}", "yes" if r["on_front"] else "",
            r["status"]] for r in result["trials"]]))
    rep.html("tune.html", subtitle=", ".join(result["runs"]))
    say(f"tune: wrote {', '.join(p.name for p in rep.written)} to {out}")


def _finite(d):
    """TOML has nan, but spreadsheets and people read a missing value better: drop NaN."""
    if isinstance(d, dict):
        return {k: _finite(v) for k, v in d.items() if not (isinstance(v, float) and math.isnan(v))}
    if isinstance(d, list):
        return [_finite(v) for v in d]
    return d


def _print_table(result: dict, say) -> None:
    grid: Grid = result["grid"]
    keys = grid.keys or ["candidate"]
    say("  ".join(f"{k:>22}" for k in keys) + "   range m   interval m        settling s")
    for r in sorted(result["trials"], key=lambda r: -r["range_m"] if math.isfinite(r["range_m"]) else 1e99):
        vals = "  ".join(f"{json.dumps(_plain(r['values'].get(k))):>22}" for k in keys)
        mark = " *" if r is result["best"] else ("  " if r["fits_budget"] else " >")
        if r["status"] == "ok":
            say(f"{vals}  {r['range_m']:8.3g}  {r['range_low_m']:6.3g}-{r['range_high_m']:<6.3g}  "
                f"{r['settling_s']:10.3g}{mark}")
        else:
            say(f"{vals}  {r['status']}")
    say("(* best within the lag budget; > settles slower than the budget)")


def main(args) -> int:
    say = lambda s: print(s, file=sys.stderr)  # noqa: E731
    t0 = time.monotonic()
    result = sweep(args.runs, args.grid, chain=args.chain, snr_db=args.snr_db,
                   max_settling_s=args.max_settling_s, workers=args.workers, cluster=args.cluster,
                   out=args.out, say=say)
    _print_table(result, print)
    say(f"tune: {len(result['trials'])} trials in {time.monotonic() - t0:.1f} s")
    return 0 if result["best"] is not None else 1

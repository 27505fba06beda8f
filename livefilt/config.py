"""Settings: TOML (stdlib ``tomllib``) into typed, validated settings.

One validation path: every value is checked where its meaning lives
(:class:`~livefilt.dsp.design.StageSpec`, :class:`~livefilt.dsp.detect.DetectorSpec`,
:class:`~livefilt.dsp.detect.ReferenceSpec`, the driver's ``from_settings``) and
errors are re-raised here with the full field path, e.g.
``chains[0].stages[2].cutoff_hz = 30000: must be between 0 and Nyquist
(24000 Hz), exclusive``.

API
---
- :func:`load_config` (path) and :func:`parse_config` (dict) -> :class:`Settings`
- :func:`demo_config` the built-in greenhouse scene (``livefilt/scenes/demo.toml``)
- :meth:`Settings.to_toml` text the loader reads back to equal settings
- :meth:`Settings.at_rate` the same settings re-validated at another sample rate
"""

from __future__ import annotations

import tomllib
from dataclasses import dataclass, field, replace
from importlib import resources
from pathlib import Path
from typing import Any, Mapping

import tomli_w

from livefilt import fields
from livefilt.dsp.design import StageSpec
from livefilt.dsp.detect import DetectorSpec, ReferenceSpec
from livefilt.dsp.frontend import Frontend
from livefilt.dsp.predict import DesignSpec
from livefilt.errors import SettingError

__all__ = ["Settings", "SourceSettings", "ChainSettings", "OutputSettings",
           "load_config", "parse_config", "demo_config", "parse_chain", "MAX_CHANNELS",
           "toml_text"]

#: Upper bound used for channel checks before the source is open; the engine
#: re-checks against the real channel count.
MAX_CHANNELS = 64

_TOP = ("source", "reference", "chains", "output", "frontend", "design")
#: Mains frequencies the world uses (REFERENCES row 8; IEC 60196).
MAINS_HZ = (50.0, 60.0)
_CHAIN = ("name", "input", "stages", "detector")
#: Most chains in one config (A and B on each of 16 inputs).
MAX_CHAINS = 32
_OUTPUT = ("interval_s",)


@dataclass(frozen=True)
class SourceSettings:
    """The ``[source]`` table: driver name, rate, block, and the driver's own keys."""

    driver: str = "simulated"
    rate_hz: float = 48000.0
    block: int = 256
    options: Mapping[str, Any] = field(default_factory=dict)

    def to_mapping(self) -> dict:
        d = {"driver": self.driver, "rate_hz": _num(self.rate_hz), "block": self.block}
        d.update(self.options)
        return d


@dataclass(frozen=True)
class ChainSettings:
    """One ``[[chains]]`` entry: stages then a detector, fed from one input channel."""

    name: str
    input: int | str
    stages: tuple[StageSpec, ...]
    detector: DetectorSpec

    def to_mapping(self) -> dict:
        return {"name": self.name, "input": self.input,
                "stages": [s.to_mapping() for s in self.stages],
                "detector": self.detector.to_mapping()}


@dataclass(frozen=True)
class OutputSettings:
    """The ``[output]`` table: read-out and results interval."""

    interval_s: float = 0.05

    def to_mapping(self) -> dict:
        return {"interval_s": _num(self.interval_s)}


@dataclass(frozen=True)
class Settings:
    """A whole, validated configuration."""

    source: SourceSettings
    reference: ReferenceSpec | None
    chains: tuple[ChainSettings, ...]
    output: OutputSettings
    origin: str = "<built-in demo>"
    #: The analog stages on the board (``[frontend]``), None when the config has none.
    frontend: Frontend | None = None
    #: ``[design]``: extra interferer lines and a measured point for predictions.
    design: DesignSpec = field(default_factory=DesignSpec)
    #: Mains frequency, Hz (``mains_hz`` in ``[reference]`` or ``[source]``; 50 or 60).
    mains_hz: float = 50.0

    def to_mapping(self) -> dict:
        d: dict[str, Any] = {"source": self.source.to_mapping()}
        if self.reference is not None:
            d["reference"] = self.reference.to_mapping()
        if self.mains_hz != 50.0 and "mains_hz" not in d["source"]:
            d["reference" if self.reference is not None else "source"]["mains_hz"] = _num(self.mains_hz)
        if self.frontend is not None:
            d["frontend"] = self.frontend.to_mapping()
        design = self.design.to_mapping()
        if design:
            d["design"] = design
        d["chains"] = [c.to_mapping() for c in self.chains]
        d["output"] = self.output.to_mapping()
        return d

    def to_toml(self, header: str = "") -> str:
        """TOML text that :func:`parse_config` reads back to equal settings."""
        return toml_text(self.to_mapping(), header=header)

    def at_rate(self, rate_hz: float, channels: int = MAX_CHANNELS) -> "Settings":
        """Re-validate every rate-dependent value at ``rate_hz`` (a source that
        dictates its own rate, such as a file or the serial firmware)."""
        doc = self.to_mapping()
        doc["source"]["rate_hz"] = rate_hz
        return parse_config(doc, self.origin, channels=channels)

    def with_chain(self, index: int, chain: ChainSettings) -> "Settings":
        chains = list(self.chains)
        chains[index] = chain
        return replace(self, chains=tuple(chains))


def toml_text(doc: Mapping, header: str = "") -> str:
    """``doc`` as TOML text (tomli-w), ``header`` lines first as comments.

    ``None`` values are left out and numpy scalars become Python numbers, so
    a settings mapping, run.toml or a report's results can go in as they are.
    Floats are written as their shortest round-trip ``repr``.
    """
    lines = "".join(f"# {h}\n".replace("# \n", "#\n") for h in header.splitlines())
    return lines + tomli_w.dumps(_plain(doc))


def _plain(v: Any) -> Any:
    if isinstance(v, Mapping):
        return {str(k): _plain(x) for k, x in v.items() if x is not None}
    if isinstance(v, (list, tuple)):
        return [_plain(x) for x in v if x is not None]
    if hasattr(v, "item") and not isinstance(v, (str, bytes)):
        return _plain(v.item())
    if isinstance(v, Path):
        return str(v)
    return v


def _num(x: float) -> float | int:
    return int(x) if float(x).is_integer() else float(x)


def _table(doc: Mapping, key: str, path: str) -> Mapping:
    v = doc.get(key, {})
    if not isinstance(v, Mapping):
        raise SettingError(path, v, "must be a table")
    return v


def _unknown(table: Mapping, known: tuple, path: str, what: str) -> None:
    try:
        fields.check_keys(table, known, what)
    except SettingError as e:
        raise (e.within(path) if path else e) from None


def _positive_number(v: Any, path: str, what: str) -> float:
    return fields.number(v, path, 0, None, inclusive=False,
                         allowed=f"must be a positive number ({what})")


def parse_source(table: Mapping) -> SourceSettings:
    """Validate the common keys of ``[source]``; the driver checks the rest."""
    from livefilt.acquire.source import SOURCE_KEYS, driver_names

    driver = table.get("driver", "simulated")
    if driver not in driver_names():
        raise SettingError("source.driver", driver,
                           "unknown driver; known: " + ", ".join(driver_names()))
    rate = _positive_number(table.get("rate_hz", 48000), "source.rate_hz", "samples per second")
    if not 100 <= rate <= 1_000_000:
        raise SettingError("source.rate_hz", table.get("rate_hz"), "must be between 100 and 1000000 Hz")
    block = fields.integer(table.get("block", 256), "source.block", 16, 65536,
                           "must be a whole number of frames from 16 to 65536")
    options = {k: v for k, v in table.items() if k not in SOURCE_KEYS}
    return SourceSettings(driver, rate, block, options)


def parse_chain(table: Mapping, fs: float, index: int = 0, channels: int = MAX_CHANNELS) -> ChainSettings:
    """Validate one chain table; errors name ``chains[index].…``."""
    path = f"chains[{index}]"
    if not isinstance(table, Mapping):
        raise SettingError(path, table, "must be a table")
    _unknown(table, _CHAIN, path, "a chain")
    name = table.get("name", "AB"[index] if index < 2 else f"C{index}")
    if not isinstance(name, str) or not name.strip() or len(name) > 24:
        raise SettingError(f"{path}.name", name, "must be a short non-empty text (at most 24 characters)")
    inp = table.get("input", 0)
    if isinstance(inp, bool) or not isinstance(inp, (int, str)):
        raise SettingError(f"{path}.input", inp, "must be a channel number or a channel name")
    if isinstance(inp, int) and not 0 <= inp < channels:
        raise SettingError(f"{path}.input", inp, f"must be a channel from 0 to {channels - 1}")
    raw_stages = table.get("stages", [])
    if not isinstance(raw_stages, list):
        raise SettingError(f"{path}.stages", raw_stages, "must be a list of stage tables")
    stages = []
    for j, st in enumerate(raw_stages):
        where = f"{path}.stages[{j}]"
        if not isinstance(st, Mapping):
            raise SettingError(where, st, "must be a table such as { type = \"lowpass\", cutoff_hz = 2000 }")
        try:
            stages.append(StageSpec.from_mapping(st, fs))
        except SettingError as e:
            raise e.within(where) from None
    det = table.get("detector", {"type": "lockin", "time_constant_s": 0.05})
    if not isinstance(det, Mapping):
        raise SettingError(f"{path}.detector", det, "must be a table")
    try:
        detector = DetectorSpec.from_mapping(det, fs)
    except SettingError as e:
        raise e.within(f"{path}.detector") from None
    return ChainSettings(name.strip(), inp, tuple(stages), detector)


def parse_config(doc: Mapping, origin: str = "<settings>", channels: int = MAX_CHANNELS) -> Settings:
    """Validate a parsed TOML document into :class:`Settings`.

    Raises
    ------
    SettingError
        The first invalid value, with its full field path.
    """
    _unknown(doc, _TOP, "", "a config")
    src_table = _table(doc, "source", "source")
    ref_table = doc.get("reference")
    if ref_table is not None and not isinstance(ref_table, Mapping):
        raise SettingError("reference", ref_table, "must be a table")
    mains, src_table, ref_table = _mains(src_table, ref_table)
    source = parse_source(src_table)
    fs = source.rate_hz
    reference = None
    if ref_table is not None:
        try:
            reference = ReferenceSpec.from_mapping(ref_table, fs, channels)
        except SettingError as e:
            raise e.within("reference") from None
    raw_chains = doc.get("chains", [])
    if not isinstance(raw_chains, list) or not raw_chains:
        raise SettingError("chains", raw_chains, "needs at least one [[chains]] table")
    if len(raw_chains) > MAX_CHAINS:
        raise SettingError("chains", f"{len(raw_chains)} chains", f"at most {MAX_CHAINS} chains")
    chains = tuple(parse_chain(t, fs, i, channels) for i, t in enumerate(raw_chains))
    names = [c.name for c in chains]
    for i, n in enumerate(names):
        if names.index(n) != i:
            raise SettingError(f"chains[{i}].name", n, "must differ from the other chains' names")
    for i, c in enumerate(chains):
        if c.detector.type in ("lockin", "boxcar") and reference is None and not _self_referenced(source):
            raise SettingError(f"chains[{i}].detector.type", "lockin",
                               "a lock-in needs a [reference] table with frequency_hz or channel")
    out_t = _table(doc, "output", "output")
    _unknown(out_t, _OUTPUT, "output", "[output]")
    interval = _positive_number(out_t.get("interval_s", 0.05), "output.interval_s", "seconds")
    if interval * fs < 1 or interval > 60:
        raise SettingError("output.interval_s", out_t.get("interval_s"),
                           f"must be between one sample period ({1 / fs:.3g} s) and 60 s")
    frontend = None
    if "frontend" in doc:
        try:
            frontend = Frontend.from_mapping(doc["frontend"])
        except SettingError as e:
            raise e.within("frontend") from None
    try:
        design = DesignSpec.from_mapping(doc.get("design", {}))
    except SettingError as e:
        raise e.within("design") from None
    return Settings(source, reference, chains, OutputSettings(interval), origin,
                    frontend, design, mains)


def _mains(src: Mapping, ref: Mapping | None) -> tuple[float, Mapping, Mapping | None]:
    """``mains_hz`` from ``[reference]`` or ``[source]`` (50 or 60, default 50).

    Taken out of both tables, except that a driver with its own ``mains_hz``
    option (the simulated bench) keeps it in ``[source]``.
    """
    from livefilt.acquire.source import driver_names, load_driver

    found = {}
    for name, table in (("source", src), ("reference", ref)):
        if table is not None and "mains_hz" in table:
            v = table["mains_hz"]
            if isinstance(v, bool) or v not in MAINS_HZ:
                raise SettingError(f"{name}.mains_hz", v, "must be 50 or 60 (Hz)")
            found[name] = float(v)
    if len(set(found.values())) > 1:
        raise SettingError("reference.mains_hz", ref["mains_hz"],
                           f"differs from source.mains_hz = {src['mains_hz']!r}: give it once")
    mains = next(iter(found.values()), 50.0)
    driver = src.get("driver", "simulated")
    keeps = driver in driver_names() and "mains_hz" in load_driver(driver).options
    if "source" in found and not keeps:
        src = {k: v for k, v in src.items() if k != "mains_hz"}
    if "reference" in found:
        ref = {k: v for k, v in ref.items() if k != "mains_hz"}
    return mains, src, ref


def _self_referenced(source: SourceSettings) -> bool:
    """True when the source announces the modulation itself (``reference_hint``),
    so a lock-in may go without a ``[reference]`` table: the serial firmware's
    self-description, or a sound card that drives the light source."""
    return source.driver == "serial" or (source.driver == "soundcard" and "drive" in source.options)


def load_config(path: str | Path) -> Settings:
    """Read and validate a TOML config file.

    Raises SettingError for a missing file or a TOML syntax error too, in one line.
    """
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise SettingError("--config", str(path), "file not found") from None
    except OSError as e:
        raise SettingError("--config", str(path), f"cannot be read ({e.strerror})") from None
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as e:
        raise SettingError("--config", str(path), f"is not valid TOML: {e}") from None
    return parse_config(doc, str(p))


def demo_config() -> Settings:
    """The built-in demo: a greenhouse canopy-height sensor on the simulated bench."""
    text = resources.files("livefilt").joinpath("scenes/demo.toml").read_text(encoding="utf-8")
    return parse_config(tomllib.loads(text), "<built-in demo>")

"""Config loading: every invalid value gives one line naming the field path."""

import subprocess
import sys
import tomllib

import pytest

from livefilt.config import demo_config, load_config, parse_config
from livefilt.errors import SettingError


def demo_doc():
    return demo_config().to_mapping()


def test_demo_round_trips_through_toml(tmp_path):
    s = demo_config()
    p = tmp_path / "saved.toml"
    p.write_text(s.to_toml("saved"))
    again = load_config(p)
    assert again.to_mapping() == s.to_mapping()
    assert tomllib.loads(p.read_text())["source"]["driver"] == "simulated"


def test_shipped_configs_load():
    import pathlib
    for p in sorted(pathlib.Path(__file__).parent.parent.joinpath("configs").glob("*.toml")):
        load_config(p)


@pytest.mark.parametrize("mutate, field, allowed", [
    (lambda d: d["chains"][0]["stages"][2].update(band_hz=[1200, 30000]),
     r"chains\[0\]\.stages\[2\]\.band_hz", "Nyquist"),
    (lambda d: d["chains"][0]["stages"][0].update(cutoff_hz=24000),
     r"chains\[0\]\.stages\[0\]\.cutoff_hz = 24000", "Nyquist"),
    (lambda d: d["chains"][1]["stages"][0].update(r_ohm="10q"),
     r"chains\[1\]\.stages\[0\]\.r_ohm", ""),
    (lambda d: d["chains"][0]["detector"].update(slope_db_oct=30),
     r"chains\[0\]\.detector\.slope_db_oct = 30", "6, 12, 18"),
    (lambda d: d["source"].update(rate_hz=-1), r"source\.rate_hz = -1", "positive"),
    (lambda d: d["source"].update(block=7), r"source\.block = 7", "16 to 65536"),
    (lambda d: d["source"].update(driver="magic"), r"source\.driver = 'magic'", "simulated"),
    (lambda d: d.update(extra={}), r"extra", "unknown key"),
    (lambda d: d["chains"][1].update(name="A"), r"chains\[1\]\.name = 'A'", "differ"),
    (lambda d: d["output"].update(interval_s=0), r"output\.interval_s = 0", "positive"),
    (lambda d: d["reference"].update(frequency_hz=30000), r"reference\.frequency_hz", ""),
    (lambda d: d.pop("reference"), r"chains\[0\]\.detector\.type", "reference"),
    (lambda d: d["chains"][0].update(input=99), r"chains\[0\]\.input = 99", "channel"),
    (lambda d: d.update(chains=[]), r"chains", "at least one"),
])
def test_invalid_values_name_the_field(mutate, field, allowed):
    d = demo_doc()
    mutate(d)
    with pytest.raises(SettingError, match=field) as e:
        parse_config(d)
    assert allowed in str(e.value)
    assert "\n" not in str(e.value)


def test_missing_file_and_bad_toml(tmp_path):
    with pytest.raises(SettingError, match="file not found"):
        load_config(tmp_path / "nope.toml")
    bad = tmp_path / "bad.toml"
    bad.write_text("[source\nrate_hz = 1")
    with pytest.raises(SettingError, match="not valid TOML"):
        load_config(bad)


def test_at_rate_rechecks_against_the_new_nyquist():
    s = demo_config()
    with pytest.raises(SettingError, match=r"reference\.frequency_hz = 1370.*Nyquist, 1000 Hz"):
        s.at_rate(2000)
    with pytest.raises(SettingError, match=r"chains\[0\]\.stages\[2\]\.band_hz"):
        s.at_rate(3000)


def test_cli_reports_one_line_and_exit_2(tmp_path):
    d = demo_doc()
    d["chains"][0]["stages"][0]["cutoff_hz"] = 30000
    from livefilt.config import toml_text as dumps
    p = tmp_path / "bad.toml"
    p.write_text(dumps(d))
    r = subprocess.run([sys.executable, "-m", "livefilt", "run", "--config", str(p), "--duration", "0.1"],
                       capture_output=True, text=True, timeout=60)
    assert r.returncode == 2
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and "Traceback" not in r.stderr
    assert lines[0].startswith("livefilt: chains[0].stages[0].cutoff_hz = 30000")
    assert "24000" in lines[0]


@pytest.mark.parametrize("mutate, field, allowed", [
    (lambda d: d["frontend"]["stages"][0].update(c_farad="-1n"),
     r"frontend\.stages\[0\]\.c_farad", "> 0"),
    (lambda d: d["frontend"].update(stages=[]), r"frontend\.stages", "list of stage tables"),
    (lambda d: d["design"].update(snr_db=100), r"design\.snr_db = 100", "-20 to 80"),
    (lambda d: d["design"].update(extra=1), r"design\.extra", "unknown key"),
    (lambda d: d["source"].update(mains_hz=55), r"source\.mains_hz = 55", "50 or 60"),
    (lambda d: d["reference"].update(mains_hz=60), r"reference\.mains_hz = 60", "give it once"),
])
def test_front_end_and_design_tables_name_the_field(mutate, field, allowed):
    d = demo_doc()
    mutate(d)
    with pytest.raises(SettingError, match=field) as e:
        parse_config(d)
    assert allowed in str(e.value) and "\n" not in str(e.value)


def test_mains_hz_from_reference_or_source():
    d = demo_doc()
    d["reference"]["mains_hz"] = 50
    assert parse_config(d).mains_hz == 50.0
    d = demo_doc()
    d["source"] = {"driver": "soundcard", "rate_hz": 48000, "drive": {"frequency_hz": 1370.0},
                   "mains_hz": 60}
    s = parse_config(d)
    assert s.mains_hz == 60.0 and "mains_hz" not in s.source.options  # not the card's option
    assert parse_config(s.to_mapping()).mains_hz == 60.0
    assert demo_config().mains_hz == 50.0 and demo_config().source.options["mains_hz"] == 50.0
# -- fuzzing the loader: random documents and mutated valid configs ------------------
from hypothesis import given, strategies as st  # noqa: E402

from livefilt.errors import LivefiltError  # noqa: E402
from tests.fuzzing import examples  # noqa: E402

_scalars = st.one_of(st.integers(-10 ** 6, 10 ** 6), st.floats(allow_nan=True),
                     st.booleans(), st.text(max_size=12),
                     st.sampled_from(["lowpass", "lockin", "rms", "4k7", "22n", "butterworth",
                                      "simulated", "file", "soundcard", "serial", "sine"]))
_values = st.recursive(_scalars, lambda kids: st.one_of(
    st.lists(kids, max_size=4), st.dictionaries(st.text(max_size=10), kids, max_size=4)),
    max_leaves=12)
_KEYS = ["source", "reference", "chains", "output", "stages", "detector", "type", "cutoff_hz",
         "band_hz", "order", "design", "rate_hz", "block", "driver", "frequency_hz",
         "time_constant_s", "interval_s", "input", "name", "at_hz", "r_ohm", "c_farad", "q"]


def _paths(doc, prefix=()):
    yield prefix
    if isinstance(doc, dict):
        for k, v in doc.items():
            yield from _paths(v, prefix + (k,))
    elif isinstance(doc, list):
        for i, v in enumerate(doc):
            yield from _paths(v, prefix + (i,))


def _load_says_one_line(doc) -> None:
    """The loader's contract: settings, or a LivefiltError of one line."""
    from livefilt.stream.engine import build_source
    try:
        s = parse_config(doc)
        build_source(s)  # the driver's own keys
    except LivefiltError as e:
        assert "\n" not in str(e) and str(e)
    # anything else (TypeError, KeyError, ...) fails the test with its traceback


@examples(300)
@given(doc=st.dictionaries(st.sampled_from(_KEYS), _values, max_size=5))
def test_fuzz_random_documents_never_raise_anything_else(doc):
    _load_says_one_line(doc)


@examples(120)
@given(data=st.data())
def test_fuzz_mutated_valid_configs(data):
    import copy
    doc = copy.deepcopy(demo_doc())
    paths = [p for p in _paths(doc) if p]
    for _ in range(data.draw(st.integers(1, 3))):
        path = data.draw(st.sampled_from(paths))
        parent = doc
        try:
            for k in path[:-1]:
                parent = parent[k]
            action = data.draw(st.sampled_from(["replace", "delete", "add"]))
            if action == "replace":
                parent[path[-1]] = data.draw(_values)
            elif action == "delete":
                del parent[path[-1]]
            elif isinstance(parent, dict):
                parent[data.draw(st.sampled_from(_KEYS))] = data.draw(_values)
        except (KeyError, IndexError, TypeError):
            pass  # an earlier mutation removed or replaced this path
    _load_says_one_line(doc)


@examples(60)
@given(text=st.one_of(st.text(max_size=200),
                      st.builds(lambda d: tomli_w_dumps(d), st.dictionaries(
                          st.sampled_from(_KEYS), _values, max_size=4))))
def test_fuzz_config_files_through_the_cli_exit_2_with_one_line(tmp_path_factory, text):
    import contextlib
    import io
    from livefilt import cli
    p = tmp_path_factory.mktemp("fuzz") / "c.toml"
    p.write_text(text, encoding="utf-8")
    err = io.StringIO()
    with contextlib.redirect_stderr(err), contextlib.redirect_stdout(io.StringIO()):
        code = cli.main(["run", "--config", str(p), "--duration", "0.05", "--fast"])
    lines = err.getvalue().strip().splitlines()
    if code == 2:
        assert len(lines) == 1 and lines[0].startswith("livefilt: "), err.getvalue()
    else:
        assert code == 0 and "Traceback" not in err.getvalue()


def tomli_w_dumps(d):
    import tomli_w
    try:
        return tomli_w.dumps(d)
    except (TypeError, ValueError):  # NaN keys or values tomli-w cannot write: raw text
        return repr(d)

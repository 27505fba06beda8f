"""livefilt.fields: one owner of field checking, so every table's messages read the same."""

import subprocess
import sys
import tomllib

import pytest

from livefilt import fields
from livefilt.config import parse_config, demo_config
from livefilt.errors import SettingError


@pytest.mark.parametrize("text,exact", [
    # The reference is Python's float() of the decimal literal: IEEE 754 round-to-nearest
    # of the exact decimal value (correctly rounded conversion, common practice).
    ("22n", "22e-9"), ("4n7", "4.7e-9"), ("2.2u", "2.2e-6"), ("4k7", "4.7e3"),
    ("470p", "470e-12"), ("100nF", "100e-9"), ("4R7", "4.7"), ("1M", "1e6"),
    ("3.3m", "3.3e-3"), ("2n2", "2.2e-9"), ("0.1u", "0.1e-6"), ("68µ", "68e-6"),
])
def test_si_values_are_the_nearest_float_to_the_decimal(text, exact):
    assert fields.si_value(text, "c_farad") == float(exact)


def test_22n_is_written_back_as_the_user_wrote_it():
    # 22 * 1e-9 is 2.2000000000000002e-08 in binary floating point; the stored value must
    # be the float nearest 22e-9, whose shortest round-trip repr is 2.2e-08.
    assert 22 * 1e-9 != 2.2e-08
    assert repr(fields.si_value("22n", "c_farad")) == "2.2e-08"
    doc = demo_config().to_mapping()
    doc["chains"][0]["stages"].append({"type": "rc", "r_ohm": "4k7", "c_farad": "22n"})
    text = parse_config(doc).to_toml()
    assert "2.2e-08" in text and "2.2000000000000002e-08" not in text
    assert tomllib.loads(text)["chains"][0]["stages"][-1]["c_farad"] == 2.2e-08


def test_messages_read_the_same_in_every_table():
    with pytest.raises(SettingError, match=r"^x = 1: unknown key; a drive table takes: a, b$"):
        fields.check_keys({"a": 0, "x": 1}, ("a", "b"), "a drive table")
    with pytest.raises(SettingError, match=r"^q = 0: must be a number > 0$"):
        fields.positive(0, "q")
    with pytest.raises(SettingError, match=r"^order = True: must be a whole number from 1 to 12$"):
        fields.integer(True, "order", 1, 12)
    with pytest.raises(SettingError, match=r"^pace = 'slow': must be \"realtime\" or \"fast\"$"):
        fields.choice("slow", "pace", ("realtime", "fast"))
    with pytest.raises(SettingError, match=r"^d = nan: must be a number from 0 to 1 m$"):
        fields.number(float("nan"), "d", 0, 1, "m")
    with pytest.raises(SettingError, match=r"^loop = 1: must be true or false$"):
        fields.boolean(1, "loop")
    with pytest.raises(SettingError, match=r"^cutoff_hz = \(not set\): required; a number$"):
        fields.required(fields.MISSING, "cutoff_hz", "a number")


@pytest.mark.parametrize("driver,extra", [
    ("simulated", {}), ("file", {"path": "x.wav"}), ("soundcard", {}), ("serial", {"port": "/dev/null"}),
])
def test_a_misspelled_source_key_lists_every_key_the_table_takes(driver, extra):
    from livefilt.stream.engine import build_source
    doc = demo_config().to_mapping()
    doc["source"] = {"driver": driver, **extra, "blokc": 512}
    if driver in ("soundcard", "serial"):
        doc["chains"] = [{"detector": {"type": "rms", "time_constant_s": 0.1}}]
        doc.pop("reference", None)
    with pytest.raises(SettingError) as info:
        build_source(parse_config(doc))
    msg = str(info.value)
    assert msg.startswith("source.blokc = 512: unknown key; ")
    assert "driver, rate_hz, block, " in msg  # the common keys, then the driver's own


def test_the_cli_says_it_in_one_line(tmp_path):
    cfg = tmp_path / "c.toml"
    cfg.write_text('[source]\ndriver = "simulated"\nblokc = 512\n[[chains]]\n'
                   '[chains.detector]\ntype = "rms"\ntime_constant_s = 0.1\n')
    p = subprocess.run([sys.executable, "-m", "livefilt", "run", "--config", str(cfg),
                        "--duration", "0.1"], capture_output=True, text=True, timeout=120)
    assert p.returncode == 2
    lines = p.stderr.strip().splitlines()
    assert len(lines) == 1, p.stderr
    assert "source.blokc = 512: unknown key" in lines[0] and "rate_hz, block" in lines[0]

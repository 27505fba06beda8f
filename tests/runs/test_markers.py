"""Distance markers: typed text and --marks schedules.

Unit factors: 1 ft = 0.3048 m and 1 in = 0.0254 m exactly (international yard
and pound agreement, 1959; common practice of the trade).
"""

import pytest

from livefilt.errors import LivefiltError, SettingError
from livefilt.runs.markers import check_marks_within, parse_distance, read_marks


@pytest.mark.parametrize("text, metres, note", [
    ("1.5", 1.5, ""),
    ("150 cm", 1.5, ""),
    ("2.4 m behind the shelf", 2.4, "behind the shelf"),
    ("6 ft", 6 * 0.3048, ""),
    ("12 in", 12 * 0.0254, ""),
    ("12 in, on the bench", 12 * 0.0254, "on the bench"),
    ("3 in the corner", 3.0, "in the corner"),
    ("850mm", 0.85, ""),
    ("2.4 meadow edge", 2.4, "meadow edge"),
    ("  0.5 M  ", 0.5, ""),
])
def test_typed_distances(text, metres, note):
    d, n = parse_distance(text)
    assert d == pytest.approx(metres, rel=1e-12)
    assert n == note


def test_moving_marks_have_no_distance():
    assert parse_distance("moving") == (None, "moving")
    assert parse_distance("- to the far bed") == (None, "moving: to the far bed")


@pytest.mark.parametrize("text", ["", "abc", "0", "-2", "2.4x", "1e9 m", "nan"])
def test_bad_typing_is_one_line(text):
    with pytest.raises(SettingError) as e:
        parse_distance(text)
    assert "\n" not in str(e.value) and str(e.value).startswith("distance")


def test_marks_file(tmp_path):
    p = tmp_path / "marks.csv"
    p.write_text("time_s,distance_m,note\n1.0,0.5,start\n4,1.0\n6,,\n8.5,2.0,far bed\n")
    m = read_marks(p)
    assert [x["time_s"] for x in m] == [1.0, 4.0, 6.0, 8.5]
    assert [x.get("distance_m") for x in m] == [0.5, 1.0, None, 2.0]
    assert m[2]["note"] == "moving" and m[3]["note"] == "far bed"
    check_marks_within(m, 9.0, p)
    with pytest.raises(LivefiltError, match=r"row 5: time_s = 8.5 is outside the run"):
        check_marks_within(m, 8.0, p)


@pytest.mark.parametrize("body, where", [
    ("time_s,distance_m\n1,0.5\nabc,1\n", "row 3: time_s = 'abc'"),
    ("1,0.5\n3,1\n2,2\n", "row 3: time_s = '2' comes before"),
    ("1,far\n", "row 1: distance_m = 'far'"),
    ("1,0.5,a,b\n", "row 1: expected time_s,distance_m"),
    ("-1,0.5\n", "row 1: time_s = '-1'"),
    ("1,-0.5\n", "row 1: distance_m = '-0.5'"),
])
def test_bad_marks_file_names_the_row(tmp_path, body, where):
    p = tmp_path / "m.csv"
    p.write_text(body)
    with pytest.raises(LivefiltError) as e:
        read_marks(p)
    assert where in str(e.value) and "\n" not in str(e.value)


def test_missing_marks_file(tmp_path):
    with pytest.raises(LivefiltError, match="no such marks file"):
        read_marks(tmp_path / "nope.csv")


def test_typed_markers_during_a_headless_run(tmp_path):
    """Lines typed into ``livefilt run`` (here through a pipe) become markers;
    a bad line gets a one-line hint and changes nothing."""
    import subprocess
    import sys
    import tomllib
    p = subprocess.Popen([sys.executable, "-m", "livefilt", "run", "--duration", "3", "--out", str(tmp_path)],
                         stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    out, err = p.communicate("1.5 m by the door\nfar away\n6 ft\n", timeout=60)
    assert p.returncode == 0 and "Traceback" not in err, err
    assert "marker at" in out and "1.5 m (by the door)" in out and "not a marker:" in out
    (folder,) = tmp_path.iterdir()
    marks = tomllib.loads((folder / "run.toml").read_text())["markers"]
    assert [m["distance_m"] for m in marks] == [1.5, 6 * 0.3048]
    assert marks[0]["note"] == "by the door"

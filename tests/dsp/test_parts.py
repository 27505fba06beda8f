"""Parts from a value series, checked against IEC 60063 and the RC law."""

import math

import numpy as np
import pytest

from livefilt.dsp import parts
from livefilt.errors import SettingError


# IEC 60063:2015 Table 1 (REFERENCES row 5, confirmed on a stored copy of the tables).
IEC_E6 = [1.0, 1.5, 2.2, 3.3, 4.7, 6.8]
IEC_E12 = [1.0, 1.2, 1.5, 1.8, 2.2, 2.7, 3.3, 3.9, 4.7, 5.6, 6.8, 8.2]
IEC_E24_EXTRA = [1.1, 1.3, 1.6, 2.0, 2.4, 3.0, 3.6, 4.3, 5.1, 6.2, 7.5, 9.1]


def test_e6_e12_e24_equal_the_iec_60063_tables():
    assert list(parts.series_values("E6", 1, 9.9)) == IEC_E6
    assert list(parts.series_values("E12", 1, 9.9)) == IEC_E12
    assert list(parts.series_values("E24", 1, 9.9)) == sorted(IEC_E12 + IEC_E24_EXTRA)


def test_e24_is_not_a_rounded_geometric_series():
    # IEC 60063: 27, 30, 33, 36, 39, 43, 47, 82 differ from round(10 * 10^(i/24))
    # (REFERENCES pitfalls), so the table must be typed, not computed
    geo = [round(10 * 10 ** (i / 24)) for i in range(24)]
    differ = [v for v, g in zip(parts.SERIES["E24"], geo) if v != g]
    assert differ == [27, 30, 33, 36, 39, 43, 47, 82]


def test_e96_against_the_tables():
    # E96 (IEC 60063, typed from memory, checked against stored public tables):
    # 96 values, spot values from the table, and E96 equals round(100 * 10^(i/96))
    e96 = parts.SERIES["E96"]
    assert len(e96) == 96 and len(set(e96)) == 96
    assert (e96[0], e96[23], e96[46], e96[67], e96[95]) == (100, 174, 301, 499, 976)
    assert list(e96) == [round(100 * 10 ** (i / 96)) for i in range(96)]


def test_series_values_span_decades_and_bounds():
    v = parts.series_values("E12", 100, 1e6)
    assert v[0] == 100 and v[-1] == 1e6 and 4700.0 in v and 4.7e3 in v
    c = parts.series_values("E6", 10e-12, 10e-6)
    assert c[0] == pytest.approx(10e-12) and c[-1] == pytest.approx(10e-6)
    assert 4.7e-9 in c  # exactly the float of "4.7n"


@pytest.mark.parametrize("fc", [0.5, 37.0, 1370.0, 8000.0, 123456.0])
@pytest.mark.parametrize("series", ["E6", "E12", "E24", "E96"])
def test_nearest_pair_obeys_the_rc_law_and_is_nearest(fc, series):
    # RC law fc = 1/(2 pi R C) (common practice); brute force over the whole ranges
    r, c, got = parts.nearest_pair(fc, series, series)
    assert got == pytest.approx(1 / (2 * math.pi * r * c), rel=1e-12)
    assert 100 <= r <= 1e6 and 10e-12 * 0.999 <= c <= 10e-6 * 1.001
    rs = parts.series_values(series, 100, 1e6)
    cs = parts.series_values(series, 10e-12, 10e-6)
    best = np.min(np.abs(np.log(1 / (2 * np.pi * rs[:, None] * cs[None, :]) / fc)))
    assert abs(math.log(got / fc)) == pytest.approx(best, abs=1e-12)
    # a series of n values a decade has steps of 10^(1/n): the pair is within half a step
    # of the product of two series, far inside one step of the series
    n = {"E6": 6, "E12": 12, "E24": 24, "E96": 96}[series]
    assert abs(math.log10(got / fc)) <= 0.5 / n + 0.02


def test_nearest_pair_worked_example():
    # 1/(2 pi 10k 1.6n) = 9947 Hz; E24 has 10k and 1.6n (hand check, RC law)
    r, c, got = parts.nearest_pair(1 / (2 * math.pi * 10e3 * 1.6e-9), "E24", "E24")
    assert (r, c) == (10e3, pytest.approx(1.6e-9))


def test_out_of_range_cutoff_is_one_line():
    with pytest.raises(SettingError, match="cutoff_hz = 1e-05: parts from 100 ohm") as e:
        parts.nearest_pair(1e-5, "E12", "E12")
    assert "\n" not in str(e.value)


def test_worst_case_spread_closed_form():
    # every part at the same end: fc / ((1 +- r)(1 +- c)) (RC law, common practice)
    s = parts.spread(1000.0, 1.0, 5.0)
    assert s.worst_low_hz == pytest.approx(1000 / (1.01 * 1.05))
    assert s.worst_high_hz == pytest.approx(1000 / (0.99 * 0.95))


def test_monte_carlo_interval_against_the_distribution():
    # R, C uniform within +-r, +-c: ln fc = -ln R - ln C.  With c >> r the 95 %
    # interval tends to 1/(1 +- 0.95 c) (uniform quantiles); closed form of the
    # uniform distribution, and inside the worst case
    s = parts.spread(1000.0, 0.0, 5.0)
    assert s.low95_hz == pytest.approx(1000 / (1 + 0.95 * 0.05), rel=2e-3)
    assert s.high95_hz == pytest.approx(1000 / (1 - 0.95 * 0.05), rel=2e-3)
    t = parts.spread(1000.0, 1.0, 5.0)
    assert t.worst_low_hz < t.low95_hz < 1000 < t.high95_hz < t.worst_high_hz

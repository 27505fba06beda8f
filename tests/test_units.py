"""Numbers with units for people (livefilt.units)."""

import math

from livefilt.units import distance, si


def test_distance_reads_to_the_millimetre():
    # rounding to 3 decimals, closed form; a tape or rule on the bench reads mm
    assert distance(8.0 / 3.0) == "2.667 m"
    assert distance(2.853333) == "2.853 m"
    assert distance(0.5) == "0.5 m"
    assert distance(3.0) == "3 m"
    assert distance(-0.0001) == "0 m"
    assert distance(math.nan) == "—" and distance(None) == "—"


def test_si_prefixes():
    assert si(0.001234, "V") == "1.234 mV"
    assert si(42e-6, "FS", fixed=True) == "42.00 µFS"

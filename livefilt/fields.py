"""Field checking for every settings table: one owner, so every message reads the same.

Each check takes a value and its field name relative to the table being read,
returns the value typed, or raises :class:`~livefilt.errors.SettingError`
``(field, value, allowed)``; callers higher up add their part of the path with
``SettingError.within``.  Stage, detector, reference, source, driver and
config tables all use these checks.

API
---
- :data:`MISSING`: the value of a key that is not set (shows as ``(not set)``).
- :func:`check_keys`: unknown keys, naming every key the table takes.
- :func:`real`, :func:`number`, :func:`positive`, :func:`integer`: numbers
  with ranges and units.
- :func:`choice`, :func:`boolean`, :func:`channel`, :func:`required`.
- :func:`si_value`: ``"4k7"``, ``"22n"``, ``"2.2u"`` as floats, parsed exactly
  (``"22n"`` is the float nearest 22e-9, written back as ``2.2e-08``).
- :func:`tidy`: ``30000.0`` shown as ``30000`` in messages.
"""

from __future__ import annotations

import math
import re
from decimal import Decimal
from typing import Any, Iterable, Mapping

from livefilt.errors import SettingError

__all__ = ["MISSING", "check_keys", "real", "number", "positive", "integer", "choice",
           "boolean", "channel", "required", "si_value", "tidy", "SI_FORM"]


class _Missing:
    def __repr__(self) -> str:
        return "(not set)"


#: The value of a key that is absent from its table.
MISSING: Any = _Missing()


def tidy(v: Any) -> Any:
    """Show 30000.0 as 30000 in messages."""
    if isinstance(v, float) and v.is_integer() and abs(v) < 1e15:
        return int(v)
    return v


def check_keys(table: Mapping[str, Any], takes: Iterable[str], what: str = "this table",
               belongs: Mapping[str, Iterable[str]] | None = None) -> None:
    """Refuse a key not in ``takes``, listing every key the table takes.

    ``what`` names the table in the message (``"a lowpass stage"``);
    ``belongs`` maps a key foreign to this table to the tables that own it,
    which the message names (``"it belongs to bandpass, bandstop"``).
    """
    takes = list(takes)
    for key in table:
        if key in takes:
            continue
        listing = f"{what} takes: {', '.join(takes)}"
        owners = list((belongs or {}).get(key, ()))
        if owners:
            raise SettingError(key, table[key], f"not a key of {what} (it belongs to "
                               f"{', '.join(owners)}); {listing}")
        raise SettingError(key, table[key], f"unknown key; {listing}")


def real(value: Any, field: str, allowed: str = "must be a finite number") -> float:
    """A finite int or float (booleans refused) as float."""
    if isinstance(value, bool) or not isinstance(value, (int, float)) \
            or not math.isfinite(value):
        raise SettingError(field, value, allowed)
    return float(value)


def number(value: Any, field: str, lo: float | None = None, hi: float | None = None,
           unit: str = "", inclusive: bool = True, allowed: str | None = None) -> float:
    """A finite number within ``lo`` .. ``hi`` (either may be None).

    The message says the range with its unit unless ``allowed`` words it.
    """
    if allowed is None:
        u = f" {unit}" if unit else ""
        if lo is not None and hi is not None:
            allowed = (f"must be a number from {tidy(lo)} to {tidy(hi)}{u}" if inclusive
                       else f"must be a number between {tidy(lo)} and {tidy(hi)}{u}, exclusive")
        elif lo is not None:
            allowed = f"must be a number {'>=' if inclusive else '>'} {tidy(lo)}{u}"
        elif hi is not None:
            allowed = f"must be a number {'<=' if inclusive else '<'} {tidy(hi)}{u}"
        else:
            allowed = "must be a finite number"
    v = real(value, field, allowed)
    below = lo is not None and (v < lo if inclusive else v <= lo)
    above = hi is not None and (v > hi if inclusive else v >= hi)
    if below or above:
        raise SettingError(field, value, allowed)
    return v


def positive(value: Any, field: str, unit: str = "") -> float:
    """A finite number above 0."""
    return number(value, field, 0, None, unit, inclusive=False)


def integer(value: Any, field: str, lo: int | None = None, hi: int | None = None,
            allowed: str | None = None) -> int:
    """A whole number (an int, not a float or boolean) within ``lo`` .. ``hi``."""
    if allowed is None:
        if lo is not None and hi is not None:
            allowed = f"must be a whole number from {lo} to {hi}"
        elif lo is not None:
            allowed = f"must be a whole number >= {lo}"
        else:
            allowed = "must be a whole number"
    if isinstance(value, bool) or not isinstance(value, int) \
            or (lo is not None and value < lo) or (hi is not None and value > hi):
        raise SettingError(field, value, allowed)
    return value


def choice(value: Any, field: str, options: Iterable[str]) -> str:
    """One of ``options``: two read ``must be "a" or "b"``, more ``must be one of: a, b, c``."""
    options = tuple(options)
    if isinstance(value, str) and value in options:
        return value
    if len(options) == 2:
        raise SettingError(field, value, f'must be "{options[0]}" or "{options[1]}"')
    raise SettingError(field, value, "must be one of: " + ", ".join(options))


def boolean(value: Any, field: str) -> bool:
    """``true`` or ``false`` (no 0/1, no strings)."""
    if not isinstance(value, bool):
        raise SettingError(field, value, "must be true or false")
    return value


def channel(value: Any, field: str) -> int | None:
    """An input or output channel number, 0-based; None stays None."""
    if value is None or value is MISSING:
        return None
    return integer(value, field, 0, None, "must be a channel number, 0-based (0 or more)")


def required(value: Any, field: str, allowed: str) -> Any:
    """Refuse a missing value with ``required; <allowed>``."""
    if value is MISSING:
        raise SettingError(field, value, "required; " + allowed)
    return value


# -- values with SI prefixes ------------------------------------------------
_SI_EXP = {"": 0, "R": 0, "p": -12, "n": -9, "u": -6, "µ": -6, "μ": -6, "m": -3,
           "k": 3, "K": 3, "M": 6, "G": 9}
_UNIT = r"(?:F|Ω|[oO]hms?)?"
_SI_PLAIN = re.compile(
    r"^\s*(?P<num>[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?)\s*"
    r"(?P<prefix>[pnuµμmkKMG]?)" + _UNIT + r"\s*$")
_SI_RKM = re.compile(r"^\s*(?P<int>\d+)(?P<prefix>[pnuµμmkKMGR])(?P<frac>\d+)" + _UNIT + r"\s*$")
#: What :func:`si_value` accepts, in words.
SI_FORM = ('must be a number > 0 or a string with an SI prefix, e.g. "10k", "4.7k", '
           '"4k7", "1M", "100n", "2.2u", "470p"')


def si_value(value: Any, field: str) -> float:
    """A component value: a number, or a string with an SI prefix, as a float.

    Accepted strings: ``"10k"``, ``"4.7k"``, ``"1M"``, ``"100n"``, ``"2.2u"``
    (also ``"µ"``), ``"470p"``, ``"1e-9"``, the IEC 60062 letter-as-decimal-point
    form (``"4k7"``, ``"2n2"``, ``"4R7"``), optionally followed by the unit
    (``"F"``, ``"Ω"``, ``"ohm"``).  ``m`` is milli, ``M`` mega.  The decimal
    digits are scaled exactly (:class:`decimal.Decimal`) and rounded once, so
    ``"22n"`` gives the float nearest 22e-9 (``2.2e-08``), not ``22 * 1e-9``.
    """
    if isinstance(value, bool):
        raise SettingError(field, value, SI_FORM)
    if isinstance(value, (int, float)):
        return float(value)
    if isinstance(value, str):
        m = _SI_PLAIN.match(value)
        if m is not None:
            return float(Decimal(m["num"]).scaleb(_SI_EXP[m["prefix"]]))
        m = _SI_RKM.match(value)
        if m is not None:
            return float(Decimal(f"{m['int']}.{m['frac']}").scaleb(_SI_EXP[m["prefix"]]))
    raise SettingError(field, value, SI_FORM)

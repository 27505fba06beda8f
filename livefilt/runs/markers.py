"""Distance markers from what people type and from schedule files.

- :func:`parse_distance` turns a typed line into metres and a note:
  ``"1.5"`` (bare numbers are metres), ``"150 cm"``, ``"2.4 m behind the shelf"``,
  ``"6 ft"``, ``"12 in"``; units m, cm, mm, ft, in (1 ft = 0.3048 m and
  1 in = 0.0254 m exactly, by the 1959 international yard and pound
  agreement).  A line that starts with ``moving`` or ``-`` marks the target
  in motion (no distance): it ends the segment before it.
- :func:`read_marks` reads a ``--marks`` schedule, CSV with the columns
  ``time_s,distance_m[,note]`` (times in seconds of the run's data, rising),
  and names the row of any problem in one line.

A marker is a dict ``{"time_s", "distance_m"?, "note"?}`` (run.toml's form,
see :func:`livefilt.runs.record.make_marker`).
"""

from __future__ import annotations

import csv
import math
import re
from pathlib import Path

from livefilt.errors import LivefiltError, SettingError

__all__ = ["parse_distance", "read_marks", "check_marks_within", "UNITS", "MOVING", "HINT"]

UNITS = {"m": 1.0, "cm": 0.01, "mm": 0.001, "ft": 0.3048, "in": 0.0254}
MOVING = "moving"
MAX_M = 10_000.0
HINT = ('type a distance and Enter: "1.5" (metres), "150 cm", "2.4 m behind the shelf", '
        '"6 ft", "12 in"; "moving" while the target moves')

_NUMBER = r"[+-]?(?:\d+(?:[.,]\d*)?|[.,]\d+)(?:[eE][+-]?\d+)?"
_LINE = re.compile(rf"^(?P<num>{_NUMBER})(?P<gap>\s*)(?:(?P<unit>mm|cm|ft|in|m)(?![A-Za-z]))?(?P<rest>.*)$",
                   re.S | re.I)


def parse_distance(text: str) -> tuple[float | None, str]:
    """``(metres, note)`` from a typed line; ``(None, note)`` for a moving target.

    ``in`` followed by words reads as part of the note ("3 in the corner" is
    3 m); write "12 in, on the shelf" for inches with a note.

    Raises
    ------
    SettingError
        Field ``distance``: not a distance, zero, negative or beyond 10 km.
    """
    line = text.strip()
    low = line.lower()
    if low == "-" or low.startswith("- ") or low == MOVING or low.startswith(MOVING + " "):
        rest = line[1:] if low.startswith("-") else line[len(MOVING):]
        rest = rest.strip(" ,;:-")
        return None, (MOVING + (f": {rest}" if rest else ""))
    m = _LINE.match(line)
    if not m:
        raise SettingError("distance", line, HINT)
    unit, rest = (m.group("unit") or "").lower(), m.group("rest")
    if unit == "in" and re.match(r"\s+[A-Za-z]", rest):
        unit, rest = "", m.group("unit") + rest
    if rest and not unit and not m.group("gap"):
        raise SettingError("distance", line, "put a space between the number and the note; "
                           "units are m, cm, mm, ft, in")
    value = float(m.group("num").replace(",", "."))
    metres = value * UNITS[unit or "m"]
    if not (math.isfinite(metres) and 0 < metres <= MAX_M):
        raise SettingError("distance", line, "must be a distance above 0 and up to 10 km")
    return metres, rest.strip(" \t,;:-")


def read_marks(path) -> list[dict]:
    """Markers from a CSV schedule ``time_s,distance_m[,note]``.

    Each marker carries ``row`` (the file's row, for messages; not stored).
    A first row naming the columns is optional.  An empty ``distance_m`` (or
    ``moving``) marks the target in motion.  Raises :class:`LivefiltError`
    naming the file and row (1-based, as a spreadsheet numbers them).
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8-sig")
    except FileNotFoundError:
        raise LivefiltError(f"{path}: no such marks file") from None
    except (OSError, UnicodeDecodeError) as e:
        raise LivefiltError(f"{path}: cannot read the marks file ({getattr(e, 'strerror', None) or e})") from None
    marks: list[dict] = []
    last = -math.inf
    for row_no, row in enumerate(csv.reader(text.splitlines()), start=1):
        if not row or all(not c.strip() for c in row) or row[0].lstrip().startswith("#"):
            continue
        cells = [c.strip() for c in row]
        if row_no == 1 and cells[0].lower() == "time_s":
            continue
        where = f"{path} row {row_no}"
        if len(cells) < 2 or len(cells) > 3:
            raise LivefiltError(f"{where}: expected time_s,distance_m[,note], got {len(cells)} column(s)")
        try:
            t = float(cells[0])
        except ValueError:
            raise LivefiltError(f"{where}: time_s = {cells[0]!r}: must be a number of seconds") from None
        if not (math.isfinite(t) and t >= 0):
            raise LivefiltError(f"{where}: time_s = {cells[0]!r}: must be 0 s or later")
        if t < last:
            raise LivefiltError(f"{where}: time_s = {cells[0]!r} comes before the row above "
                                f"({last:g} s): sort the rows by time")
        last = t
        note = cells[2] if len(cells) == 3 else ""
        d_text = cells[1]
        if d_text == "" or d_text.lower() == MOVING:
            marks.append({"time_s": t, "note": MOVING + (f": {note}" if note else ""), "row": row_no})
            continue
        try:
            d = float(d_text)
        except ValueError:
            raise LivefiltError(f"{where}: distance_m = {d_text!r}: must be a number of metres "
                                "(or empty while the target moves)") from None
        if not (math.isfinite(d) and 0 < d <= MAX_M):
            raise LivefiltError(f"{where}: distance_m = {d_text!r}: must be above 0 and up to 10 km")
        m = {"time_s": t, "distance_m": d}
        if note:
            m["note"] = note
        m["row"] = row_no
        marks.append(m)
    if not marks:
        raise LivefiltError(f"{path}: no markers (expected rows time_s,distance_m[,note])")
    return marks


def check_marks_within(marks: list[dict], end_s: float, path) -> None:
    """Raise naming the row of the first marker at or after the run's end ``end_s``."""
    for m in marks:
        if m["time_s"] >= end_s:
            raise LivefiltError(f"{path} row {m.get('row', '?')}: time_s = {m['time_s']:g} is outside "
                                f"the run (its data ends at {end_s:g} s)")

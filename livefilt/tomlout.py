"""A small TOML writer for livefilt's own documents (settings, run.toml).

The standard library reads TOML (tomllib) but does not write it.  This writes
the subset livefilt produces: tables, arrays of tables, inline tables for
stages, strings, booleans, integers, floats (``repr`` round-trips exactly),
datetimes as strings, and arrays of those.  Output is read back by tomllib.
"""

from __future__ import annotations

import math
from typing import Any, Mapping

__all__ = ["dumps"]


def _key(k: str) -> str:
    if k and all(c.isalnum() or c in "-_" for c in k):
        return k
    return _str(k)


def _str(s: str) -> str:
    out = s.replace("\\", "\\\\").replace('"', '\\"')
    out = out.replace("\n", "\\n").replace("\r", "\\r").replace("\t", "\\t")
    return f'"{out}"'


def _value(v: Any) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        if math.isnan(v):
            return "nan"
        if math.isinf(v):
            return "inf" if v > 0 else "-inf"
        return repr(v)
    if isinstance(v, str):
        return _str(v)
    if isinstance(v, Mapping):
        return "{ " + ", ".join(f"{_key(k)} = {_value(x)}" for k, x in v.items()
                                if x is not None) + " }"
    if isinstance(v, (list, tuple)):
        return "[" + ", ".join(_value(x) for x in v) + "]"
    if hasattr(v, "item"):  # numpy scalar
        return _value(v.item())
    return _str(str(v))


def _is_table_array(v: Any) -> bool:
    return isinstance(v, (list, tuple)) and bool(v) and all(isinstance(x, Mapping) for x in v)


def _emit(lines: list[str], path: str, table: Mapping, inline_arrays: bool) -> None:
    scalars = [(k, v) for k, v in table.items()
               if v is not None and not isinstance(v, Mapping)
               and not (_is_table_array(v) and not _inline_ok(k, inline_arrays))]
    for k, v in scalars:
        if _is_table_array(v):  # an array of small tables kept inline (stages)
            lines.append(f"{_key(k)} = [")
            for item in v:
                lines.append(f"  {_value(item)},")
            lines.append("]")
        else:
            lines.append(f"{_key(k)} = {_value(v)}")
    for k, v in table.items():
        sub = f"{path}.{_key(k)}" if path else _key(k)
        if isinstance(v, Mapping):
            lines.append("")
            lines.append(f"[{sub}]")
            _emit(lines, sub, v, inline_arrays)
        elif _is_table_array(v) and not _inline_ok(k, inline_arrays):
            for item in v:
                lines.append("")
                lines.append(f"[[{sub}]]")
                _emit(lines, sub, item, inline_arrays)


def _inline_ok(key: str, inline_arrays) -> bool:
    return bool(inline_arrays) and key in inline_arrays


def dumps(doc: Mapping, header: str = "", inline_arrays=("stages",)) -> str:
    """Serialise ``doc`` to TOML text.

    Parameters
    ----------
    doc : mapping
        Nested dicts and lists of plain values; ``None`` values are left out.
    header : str
        Comment lines put first (each prefixed with ``# ``).
    inline_arrays : sequence of str
        Keys whose arrays of tables are written as arrays of inline tables
        (one per line) rather than ``[[...]]`` sections.
    """
    lines = [f"# {h}" if h else "#" for h in header.splitlines()] if header else []
    _emit(lines, "", doc, inline_arrays)
    text = "\n".join(lines).strip("\n") + "\n"
    return text

"""A small TOML writer for nested tables of scalars and lists of scalars (the configs of trackfit).

Reading uses the standard library's :mod:`tomllib`; the standard library has no writer, and the configs only need
strings, booleans, integers, floats, lists of those and one level of tables, so this module writes exactly that.
"""

from __future__ import annotations

import math

__all__ = ["dumps"]


def _scalar(value) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if math.isnan(value):
            return "nan"
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        return repr(value)  # shortest repr that round-trips exactly
    if isinstance(value, str):
        escaped = value.replace("\\", "\\\\").replace('"', '\\"').replace("\n", "\\n").replace("\t", "\\t")
        return f'"{escaped}"'
    raise TypeError(f"cannot write a {type(value).__name__} as a TOML value (expected str, bool, int or float)")


def _value(value) -> str:
    if isinstance(value, list | tuple):
        return "[" + ", ".join(_scalar(v) for v in value) + "]"
    return _scalar(value)


def dumps(data: dict) -> str:
    """TOML text for a dict whose values are scalars, lists of scalars, or dicts of those (tables).

    Top-level scalars are written first, then one ``[table]`` per dict value, in insertion order.
    """
    lines = []
    tables = []
    for key, value in data.items():
        if isinstance(value, dict):
            tables.append((key, value))
        else:
            lines.append(f"{key} = {_value(value)}")
    for name, table in tables:
        if lines:
            lines.append("")
        lines.append(f"[{name}]")
        for key, value in table.items():
            if isinstance(value, dict):
                raise TypeError(f"table [{name}] holds a nested table '{key}'; only one level is supported")
            lines.append(f"{key} = {_value(value)}")
    return "\n".join(lines) + "\n"

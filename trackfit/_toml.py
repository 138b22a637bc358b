"""A small TOML writer for trackfit's settings files, and the two readers every settings file goes through.

Reading uses the standard library's :mod:`tomllib`: :func:`parse` and :func:`read_file` turn its errors (and a missing
file) into one-line errors that name the file, so no settings reader words them on its own.

The standard library has no TOML writer and the settings only need strings, booleans, integers, floats, (nested)
lists of those, and tables nested to any depth, so this module writes exactly that, such that
``tomllib.loads(dumps(d)) == d`` for every such ``d`` (floats keep their exact value; NaN and infinities are written
as TOML's ``nan`` and ``inf``). ``None`` values are left out, as TOML has no null.
"""

from __future__ import annotations

import math
import re
from collections.abc import Mapping

import numpy as np

__all__ = ["dumps", "format_value", "parse", "read_file"]


def parse(text: str, *, source: str = "TOML text", error: type[Exception] = ValueError) -> dict:
    """``tomllib.loads(text)``; invalid TOML raises ``error("<source>: not valid TOML (<reason>)")``."""
    import tomllib

    try:
        return tomllib.loads(text)
    except tomllib.TOMLDecodeError as err:
        raise error(f"{source}: not valid TOML ({err})") from None


def read_file(path, *, what: str = "settings file", error: type[Exception] = ValueError) -> tuple[dict, str]:
    """The content of a TOML file and the source label ``"<what> '<path>'"`` its readers put in front of errors.

    Raises
    ------
    FileNotFoundError
        ``"<what> '<path>' does not exist"``.
    error
        Invalid TOML, naming the file.
    """
    from pathlib import Path

    path = Path(path)
    source = f"{what} '{path}'"
    if not path.exists():
        raise FileNotFoundError(f"{source} does not exist")
    return parse(path.read_text(encoding="utf-8"), source=source, error=error), source


_BARE_KEY = re.compile(r"[A-Za-z0-9_-]+")


def _key(key) -> str:
    key = str(key)
    return key if _BARE_KEY.fullmatch(key) else _string(key)  # (``$`` would accept a key ending in a newline)


def _string(value: str) -> str:
    out = []
    for ch in value:
        if ch in _ESCAPES:
            out.append(_ESCAPES[ch])
        elif ord(ch) < 0x20 or ord(ch) == 0x7F:
            out.append(f"\\u{ord(ch):04x}")
        else:
            out.append(ch)
    return '"' + "".join(out) + '"'


_ESCAPES = {"\\": "\\\\", '"': '\\"', "\n": "\\n", "\t": "\\t", "\r": "\\r", "\b": "\\b", "\f": "\\f"}


def format_value(value) -> str:
    """One TOML value (scalar or array) as text."""
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, int):
        return str(value)
    if isinstance(value, float):
        if math.isnan(value):
            return "nan"
        if math.isinf(value):
            return "inf" if value > 0 else "-inf"
        return repr(value)  # shortest text that reads back as the same float
    if isinstance(value, str):
        return _string(value)
    if isinstance(value, list | tuple | np.ndarray):
        return "[" + ", ".join(format_value(v) for v in value) + "]"
    raise TypeError(f"cannot write a {type(value).__name__} as a TOML value "
                    "(expected str, bool, int, float or a list of them)")


def dumps(data: Mapping, *, header: str | None = None) -> str:
    """TOML text for a mapping of scalars, lists and (nested) mappings.

    Top-level values come first, then one ``[table]`` (``[table.sub]`` for nested ones) per mapping, in insertion
    order. ``header`` is written first as comment lines.
    """
    lines = [f"# {line}" if line else "#" for line in (header.splitlines() if header else [])]
    _write_table(lines, data, prefix=())
    return "\n".join(lines).lstrip("\n") + "\n"


def _write_table(lines, table: Mapping, prefix: tuple) -> None:
    scalars = [(k, v) for k, v in table.items() if not isinstance(v, Mapping) and v is not None]
    tables = [(k, v) for k, v in table.items() if isinstance(v, Mapping)]
    if prefix and (scalars or not tables):
        lines.append("")
        lines.append("[" + ".".join(_key(p) for p in prefix) + "]")
    for key, value in scalars:
        lines.append(f"{_key(key)} = {format_value(value)}")
    for key, value in tables:
        _write_table(lines, value, prefix + (key,))

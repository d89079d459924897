"""Plain TOML in and out: ``load_toml`` uses the standard library's ``tomllib``; ``dump_toml`` writes the small
subset grainwright's own files use (tables, arrays of tables, strings, numbers, booleans, flat lists).
"""
from __future__ import annotations

import math
import re
import tomllib
from pathlib import Path
from typing import Any

from grainwright.inference.common.atomic import write_text_atomic
from grainwright.inference.common.errors import ConfigError, InputError

_BARE_KEY = re.compile(r"^[A-Za-z0-9_-]+$")


def load_toml(path: str | Path) -> dict[str, Any]:
    """Read a TOML file; a missing or malformed file raises ``InputError`` naming it."""
    path = Path(path)
    try:
        with open(path, "rb") as handle:
            return tomllib.load(handle)
    except FileNotFoundError:
        raise InputError(path, "no such file") from None
    except tomllib.TOMLDecodeError as error:
        raise InputError(path, f"not valid TOML ({error})") from None
    except OSError as error:
        raise InputError(path, f"cannot read ({error.strerror or error})") from None


def dump_toml(data: dict[str, Any]) -> str:
    """Serialise a dict to TOML text: scalars first, then sub-tables, then arrays of tables.

    ``None`` values are left out (TOML has no null). Raises ``ConfigError`` for values TOML cannot hold.
    """
    lines: list[str] = []
    _write_table(data, [], lines)
    return "\n".join(lines).lstrip("\n") + "\n"


def write_toml(path: str | Path, data: dict[str, Any], header: str = "") -> None:
    """Write ``data`` as TOML atomically (temporary file in the same folder, then ``os.replace``).

    ``header`` lines are written first as ``#`` comments.
    """
    path = Path(path)
    text = "".join(f"# {line}\n" if line else "#\n" for line in header.splitlines()) + dump_toml(data)
    write_text_atomic(path, text)


def _is_table(value: Any) -> bool:
    return isinstance(value, dict)


def _is_table_array(value: Any) -> bool:
    return isinstance(value, (list, tuple)) and len(value) > 0 and all(isinstance(v, dict) for v in value)


def _write_table(table: dict[str, Any], prefix: list[str], lines: list[str]) -> None:
    for key, value in table.items():
        if value is None or _is_table(value) or _is_table_array(value):
            continue
        lines.append(f"{_key(key)} = {_value(value, '.'.join(prefix + [str(key)]))}")
    for key, value in table.items():
        if _is_table(value):
            name = prefix + [_key(key)]
            lines.append("")
            lines.append(f"[{'.'.join(name)}]")
            _write_table(value, name, lines)
    for key, value in table.items():
        if _is_table_array(value):
            name = prefix + [_key(key)]
            for item in value:
                lines.append("")
                lines.append(f"[[{'.'.join(name)}]]")
                _write_table(item, name, lines)


def _key(key: Any) -> str:
    key = str(key)
    return key if _BARE_KEY.match(key) else _string(key)


def _string(text: str) -> str:
    escaped = (
        text.replace("\\", "\\\\").replace('"', '\\"').replace("\n", "\\n").replace("\t", "\\t").replace("\r", "\\r")
    )
    return f'"{escaped}"'


def _value(value: Any, where: str) -> str:
    if isinstance(value, bool):
        return "true" if value else "false"
    if hasattr(value, "item") and not isinstance(value, (list, tuple, str)):  # numpy scalars
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
        return repr(value)
    if isinstance(value, (str, Path)):
        return _string(str(value))
    if isinstance(value, (list, tuple)):
        return "[" + ", ".join(_value(item, where) for item in value) + "]"
    raise ConfigError(f"{where}: cannot write a {type(value).__name__} value to TOML")

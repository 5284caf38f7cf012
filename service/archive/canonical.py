"""The canonical form of a record: the bytes that "the same record" means.

Keys sorted, UTF-8, no insignificant whitespace, floats as Python's shortest round-trip repr (so
parsing and re-serialising gives back the same bytes), and no NaN or infinity (JSON has none).
The SHA-256 of those bytes identifies the record.
"""

from __future__ import annotations

import json
import math
from collections.abc import Mapping
from typing import Any

from service.storage import sha256_hex


def canonical_json(obj: Any) -> bytes:
    """Canonical bytes of a JSON-compatible value (see the module docstring).

    Raises ValueError naming the offending path for NaN/infinity or non-JSON types, because a
    record that cannot round-trip exactly cannot be verified years later.
    """
    _check_finite(obj, "$")
    try:
        return canonical_dumps(obj)
    except TypeError as exc:
        raise ValueError(f"record is not plain JSON data: {exc}") from None


def canonical_dumps(obj: Any) -> bytes:
    """The canonical form itself; allow_nan=False still refuses NaN/inf, without naming the
    path (:func:`canonical_json` names it)."""
    return json.dumps(
        obj, sort_keys=True, ensure_ascii=False, separators=(",", ":"), allow_nan=False
    ).encode("utf-8")


def _refuse_constant(name: str) -> float:
    raise ValueError(f"{name} is not allowed in a canonical record")


def parse_record(data: bytes | str) -> Any:
    """Parse stored canonical JSON (refusing NaN/Infinity tokens that json.loads would accept)."""
    return json.loads(data, parse_constant=_refuse_constant)


def _check_finite(obj: Any, path: str) -> None:
    kind = type(obj)
    if kind is str or kind is int or kind is bool or obj is None:
        return
    if kind is float:
        if not math.isfinite(obj):
            raise ValueError(f"record field {path} is {obj!r}; JSON records cannot hold NaN/inf")
    elif isinstance(obj, float):
        _check_finite(float(obj), path)
    elif isinstance(obj, Mapping):
        for key, value in obj.items():
            if not isinstance(key, str):
                raise ValueError(f"record field {path} has a non-string key {key!r}")
            _check_finite(value, f"{path}.{key}")
    elif isinstance(obj, list | tuple):
        for index, value in enumerate(obj):
            _check_finite(value, f"{path}[{index}]")


def record_sha256(obj: Any) -> str:
    return sha256_hex(canonical_json(obj))


def loads_or_marker(text: str | None) -> Any:
    """A JSON column's value, or a marker that it does not parse (so it compares unequal)."""
    try:
        return json.loads(text) if text is not None else None
    except ValueError:
        return ("unparsable", text)


def short_repr(value: Any) -> str:
    """A value as a message shows it: JSON for tables and lists, cut at 80 characters."""
    text = repr(value) if not isinstance(value, dict | list) else json.dumps(value, sort_keys=True)
    return text if len(text) <= 80 else text[:77] + "…"

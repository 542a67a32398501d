"""How values are kept in SQLite columns: numpy scalars made plain, measure values encoded
exactly reversibly (value, kind, json), JSON text, float32 blobs, a path's text and bytes.
Private to the store: imported only by qcd.store and qcd.schema. No SQL here. Imports numpy
and qcd.errors.
"""
from __future__ import annotations

import json
import math
import os
from collections.abc import Iterable
from datetime import datetime
from pathlib import Path
from typing import Any

import numpy as np

from qcd.errors import path_bytes, printable

__all__: list[str] = []


def _path_key(path: Any) -> tuple[str, bytes | None]:
    """(text stored in files.path, bytes stored in files.path_bytes) of a path."""
    return printable(path), path_bytes(path)


def _plain(value: Any) -> Any:
    """numpy scalars -> Python scalars (np.float64 is a float already; np.int64, np.bool_ not)."""
    if isinstance(value, np.generic):
        return value.item()
    return value


def _real(value: Any) -> float | None:
    value = _plain(value)
    if isinstance(value, bool):
        return float(value)
    if isinstance(value, (int, float)) and math.isfinite(value):
        return float(value)
    return None


def _dumps(value: Any) -> str:
    return json.dumps(value, default=_json_default, sort_keys=False, allow_nan=True)


def _json_default(o: Any) -> Any:
    if isinstance(o, np.ndarray):
        return o.tolist()
    if isinstance(o, np.generic):
        return o.item()
    if isinstance(o, (set, frozenset)):
        return sorted(o)
    if isinstance(o, datetime):
        return o.isoformat()
    if isinstance(o, Path):
        return os.fspath(o)
    raise TypeError(f"cannot store a {type(o).__name__} as JSON")


def _encode_value(value: Any) -> tuple[float | None, str, str | None]:
    """A measure value -> (value column, kind, json column), exactly reversible."""
    value = _plain(value)
    if isinstance(value, bool):
        return float(value), "bool", None
    if isinstance(value, int):
        exact = abs(value) <= 2 ** 53
        return (float(value) if exact else None), "int", str(value)
    if isinstance(value, float):
        # NaN is stored by SQLite as NULL and -0.0 may come back as 0.0: keep them in text
        if math.isfinite(value) and not (value == 0.0 and math.copysign(1.0, value) < 0):
            return value, "float", None
        return None, "float", repr(value)
    return None, "json", _dumps(value)


def _decode_value(value: float | None, kind: str, text: str | None) -> Any:
    """Inverse of ``_encode_value``."""
    if kind == "bool":
        return bool(value)
    if kind == "int":
        return int(text) if text is not None else int(value)
    if kind == "float":
        return float(text) if text is not None else float(value)
    return json.loads(text) if text is not None else None


def _f32(values: Iterable[float]) -> bytes:
    return np.asarray(tuple(values), dtype="<f4").tobytes()


def _from_f32(blob: bytes) -> tuple[float, ...]:
    return tuple(float(x) for x in np.frombuffer(blob, dtype="<f4"))

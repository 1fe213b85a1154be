"""Plain Python copies of results (dicts, lists, numbers) for JSON and
notebooks: non-finite floats become None, tuples lists, complex numbers
``[re, im]``, numpy scalars and arrays Python numbers and lists,
dataclasses dicts. No numpy import needed."""

from __future__ import annotations

import math
import os


def plain(obj):
    """JSON-ready copy of ``obj`` (see the module docstring)."""
    if obj is None or isinstance(obj, (bool, str)):
        return obj
    if isinstance(obj, int):
        return obj
    if isinstance(obj, float):
        return obj if math.isfinite(obj) else None
    if isinstance(obj, complex):
        return [plain(obj.real), plain(obj.imag)]
    if isinstance(obj, dict):
        return {str(k): plain(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [plain(v) for v in obj]
    if hasattr(obj, "to_dict") and not isinstance(obj, type):
        return plain(obj.to_dict())
    if hasattr(obj, "__dataclass_fields__"):
        return {f: plain(getattr(obj, f)) for f in obj.__dataclass_fields__}
    if hasattr(obj, "tolist"):  # numpy scalar or array, without importing numpy
        return plain(obj.tolist())
    if hasattr(obj, "__fspath__"):
        return os.fspath(obj)
    raise TypeError(f"cannot turn {type(obj).__name__} into plain data")

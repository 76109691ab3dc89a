"""Plain, strict-JSON data from numbers and arrays: the one sanitiser.

Undefined numbers (NaN, infinities) become ``None`` (``null`` in JSON), numpy scalars and
arrays become Python numbers and lists, tuples become lists and paths become strings, so
``json.dumps(json_safe(x), allow_nan=False)`` always works.

Examples
--------
>>> import numpy as np
>>> json_safe({"t": np.float32(2.5), "p": float("nan"), "v": np.array([1, 2]), "ok": np.bool_(1)})
{'t': 2.5, 'p': None, 'v': [1, 2], 'ok': True}
>>> finite_or_none(np.array([np.inf])), finite_or_none(3)
(None, 3.0)
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from pathlib import PurePath
from typing import Any

import numpy as np

__all__ = ["finite_or_none", "json_safe"]


def json_safe(obj: Any) -> Any:
    """Recursively: numpy -> Python, NaN/inf -> None, tuples -> lists, paths -> str."""
    if isinstance(obj, Mapping):
        return {str(k): json_safe(v) for k, v in obj.items()}
    if isinstance(obj, np.ndarray):
        return [json_safe(v) for v in obj.tolist()]
    if isinstance(obj, (list, tuple)):
        return [json_safe(v) for v in obj]
    if isinstance(obj, (bool, np.bool_)):
        return bool(obj)
    if isinstance(obj, (int, np.integer)):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        v = float(obj)
        return v if math.isfinite(v) else None
    if isinstance(obj, PurePath):
        return str(obj)
    return obj


def finite_or_none(x: Any) -> float | None:
    """The first element of ``x`` (a number or an array) as a float, None when undefined.

    ``None`` stays ``None``.
    """
    if x is None:
        return None
    v = float(np.asarray(x, dtype=np.float64).reshape(-1)[0])
    return v if math.isfinite(v) else None

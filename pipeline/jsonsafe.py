"""The one JSON-safe conversion of the package (L* files, figure side files, package JSON,
summary attributes written as JSON text)."""

from __future__ import annotations

import math
from collections.abc import Mapping
from typing import Any

import numpy as np

__all__ = ['json_safe']


def json_safe(obj: Any) -> Any:
    """A copy of ``obj`` that :func:`json.dumps` writes as strict JSON.

    Mappings become dicts with string keys, tuples, lists and arrays become lists, NumPy
    scalars become Python numbers, non-finite floats become ``None`` (JSON has no NaN) and
    paths and any other object become strings.

    Parameters
    ----------
    obj : Any

    Returns
    -------
    Any
    """
    if isinstance(obj, Mapping):
        return {str(k): json_safe(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [json_safe(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return [json_safe(v) for v in obj.tolist()]
    if isinstance(obj, (np.bool_, bool)):
        return bool(obj)
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        f = float(obj)
        return f if math.isfinite(f) else None
    if isinstance(obj, (str, int)) or obj is None:
        return obj
    return str(obj)

"""JSON every reader can parse: numpy values made plain, NaN and infinity written as null.

Python's ``json`` writes ``NaN`` and ``Infinity`` by default, which RFC 8259 (section 6)
does not allow and many readers refuse. The kit's JSON writers map non-finite numbers
to ``null`` here, in one place, and then write with ``allow_nan=False`` so that nothing
non-finite can slip through.
"""

from __future__ import annotations

import json
import math
from typing import Any

import numpy as np

__all__ = ["json_ready", "dumps"]


def json_ready(o: Any) -> Any:
    """``o`` with numpy scalars and arrays made plain and non-finite numbers as None.

    Dicts, lists and tuples are walked (tuples become lists); other values pass unchanged.
    """
    if isinstance(o, dict):
        return {k: json_ready(v) for k, v in o.items()}
    if isinstance(o, list | tuple):
        return [json_ready(v) for v in o]
    if isinstance(o, np.ndarray):
        return json_ready(o.tolist())
    if isinstance(o, bool | np.bool_):
        return bool(o)
    if isinstance(o, np.integer):
        return int(o)
    if isinstance(o, float | np.floating):
        return float(o) if math.isfinite(o) else None
    return o


def dumps(obj: Any, **kwargs: Any) -> str:
    """``json.dumps`` of :func:`json_ready` (obj), refusing any NaN or infinity left over.

    Args:
        obj: what to write.
        **kwargs: passed to ``json.dumps`` (``allow_nan`` is always False).
    """
    kwargs["allow_nan"] = False
    return json.dumps(json_ready(obj), **kwargs)

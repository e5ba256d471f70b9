"""JSON that every reader can parse: non-finite numbers become null, in one place."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest

from trainkit.core.jsonsafe import dumps, json_ready


def strict_loads(text: str):
    """json.loads refusing NaN and Infinity, which RFC 8259 (section 6) does not allow."""
    return json.loads(text, parse_constant=lambda c: pytest.fail(f"{c} in the JSON"))


def test_non_finite_numbers_become_null_and_numpy_becomes_plain():
    obj = {
        "nan": float("nan"),
        "inf": -math.inf,
        "np": np.float32("nan"),
        "arr": np.array([1.5, np.inf]),
        "i": np.int64(3),
        "b": np.bool_(True),
        "nested": [{"x": (1.0, float("inf"))}],
    }
    want = {
        "nan": None,
        "inf": None,
        "np": None,
        "arr": [1.5, None],
        "i": 3,
        "b": True,
        "nested": [{"x": [1.0, None]}],
    }
    assert json_ready(obj) == want
    assert strict_loads(dumps(obj)) == want
    # the standard library writes bare NaN by default: the reason for this module
    assert "NaN" in json.dumps({"x": float("nan")})


def test_dumps_passes_options_and_refuses_what_it_cannot_make_finite():
    assert dumps({"a": 1}, indent=2) == '{\n  "a": 1\n}'
    with pytest.raises(TypeError):
        dumps({"a": object()})

"""trainkit: build, check and export a CPU-only concrete-crack patch screener.

Nothing heavy is imported here: ``from trainkit import Screener`` loads only numpy
and onnxruntime.
"""

from __future__ import annotations

__version__ = "0.1.0"

__all__ = ["Screener", "CrackMap", "__version__"]


def __getattr__(name: str):
    if name in ("Screener", "CrackMap"):
        from . import screener

        return getattr(screener, name)
    raise AttributeError(f"module 'trainkit' has no attribute {name!r}")

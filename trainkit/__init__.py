"""trainkit: build, check and export a CPU-only concrete-crack patch screener.

Nothing heavy is imported here: ``from trainkit import Screener`` loads only numpy,
Pillow and ONNX Runtime. The version comes from the installed package metadata.
"""

from __future__ import annotations

from importlib import metadata as _metadata

#: Distribution name on the package index (the import name stays ``trainkit``).
DISTRIBUTION = "trainkit-concrete"

try:
    __version__ = _metadata.version(DISTRIBUTION)
except _metadata.PackageNotFoundError:  # running from a source tree that was never installed
    __version__ = "0+unknown"

__all__ = ["Screener", "CrackMap", "__version__"]


def __getattr__(name: str):
    if name in ("Screener", "CrackMap"):
        from trainkit import screener

        return getattr(screener, name)
    raise AttributeError(f"module 'trainkit' has no attribute {name!r}")

"""Inference: load an exported screener (ONNX) and turn frames into patch-level crack maps.

Needs only numpy, Pillow and ONNX Runtime: nothing here imports torch, OpenCV or the
training side of the kit (a test walks the imports).
"""

from trainkit.screener.crackmap import CrackMap
from trainkit.screener.model import CONTRACT_VERSIONS, FramePatches, Screener, ScreenerError

__all__ = ["Screener", "CrackMap", "ScreenerError", "FramePatches", "CONTRACT_VERSIONS"]

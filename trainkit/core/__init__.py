"""The torch-free core: the ONNX contract, the tile grid, photo decoding, crash-safe writes, core count."""

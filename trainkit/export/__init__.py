"""Export: a checked experiment to one ONNX screener file (familiarity and cascade graphs, int8)."""

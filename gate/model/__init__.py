"""Loading an ONNX file into a small immutable graph of layers (no weights read)."""

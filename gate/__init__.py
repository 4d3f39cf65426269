"""roofgate: analytical per-layer profiling of ONNX models against edge accelerator targets."""

__version__ = "0.1.0"

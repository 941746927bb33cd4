"""Limner runtime: model loading, capture, pipeline, display, shows and the `limner`
command. Imports only numpy, OpenCV and onnxruntime (no torch)."""

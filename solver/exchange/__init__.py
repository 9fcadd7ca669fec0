"""Model exchange: export stored runs to ONNX, read ONNX / open-table models for a challenge."""

"""Network -> descriptors: backbones, layer taps, pooling, the torch and ONNX Runtime engines."""

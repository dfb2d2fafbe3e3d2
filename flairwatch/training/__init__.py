"""Model training (the ``train`` extra; needs torch): data, network, training loop, ONNX export."""

"""Export: ONNX files, the cut path every exported model takes, and manifests."""

"""On-device latency measurement: numpy + onnxruntime only.

Every module in this sub-package imports only the standard library, numpy,
onnxruntime and its sibling modules, so the runner can be copied to an edge
device that has no torch and none of the training code.
"""

"""tightfit: train one elastic supernet, cut the most accurate subnet that fits each latency budget.

This package root stays free of torch imports so that the on-device pieces
(tightfit.ondevice, tightfit.ondevice.verify) run with only numpy and onnxruntime installed.
"""
__version__ = "0.1.0"

"""The model: search space, elastic layers, supernet, static extraction, ONNX export, BN recalibration.

space.py and arithmetic.py are torch-free; this package root imports nothing.
"""

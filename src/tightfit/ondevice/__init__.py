"""Everything a device runs: numpy + onnxruntime only (PIL only for verify --data).

Timing (timing.py), repeats in fresh processes (repeats.py, worker.py), the machine's description
(hardware.py), file formats and atomic files (files.py), the runner that turns a probe bundle into a
latency table (runner.py) and QA verification of export folders (exports.py, verify.py, labelled.py).
Modules here import only the standard library, numpy, onnxruntime and each other, so this folder
(with tightfit/__init__.py) can be copied to an edge device that has no torch.
"""

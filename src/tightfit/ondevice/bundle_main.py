"""Entry point of a probe bundle on a device: copied into the bundle as ``__main__.py``, beside a copy
of the torch-free ``tightfit/ondevice`` code, so the device needs only Python 3, numpy and onnxruntime:

    python probe.zip --out DEVICE.json       measure the bundle, write the latency table
    python probe --out DEVICE.json           the same from the unpacked folder
    python probe.zip verify EXPORT_DIR ...   QA: re-measure exported models against their budgets
"""
from __future__ import annotations

import os
import sys


def main(argv: list[str], here: str) -> int:
    if argv[:1] == ["verify"]:
        from tightfit.ondevice.verify import main as verify
        return verify(argv[1:])
    from tightfit.ondevice.runner import main as runner
    if argv[:1] in (["-h"], ["--help"]):
        print(__doc__.split("\n\n", 1)[1].rstrip())
        return 0
    return runner([here, *argv])


if __name__ == "__main__":
    # The bundle folder, or the .zip itself (Python runs a zip's __main__.py with the zip on sys.path).
    sys.exit(main(sys.argv[1:], os.path.dirname(os.path.abspath(__file__))))

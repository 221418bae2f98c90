"""The command-line parser of the on-device entry points (`python -m tightfit.ondevice.<module>`)."""
from __future__ import annotations

import argparse
import sys
from typing import NoReturn


class OneLineParser(argparse.ArgumentParser):
    """Bad arguments get one `error:` line and exit 2, like every other bad input."""

    def error(self, message: str) -> NoReturn:
        print(f"error: {message} (see --help)", file=sys.stderr)
        sys.exit(2)


def module_parser(module: str, doc: str | None) -> OneLineParser:
    return OneLineParser(prog=f"python -m tightfit.ondevice.{module}", description=doc,
                         formatter_class=argparse.RawDescriptionHelpFormatter)

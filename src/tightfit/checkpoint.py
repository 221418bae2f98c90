"""Checkpoints: written atomically, loaded with weights_only=True (no pickled code runs)."""
from __future__ import annotations

import pickle
import zipfile
from pathlib import Path
from typing import Any

import torch

from tightfit.atomic import atomic_write
from tightfit.errors import UserError

CHECKPOINT_NAME = "checkpoint.pt"


def save_checkpoint(path: str | Path, state: dict[str, Any]) -> Path:
    return atomic_write(path, lambda tmp: torch.save(state, tmp))


def load_checkpoint(path: str | Path) -> dict[str, Any]:
    path = Path(path)
    if not path.is_file():
        raise UserError(f"no checkpoint at {path}: train first with 'tightfit train RECIPE --run RUN_DIR'")
    try:
        state = torch.load(path, map_location="cpu", weights_only=True)
    except pickle.UnpicklingError as e:
        first = str(e).strip().splitlines()[0] if str(e).strip() else "unsafe content"
        raise UserError(f"refusing checkpoint {path}: it holds more than tensors and plain data ({first[:120]})") from None
    except (RuntimeError, EOFError, zipfile.BadZipFile, OSError, ValueError) as e:
        raise UserError(f"checkpoint {path} is unreadable or truncated ({type(e).__name__}); "
                        f"resume from an earlier copy or retrain") from None
    if not isinstance(state, dict) or "model" not in state or "recipe" not in state:
        raise UserError(f"checkpoint {path} was not written by tightfit train (missing model/recipe)")
    return state

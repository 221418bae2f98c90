"""Checkpoints: written atomically, loaded with weights_only=True (no pickled code runs)."""
from __future__ import annotations

import pickle
import re
import zipfile
from pathlib import Path
from typing import Any

import torch

from tightfit.ondevice.files import atomic_write
from tightfit.errors import UserError

CHECKPOINT_NAME = "checkpoint.pt"


def save_checkpoint(path: str | Path, state: dict[str, Any]) -> Path:
    return atomic_write(path, lambda tmp: torch.save(state, tmp))


def remove_stale_temporaries(path: str | Path) -> list[Path]:
    """Delete the temporaries a killed writer left beside ``path`` (``.NAME.*.tmp``, see
    tightfit.ondevice.files); they are never read, only wasted space. Call it only where no other
    process writes ``path`` (rank 0, before training resumes)."""
    path = Path(path)
    stale = sorted(path.parent.glob(f".{path.name}.*.tmp"))
    for p in stale:
        p.unlink(missing_ok=True)
    return stale


def load_checkpoint(path: str | Path) -> dict[str, Any]:
    path = Path(path)
    if not path.is_file():
        raise UserError(f"no checkpoint at {path}: train first with 'tightfit train RECIPE --run RUN_DIR'")
    try:
        state = torch.load(path, map_location="cpu", weights_only=True)
    except pickle.UnpicklingError as e:
        found = re.search(r"GLOBAL ([\w.]+)", str(e))  # torch names what the pickle would import
        what = f" (it would load {found[1]})" if found else ""
        raise UserError(f"refusing checkpoint {path}: it holds more than tensors and plain data{what}; "
                        "use a checkpoint written by 'tightfit train'") from None
    except (RuntimeError, EOFError, zipfile.BadZipFile, OSError, ValueError) as e:
        raise UserError(f"checkpoint {path} is unreadable or truncated ({type(e).__name__}); "
                        f"resume from an earlier copy or retrain") from None
    if not isinstance(state, dict) or "model" not in state or "recipe" not in state:
        raise UserError(f"checkpoint {path} was not written by tightfit train (missing model/recipe)")
    return state

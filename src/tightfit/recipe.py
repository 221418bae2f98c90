"""TOML recipes → frozen dataclasses, with one-line errors that name the key.

A recipe has four parts: top-level ``name``/``seed``, ``[data]``, ``[space]`` with
``[[space.stage]]`` entries, and ``[train]``. See recipes/*.toml for examples.
"""
from __future__ import annotations

import hashlib
import json
import tomllib
from dataclasses import asdict, dataclass, fields, replace
from pathlib import Path
from typing import TYPE_CHECKING, Any

from tightfit.budgets import parse_budget
from tightfit.errors import UserError
from tightfit.model.space import SpaceSpec, StageSpec
from tightfit.recipe_tables import check_keys, dataclass_from, fail, space_from, typed

if TYPE_CHECKING:
    from tightfit.model.supernet import Supernet

DATA_SOURCES = ("builtin", "folder", "fashion-mnist")
OPTIMIZERS = ("sgd", "adamw")
DISTILL_LOSSES = ("soft_ce", "kl", "alpha")
TEACHERS = ("largest", "mean")
DISTILL_WHEN = ("always", "ahead")


@dataclass(frozen=True)
class DataConfig:
    source: str = "builtin"        # "builtin" (generated inspection images), "folder" or "fashion-mnist"
    path: str = ""                 # image folder root, or folder holding the Fashion-MNIST IDX files
    image_size: int = 32           # side of the square input in pixels (folders: shorter side resized, centre crop)
    channels: int = 3              # 1 (grey) or 3 (RGB)
    classes: int = 0               # 0 = count them in the data; stated, `tightfit inspect` needs no data and
                                   # training checks the data has this many
    samples: int = 12000           # builtin only: images generated in total
    val_fraction: float = 0.1      # carved from the training data
    test_fraction: float = 0.15    # builtin/folder only (Fashion-MNIST has its own test set)
    flip: bool = True              # random horizontal flips while training
    shift: int = 2                 # random translation in pixels while training
    max_train_images: int = 0      # 0 = all; a cap for quick runs and smoke tests


@dataclass(frozen=True)
class Target:
    """A latency budget on one device, declared before training: the table measured there (a path) and
    the budget in milliseconds at the table's percentile."""
    table: str
    budget_ms: float


@dataclass(frozen=True)
class TrainConfig:
    epochs: float = 3.0            # may be fractional; the cosine schedule spans them
    batch_size: int = 128          # the global batch (split over processes under torchrun)
    optimizer: str = "sgd"         # "sgd" (Nesterov momentum) or "adamw"
    lr: float = 0.1                # peak learning rate, after a linear warm-up
    momentum: float = 0.9          # sgd only
    weight_decay: float = 4e-5     # not applied to BatchNorm and bias parameters
    warmup_epochs: float = 0.2     # linear warm-up from 0 to lr
    label_smoothing: float = 0.1   # on hard-label losses: the largest's (every subnet's without distill)
    random_subnets: int = 2        # sandwich: largest + smallest + this many random subnets per step
    distill: bool = True           # in-place distillation from the largest subnet
    channels_last: bool = False    # NHWC memory format in training (faster on CPU here)
    recalibration_batches: int = 20    # training batches that re-estimate BN statistics per evaluated subnet
    checkpoint_every: int = 0      # steps; 0 = only at the end of every epoch
    eval_batch_size: int = 512     # batch of validation passes (no effect on results)
    # Training levers for short schedules; each default is the behaviour before they existed.
    zero_init_residual: bool = False   # last BN gamma of every skip block starts at 0 (Goyal et al. 2017)
    largest_dropout: float = 0.0   # > 0: dropout before the classifier in the largest's pass only, none in the others
    final_lr_fraction: float = 0.0  # cosine ends at lr * final_lr_fraction, not zero (Yu et al. 2020)
    largest_only_epochs: float = 0.0   # first epochs train the largest subnet alone
    distill_loss: str = "soft_ce"  # "soft_ce" (soft-label cross-entropy) or "kl" (Hinton et al. 2015)
    distill_temperature: float = 1.0   # softens teacher and student; the loss is scaled by T^2
    random_macs_target: float = 0.0    # > 0: each random subnet is the draw nearest this MACs fraction
    random_candidates: int = 4     # draws per random subnet when random_macs_target > 0
    distill_weight: float = 1.0    # with distill: loss = w * distillation + (1 - w) * labels, for all but the largest
    distill_when: str = "always"   # "ahead": distil only on batches where the teacher's label loss is below the student's
    distill_alpha_low: float = -1.0    # distill_loss = "alpha": the larger of D_low and D_high (Wang et al. 2021)
    distill_alpha_high: float = 1.0    # (1: KL(teacher || student); 0: KL(student || teacher))
    teacher: str = "largest"       # "largest" (this step's largest subnet) or "mean" (moving average of the weights)
    teacher_decay: float = 0.99    # teacher = "mean": avg = decay * avg + (1 - decay) * weights, every step (~100-step window)
    # Targets known before training; each step also trains subnets predicted inside a target's band
    # [target_band_bottom * budget, budget], the targets taken in turn (tightfit/train/targets.py).
    targets: tuple[Target, ...] = ()  # [[train.targets]] tables: table = "TABLE.json", budget = "0.3ms"
    target_subnets: int = 1        # band subnets per step (when there are targets)
    target_band_bottom: float = 0.85  # a band spans [this * budget, budget] as the target's table predicts
    target_candidates: int = 1     # > 1: of this many band draws, train the one with the lowest loss on the batch
    target_elite: int = 0          # > 0: each band keeps this many architectures; each turn one is challenged by a
                                   # fresh band draw, the lower loss on the batch is trained and kept (member on ties)


# Added after recipes, checkpoints and caches were keyed by Recipe.hash(): left out of the hash while
# at their defaults, so every recipe that does not use them keeps its hash.
_LEVERS = ("zero_init_residual", "largest_dropout", "final_lr_fraction", "largest_only_epochs", "distill_loss",
           "distill_temperature", "random_macs_target", "random_candidates", "distill_weight", "targets",
           "target_subnets", "target_band_bottom", "target_candidates", "distill_when", "distill_alpha_low",
           "distill_alpha_high", "teacher", "teacher_decay", "target_elite")
_LEVER_DEFAULTS = {f.name: f.default for f in fields(TrainConfig) if f.name in _LEVERS}


@dataclass(frozen=True)
class Recipe:
    name: str
    seed: int
    data: DataConfig
    space: SpaceSpec
    train: TrainConfig

    def to_dict(self) -> dict[str, Any]:
        return asdict(self)

    def hash(self) -> str:
        d = self.to_dict()
        d["train"] = {k: v for k, v in d["train"].items() if k not in _LEVER_DEFAULTS or v != _LEVER_DEFAULTS[k]}
        blob = json.dumps(d, sort_keys=True).encode()
        return hashlib.sha256(blob).hexdigest()[:16]


def parse_recipe(doc: dict, default_name: str = "recipe") -> Recipe:
    check_keys(doc, {"name", "seed", "data", "space", "train"}, "")
    for sect in ("data", "space", "train"):
        if sect in doc and not isinstance(doc[sect], dict):
            raise UserError(f"recipe key '{sect}' must be a table ([{sect}])")
    if "space" not in doc:
        raise UserError("recipe has no [space] table: add [space] and at least one [[space.stage]]")
    _refuse_moved_keys(doc, "recipe", "")
    name = typed(doc, "name", "", str, default_name)
    seed = typed(doc, "seed", "", int, 0)
    data = _data(doc.get("data", {}))
    train_table = dict(doc.get("train", {}))
    targets = _targets(train_table.pop("targets", []))
    train = dataclass_from(train_table, TrainConfig, "train.",
                            positive=("epochs", "batch_size", "lr", "recalibration_batches", "eval_batch_size",
                                      "target_subnets", "target_candidates"))
    train = replace(train, targets=targets)
    if train.optimizer not in OPTIMIZERS:
        raise fail("train.optimizer", train.optimizer, f"choose one of {', '.join(OPTIMIZERS)}")
    for key in ("random_subnets", "checkpoint_every", "weight_decay", "warmup_epochs", "momentum"):
        if getattr(train, key) < 0:
            raise fail("train." + key, getattr(train, key), "must be >= 0")
    if not 0 <= train.label_smoothing < 1:
        raise fail("train.label_smoothing", train.label_smoothing, "must be in [0, 1)")
    _check_levers(train)
    return Recipe(name, seed, data, space_from(doc["space"]), train)


def _targets(entries: Any) -> tuple[Target, ...]:
    """[[train.targets]] tables: table = "path/to/table.json", budget = "0.3ms"."""
    if not isinstance(entries, list):
        raise UserError("recipe key 'train.targets' must be an array of tables ([[train.targets]])")
    out = []
    for i, t in enumerate(entries):
        where = f"train.targets[{i}]."
        if not isinstance(t, dict):
            raise UserError(f"recipe key 'train.targets[{i}]' must be a table ([[train.targets]])")
        check_keys(t, {"table", "budget"}, where)
        for key in ("table", "budget"):
            if not isinstance(t.get(key), str):
                raise fail(where + key, t.get(key), 'expected a string, e.g. table = "latency/camera.json", '
                                                       'budget = "0.3ms"')
        out.append(Target(t["table"], parse_budget(t["budget"])))
    return tuple(out)


def _refuse_moved_keys(doc: dict, what: str, fix: str) -> None:
    """Keys that moved or were renamed: one line naming the new key."""
    train = doc.get("train") if isinstance(doc.get("train"), dict) else {}
    if "kernel_mode" in train:
        raise UserError(f"{what} has 'train.kernel_mode', which moved to [space] as smaller_kernels "
                        f'("centre" as before, "transform" is now "mapped"){fix}')
    if "lr_end" in train:
        raise UserError(f"{what} has 'train.lr_end', which is now called train.final_lr_fraction (same meaning){fix}")


def _data(table: dict) -> DataConfig:
    data = dataclass_from(table, DataConfig, "data.", positive=("image_size", "channels", "samples"))
    if data.source not in DATA_SOURCES:
        raise fail("data.source", data.source, f"choose one of {', '.join(DATA_SOURCES)}")
    if data.channels not in (1, 3):
        raise fail("data.channels", data.channels, "must be 1 (grey) or 3 (RGB)")
    if data.classes < 0 or data.classes == 1:
        raise fail("data.classes", data.classes, "must be 0 (count them in the data) or >= 2")
    for key in ("val_fraction", "test_fraction"):
        if not 0 <= getattr(data, key) < 0.9:
            raise fail("data." + key, getattr(data, key), "must be in [0, 0.9)")
    for key, rule in (("max_train_images", "must be >= 0 (0 means all)"), ("shift", "must be >= 0")):
        if getattr(data, key) < 0:
            raise fail("data." + key, getattr(data, key), rule)
    return data


def _check_levers(train: TrainConfig) -> None:
    for key in ("largest_dropout", "final_lr_fraction", "random_macs_target"):
        if not 0 <= getattr(train, key) < 1:
            raise fail("train." + key, getattr(train, key), "must be in [0, 1)")
    if not 0 <= train.largest_only_epochs < train.epochs:
        raise fail("train.largest_only_epochs", train.largest_only_epochs, "must be >= 0 and below train.epochs")
    if train.distill_loss not in DISTILL_LOSSES:
        raise fail("train.distill_loss", train.distill_loss, f"choose one of {', '.join(DISTILL_LOSSES)}")
    if train.distill_temperature <= 0:
        raise fail("train.distill_temperature", train.distill_temperature, "must be > 0")
    if train.random_candidates < 1:
        raise fail("train.random_candidates", train.random_candidates, "must be >= 1")
    if not 0 <= train.distill_weight <= 1:
        raise fail("train.distill_weight", train.distill_weight, "must be in [0, 1] (1: from the largest only)")
    if train.teacher not in TEACHERS:
        raise fail("train.teacher", train.teacher, f"choose one of {', '.join(TEACHERS)}")
    if train.distill_when not in DISTILL_WHEN:
        raise fail("train.distill_when", train.distill_when, f"choose one of {', '.join(DISTILL_WHEN)}")
    if not 0 < train.teacher_decay < 1:
        raise fail("train.teacher_decay", train.teacher_decay, "must be in (0, 1)")
    if not 0 < train.target_band_bottom < 1:
        raise fail("train.target_band_bottom", train.target_band_bottom, "must be in (0, 1)")
    if train.target_elite < 0:
        raise fail("train.target_elite", train.target_elite, "must be >= 0 (0: no kept elite)")
    if train.target_elite and train.target_candidates > 1:
        raise fail("train.target_elite", train.target_elite, f"a kept elite meets one fresh draw per turn; set "
                   f"train.target_candidates = 1 (it is {train.target_candidates}) or train.target_elite = 0")


def load_recipe(path: str | Path) -> Recipe:
    path = Path(path)
    if not path.is_file():
        raise UserError(f"recipe file not found: {path} (see recipes/ for examples)")
    try:
        doc = tomllib.loads(path.read_text(encoding="utf-8"))
    except tomllib.TOMLDecodeError as e:
        raise UserError(f"recipe {path} is not valid TOML: {e}; fix the syntax there "
                        "(see recipes/ for examples)") from None
    except UnicodeDecodeError:
        raise UserError(f"recipe {path} is not a UTF-8 text file") from None
    return parse_recipe(doc, default_name=path.stem)


def recipe_from_dict(d: dict[str, Any]) -> Recipe:
    """Rebuild a Recipe from ``Recipe.to_dict()`` (as stored in checkpoints)."""
    _refuse_moved_keys(d, "this checkpoint's recipe", ": an older tightfit wrote it; train again with this one, "
                                                      "or use the tightfit that wrote it")
    sp = dict(d["space"])
    sp["stages"] = tuple(StageSpec(**{**s, "depths": tuple(s["depths"]), "expansions": tuple(s["expansions"]),
                                      "kernels": tuple(s["kernels"]), "widths": tuple(s.get("widths", ()))})
                         for s in sp["stages"])
    sp["stem_widths"] = tuple(sp.get("stem_widths", ()))
    train = dict(d["train"])
    train["targets"] = tuple(Target(**t) for t in train.get("targets", ()))
    return Recipe(d["name"], d["seed"], DataConfig(**d["data"]), SpaceSpec(**sp), TrainConfig(**train))


def build_supernet(recipe: Recipe, num_classes: int) -> Supernet:
    """The supernet a recipe describes: the one place a recipe becomes a network (torch loads only here)."""
    from tightfit.model.supernet import Supernet
    return Supernet(recipe.space, recipe.data.channels, num_classes)

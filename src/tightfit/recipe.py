"""TOML recipes → frozen dataclasses, with one-line errors that name the key.

A recipe has four parts: top-level ``name``/``seed``, ``[data]``, ``[space]`` with
``[[space.stage]]`` entries, and ``[train]``. See recipes/*.toml for examples.
"""
from __future__ import annotations

import hashlib
import json
import tomllib
from dataclasses import asdict, dataclass, fields
from pathlib import Path
from typing import TYPE_CHECKING, Any

from tightfit.errors import UserError
from tightfit.model.space import ACTIVATIONS, SpaceSpec, SpecError, StageSpec

if TYPE_CHECKING:
    from tightfit.model.supernet import Supernet

DATA_SOURCES = ("builtin", "folder", "fashion-mnist")
OPTIMIZERS = ("sgd", "adamw")
DISTILL_LOSSES = ("soft_ce", "kl")


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
    lr_end: float = 0.0            # cosine ends at lr * lr_end, not zero (Yu et al. 2020)
    largest_only_epochs: float = 0.0   # first epochs train the largest subnet alone
    distill_loss: str = "soft_ce"  # "soft_ce" (soft-label cross-entropy) or "kl" (Hinton et al. 2015)
    distill_temperature: float = 1.0   # softens teacher and student; the loss is scaled by T^2
    random_macs_target: float = 0.0    # > 0: each random subnet is the draw nearest this MACs fraction
    random_candidates: int = 4     # draws per random subnet when random_macs_target > 0


# Added after recipes, checkpoints and caches were keyed by Recipe.hash(): left out of the hash while
# at their defaults, so every recipe that does not use them keeps its hash.
_LEVERS = ("zero_init_residual", "largest_dropout", "lr_end", "largest_only_epochs", "distill_loss",
           "distill_temperature", "random_macs_target", "random_candidates")
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


def _fail(key: str, value: Any, allowed: str) -> UserError:
    return UserError(f"recipe key '{key}' = {value!r} is invalid: {allowed}")


def _check_keys(table: dict, cls_or_names, where: str) -> None:
    names = {f.name for f in fields(cls_or_names)} if not isinstance(cls_or_names, (set, tuple)) else set(cls_or_names)
    for k in table:
        if k not in names:
            raise UserError(f"unknown recipe key '{where}{k}'; allowed here: {', '.join(sorted(names))}")


def _typed(table: dict, key: str, where: str, kind: type, default: Any, *, positive: bool = False) -> Any:
    if key not in table:
        return default
    v = table[key]
    ok = isinstance(v, kind) and not (kind in (int, float) and isinstance(v, bool))
    if kind is float and isinstance(v, int) and not isinstance(v, bool):
        v, ok = float(v), True
    if not ok:
        raise _fail(where + key, v, f"expected {kind.__name__}")
    if positive and v <= 0:
        raise _fail(where + key, v, "must be > 0")
    return v


def _dataclass_from(table: dict, cls, where: str, positive: tuple[str, ...] = ()):
    _check_keys(table, cls, where)
    kw = {}
    for f in fields(cls):
        kind = type(f.default)
        kw[f.name] = _typed(table, f.name, where, kind, f.default, positive=f.name in positive)
    return cls(**kw)


def _choices(st: dict, key: str, where: str, kind: type) -> tuple:
    if key not in st:
        raise UserError(f"recipe key '{where}{key}' is missing: give a list of allowed values")
    v = st[key]
    if not isinstance(v, list) or not v:
        raise _fail(where + key, v, "expected a non-empty list")
    out = []
    for x in v:
        if isinstance(x, bool) or not isinstance(x, (int, float)) or (kind is int and not isinstance(x, int)):
            raise _fail(where + key, v, f"every entry must be {'an integer' if kind is int else 'a number'}")
        out.append(int(x) if float(x).is_integer() else float(x))
    return tuple(sorted(out))  # duplicates are left for the spec to refuse


def _widths(table: dict, key: str, where: str, default: int | None) -> tuple[int, tuple[int, ...]]:
    """``channels = 40`` (fixed) or ``[24, 32, 40]`` (elastic) → (widest, choices or ()); the spec checks values."""
    v = table.get(key, default)
    if isinstance(v, list):
        choices = _choices(table, key, where, int)
        return max(choices), (choices if len(choices) > 1 else ())
    if isinstance(v, bool) or not isinstance(v, int):
        raise _fail(where + key, v, "must be an integer > 0, or a list of allowed widths such as [16, 24, 32]")
    return v, ()


# The [space] and [[space.stage]] keys (TOML names differ from SpaceSpec/StageSpec fields): key -> (default, meaning).
SPACE_KEYS = {
    "stem_channels": ("16", "stem conv output channels, or a list of allowed widths such as [8, 16] (elastic width)"),
    "stem_stride": ("1", "1 or 2"),
    "stem_activation": ('"relu6"', "activation after the stem conv: " + ", ".join(ACTIVATIONS)),
    "head_channels": ("0", "1x1 conv before pooling; 0 = none"),
    "head_activation": ('"relu6"', "activation after the head conv"),
    "dropout": ("0.0", "dropout before the classifier, in [0, 1)"),
    "smaller_kernels": ('"centre"', "how a smaller depthwise kernel is taken from the largest one's weights: "
                                    '"centre" (its centre) or "mapped" (its centre through one learned k*k x k*k map '
                                    "per smaller size, shared by all channels; adds parameters; Cai et al. 2020)"),
    "stage": ("(required)", "one [[space.stage]] table per stage, input to output"),
}
STAGE_KEYS = {
    "channels": ("(required)", "output channels, or a list of allowed widths such as [24, 32, 40] (the widest sizes "
                               "the weights; a narrower choice uses the first channels)"),
    "stride": ("1", "stride of the stage's first block: 1 or 2"),
    "depths": ("(required)", "allowed numbers of blocks, e.g. [1, 2, 3]"),
    "expansions": ("(required)", "allowed expansion ratios (hidden = round(input channels x ratio)); 1 = no expand conv"),
    "kernels": ("(required)", "allowed depthwise kernel sizes, odd, e.g. [3, 5]"),
    "activation": ('"relu6"', "activation in the stage's blocks: " + ", ".join(ACTIVATIONS)),
    "squeeze_excite": ("false", "squeeze-excite after the depthwise conv"),
}
# Spec fields whose recipe key has another name (the rest share theirs).
_KEY_OF_FIELD = {"out_channels": "channels", "widths": "channels", "stem_widths": "stem_channels", "stages": "stage"}


def _checked(build, where: str):
    """Build a spec; its own ValueError (the spec's invariants) becomes the one-line error naming the recipe key."""
    try:
        return build()
    except SpecError as e:
        value = list(e.value) if isinstance(e.value, tuple) else e.value
        raise _fail(where + _KEY_OF_FIELD.get(e.field, e.field), value, e.rule) from None


def _stage(st: Any, i: int) -> StageSpec:
    where = f"space.stage[{i}]."
    if not isinstance(st, dict):
        raise UserError(f"recipe key 'space.stage[{i}]' must be a table ([[space.stage]])")
    _check_keys(st, set(STAGE_KEYS), where)
    if "channels" not in st:
        raise _fail(where + "channels", None, "must be an integer > 0, or a list of allowed widths")
    chs, widths = _widths(st, "channels", where, None)
    stride = _typed(st, "stride", where, int, 1)
    depths, exps = _choices(st, "depths", where, int), _choices(st, "expansions", where, float)
    kernels = _choices(st, "kernels", where, int)
    return _checked(lambda: StageSpec(chs, stride, depths, exps, kernels, _typed(st, "activation", where, str, "relu6"),
                                      _typed(st, "squeeze_excite", where, bool, False), widths), where)


def _space(sp: dict) -> SpaceSpec:
    _check_keys(sp, set(SPACE_KEYS), "space.")
    stem, stem_widths = _widths(sp, "stem_channels", "space.", 16)
    stages = sp.get("stage")
    if not isinstance(stages, list) or not stages:
        raise UserError("recipe needs at least one [[space.stage]] table")
    stages = tuple(_stage(s, i) for i, s in enumerate(stages))
    return _checked(lambda: SpaceSpec(
        stem, _typed(sp, "stem_stride", "space.", int, 1), stages, _typed(sp, "head_channels", "space.", int, 0),
        _typed(sp, "stem_activation", "space.", str, "relu6"), _typed(sp, "head_activation", "space.", str, "relu6"),
        _typed(sp, "dropout", "space.", float, 0.0), stem_widths,
        _typed(sp, "smaller_kernels", "space.", str, "centre")), "space.")


def parse_recipe(doc: dict, default_name: str = "recipe") -> Recipe:
    _check_keys(doc, {"name", "seed", "data", "space", "train"}, "")
    for sect in ("data", "space", "train"):
        if sect in doc and not isinstance(doc[sect], dict):
            raise UserError(f"recipe key '{sect}' must be a table ([{sect}])")
    if "space" not in doc:
        raise UserError("recipe has no [space] table: add [space] and at least one [[space.stage]]")
    _refuse_moved_keys(doc, "recipe", "")
    name = _typed(doc, "name", "", str, default_name)
    seed = _typed(doc, "seed", "", int, 0)
    data = _data(doc.get("data", {}))
    train = _dataclass_from(doc.get("train", {}), TrainConfig, "train.",
                            positive=("epochs", "batch_size", "lr", "recalibration_batches", "eval_batch_size"))
    if train.optimizer not in OPTIMIZERS:
        raise _fail("train.optimizer", train.optimizer, f"choose one of {', '.join(OPTIMIZERS)}")
    for key in ("random_subnets", "checkpoint_every", "weight_decay", "warmup_epochs", "momentum"):
        if getattr(train, key) < 0:
            raise _fail("train." + key, getattr(train, key), "must be >= 0")
    if not 0 <= train.label_smoothing < 1:
        raise _fail("train.label_smoothing", train.label_smoothing, "must be in [0, 1)")
    _check_levers(train)
    return Recipe(name, seed, data, _space(doc["space"]), train)


def _refuse_moved_keys(doc: dict, what: str, fix: str) -> None:
    """train.kernel_mode moved to the space (it adds parameters): one line naming the new key."""
    if isinstance(doc.get("train"), dict) and "kernel_mode" in doc["train"]:
        raise UserError(f"{what} has 'train.kernel_mode', which moved to [space] as smaller_kernels "
                        f'("centre" as before, "transform" is now "mapped"){fix}')


def _data(table: dict) -> DataConfig:
    data = _dataclass_from(table, DataConfig, "data.", positive=("image_size", "channels", "samples"))
    if data.source not in DATA_SOURCES:
        raise _fail("data.source", data.source, f"choose one of {', '.join(DATA_SOURCES)}")
    if data.channels not in (1, 3):
        raise _fail("data.channels", data.channels, "must be 1 (grey) or 3 (RGB)")
    if data.classes < 0 or data.classes == 1:
        raise _fail("data.classes", data.classes, "must be 0 (count them in the data) or >= 2")
    for key in ("val_fraction", "test_fraction"):
        if not 0 <= getattr(data, key) < 0.9:
            raise _fail("data." + key, getattr(data, key), "must be in [0, 0.9)")
    for key, rule in (("max_train_images", "must be >= 0 (0 means all)"), ("shift", "must be >= 0")):
        if getattr(data, key) < 0:
            raise _fail("data." + key, getattr(data, key), rule)
    return data


def _check_levers(train: TrainConfig) -> None:
    for key in ("largest_dropout", "lr_end", "random_macs_target"):
        if not 0 <= getattr(train, key) < 1:
            raise _fail("train." + key, getattr(train, key), "must be in [0, 1)")
    if not 0 <= train.largest_only_epochs < train.epochs:
        raise _fail("train.largest_only_epochs", train.largest_only_epochs, "must be >= 0 and below train.epochs")
    if train.distill_loss not in DISTILL_LOSSES:
        raise _fail("train.distill_loss", train.distill_loss, f"choose one of {', '.join(DISTILL_LOSSES)}")
    if train.distill_temperature <= 0:
        raise _fail("train.distill_temperature", train.distill_temperature, "must be > 0")
    if train.random_candidates < 1:
        raise _fail("train.random_candidates", train.random_candidates, "must be >= 1")


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
    return Recipe(d["name"], d["seed"], DataConfig(**d["data"]), SpaceSpec(**sp), TrainConfig(**d["train"]))


def build_supernet(recipe: Recipe, num_classes: int) -> Supernet:
    """The supernet a recipe describes: the one place a recipe becomes a network (torch loads only here)."""
    from tightfit.model.supernet import Supernet
    return Supernet(recipe.space, recipe.data.channels, num_classes)

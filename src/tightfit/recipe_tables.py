"""Reading TOML tables into typed values, with one-line errors that name the key; and the
[space] / [[space.stage]] tables, whose keys differ from the SpaceSpec / StageSpec fields."""
from __future__ import annotations

from dataclasses import fields
from typing import Any

from tightfit.errors import UserError
from tightfit.model.space import ACTIVATIONS, SpaceSpec, SpecError, StageSpec


def fail(key: str, value: Any, allowed: str) -> UserError:
    return UserError(f"recipe key '{key}' = {value!r} is invalid: {allowed}")


def check_keys(table: dict, cls_or_names, where: str) -> None:
    names = {f.name for f in fields(cls_or_names)} if not isinstance(cls_or_names, (set, tuple)) else set(cls_or_names)
    for k in table:
        if k not in names:
            raise UserError(f"unknown recipe key '{where}{k}'; allowed here: {', '.join(sorted(names))}")


def typed(table: dict, key: str, where: str, kind: type, default: Any, *, positive: bool = False) -> Any:
    if key not in table:
        return default
    v = table[key]
    ok = isinstance(v, kind) and not (kind in (int, float) and isinstance(v, bool))
    if kind is float and isinstance(v, int) and not isinstance(v, bool):
        v, ok = float(v), True
    if not ok:
        raise fail(where + key, v, f"expected {kind.__name__}")
    if positive and v <= 0:
        raise fail(where + key, v, "must be > 0")
    return v


def dataclass_from(table: dict, cls, where: str, positive: tuple[str, ...] = ()):
    check_keys(table, cls, where)
    kw = {}
    for f in fields(cls):
        kind = type(f.default)
        kw[f.name] = typed(table, f.name, where, kind, f.default, positive=f.name in positive)
    return cls(**kw)


def _choices(st: dict, key: str, where: str, kind: type) -> tuple:
    if key not in st:
        raise UserError(f"recipe key '{where}{key}' is missing: give a list of allowed values")
    v = st[key]
    if not isinstance(v, list) or not v:
        raise fail(where + key, v, "expected a non-empty list")
    out = []
    for x in v:
        if isinstance(x, bool) or not isinstance(x, (int, float)) or (kind is int and not isinstance(x, int)):
            raise fail(where + key, v, f"every entry must be {'an integer' if kind is int else 'a number'}")
        out.append(int(x) if float(x).is_integer() else float(x))
    return tuple(sorted(out))  # duplicates are left for the spec to refuse


def _widths(table: dict, key: str, where: str, default: int | None) -> tuple[int, tuple[int, ...]]:
    """``channels = 40`` (fixed) or ``[24, 32, 40]`` (elastic) → (widest, choices or ()); the spec checks values."""
    v = table.get(key, default)
    if isinstance(v, list):
        choices = _choices(table, key, where, int)
        return max(choices), (choices if len(choices) > 1 else ())
    if isinstance(v, bool) or not isinstance(v, int):
        raise fail(where + key, v, "must be an integer > 0, or a list of allowed widths such as [16, 24, 32]")
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
        raise fail(where + _KEY_OF_FIELD.get(e.field, e.field), value, e.rule) from None


def _stage(st: Any, i: int) -> StageSpec:
    where = f"space.stage[{i}]."
    if not isinstance(st, dict):
        raise UserError(f"recipe key 'space.stage[{i}]' must be a table ([[space.stage]])")
    check_keys(st, set(STAGE_KEYS), where)
    if "channels" not in st:
        raise fail(where + "channels", None, "must be an integer > 0, or a list of allowed widths")
    chs, widths = _widths(st, "channels", where, None)
    stride = typed(st, "stride", where, int, 1)
    depths, exps = _choices(st, "depths", where, int), _choices(st, "expansions", where, float)
    kernels = _choices(st, "kernels", where, int)
    return _checked(lambda: StageSpec(chs, stride, depths, exps, kernels, typed(st, "activation", where, str, "relu6"),
                                      typed(st, "squeeze_excite", where, bool, False), widths), where)


def space_from(sp: dict) -> SpaceSpec:
    check_keys(sp, set(SPACE_KEYS), "space.")
    stem, stem_widths = _widths(sp, "stem_channels", "space.", 16)
    stages = sp.get("stage")
    if not isinstance(stages, list) or not stages:
        raise UserError("recipe needs at least one [[space.stage]] table")
    stages = tuple(_stage(s, i) for i, s in enumerate(stages))
    return _checked(lambda: SpaceSpec(
        stem, typed(sp, "stem_stride", "space.", int, 1), stages, typed(sp, "head_channels", "space.", int, 0),
        typed(sp, "stem_activation", "space.", str, "relu6"), typed(sp, "head_activation", "space.", str, "relu6"),
        typed(sp, "dropout", "space.", float, 0.0), stem_widths,
        typed(sp, "smaller_kernels", "space.", str, "centre")), "space.")

"""Recipes: every shipped recipe loads; bad recipes fail with one line naming the key."""
import copy
from pathlib import Path

import pytest
from hypothesis import given, settings, strategies as st

from tightfit.errors import UserError
from tightfit.recipe import build_supernet, load_recipe, parse_recipe, recipe_from_dict
from tightfit.model.supernet import Supernet
from helpers import TINY

RECIPES = sorted((Path(__file__).parents[1] / "recipes").glob("*.toml"))


@pytest.mark.parametrize("path", RECIPES, ids=lambda p: p.name)
def test_shipped_recipes_load_and_build(path):
    recipe = load_recipe(path)
    assert recipe_from_dict(recipe.to_dict()) == recipe  # survives the checkpoint round trip
    assert recipe.space.size() > 1
    Supernet(recipe.space, recipe.data.channels, 10)


def _with(path: str, value):
    doc = copy.deepcopy(TINY)
    *parents, last = path.split(".")
    node = doc
    for p in parents:
        node = node[int(p)] if p.isdigit() else node[p]
    if value is KeyError:
        del node[last]
    else:
        node[last] = value
    return doc


BAD = [
    ("space.stage.1.channels", 0, "channels"),
    ("space.stage.1.channels", -8, "channels"),
    ("space.stage.1.kernels", [3, 4], "odd"),
    ("space.stage.1.stride", 3, "1 or 2"),
    ("space.stage.1.depths", [], "non-empty"),
    ("space.stage.1.depths", [0, 1], ">= 1"),
    ("space.stage.1.expansions", [0, 2], "> 0"),
    ("space.stage.1.expansions", ["6"], "number"),
    ("space.stage.1.activation", "gelu", "relu6"),
    ("space.stage.1.colour", 1, "unknown"),
    ("space.stage.1.kernels", KeyError, "missing"),
    ("space.stage", [], "at least one"),
    ("train.optimizer", "adam", "sgd"),
    ("train.batch_size", 0, "> 0"),
    ("train.batch_size", "64", "int"),
    ("train.epochs", -1, "> 0"),
    ("train.label_smoothing", 1.5, "[0, 1)"),
    ("train.learning_rate", 0.1, "unknown"),
    ("data.source", "imagenet", "builtin"),
    ("data.channels", 2, "1 (grey) or 3"),
    ("data.val_fraction", 0.95, "[0, 0.9)"),
    ("space.stem_stride", 4, "1 or 2"),
    ("train.final_lr_fraction", 1.0, "[0, 1)"),
    ("train.largest_dropout", -0.1, "[0, 1)"),
    ("train.random_macs_target", 1.5, "[0, 1)"),
    ("train.largest_only_epochs", 1.0, "below train.epochs"),
    ("train.distill_loss", "mse", "soft_ce"),
    ("train.distill_temperature", 0.0, "> 0"),
    ("train.random_candidates", 0, ">= 1"),
    # checked by the spec itself (model/space.py), reported under the recipe's key
    ("space.stage.1.kernels", [3, 3], "distinct"),
    ("space.stem_channels", [0, 8], "> 0"),
    ("space.dropout", 1.0, "[0, 1)"),
    ("space.head_channels", -1, ">= 0"),
    ("space.smaller_kernels", "transform", "centre"),
    ("space.stem_activation", "gelu", "relu6"),
    ("data.classes", 1, ">= 2"),
]


@pytest.mark.parametrize("path,value,fragment", BAD, ids=[f"{p}={v}" for p, v, _ in BAD])
def test_bad_values_name_the_key(path, value, fragment):
    with pytest.raises(UserError) as e:
        parse_recipe(_with(path, value))
    msg = str(e.value)
    assert "\n" not in msg and fragment in msg
    assert path.split(".")[-1] in msg or fragment in ("at least one",)


def test_toml_syntax_error_shows_line(tmp_path):
    p = tmp_path / "bad.toml"
    p.write_text('name = "x"\n[space\nstem_channels = 8\n')
    with pytest.raises(UserError, match="line 2"):
        load_recipe(p)


def test_missing_recipe_file(tmp_path):
    with pytest.raises(UserError, match="not found"):
        load_recipe(tmp_path / "nope.toml")


# Property: random valid stage tables always build; random invalid ones fail with UserError only.
stage = st.fixed_dictionaries({
    "channels": st.integers(1, 64), "stride": st.sampled_from([1, 2]),
    "depths": st.lists(st.integers(1, 4), min_size=1, max_size=3, unique=True),
    "expansions": st.lists(st.sampled_from([1, 2, 3, 4, 6]), min_size=1, max_size=3, unique=True),
    "kernels": st.lists(st.sampled_from([1, 3, 5, 7]), min_size=1, max_size=3, unique=True),
    "activation": st.sampled_from(["relu6", "hswish"]), "squeeze_excite": st.booleans(),
})


@settings(max_examples=60, deadline=None)
@given(st.lists(stage, min_size=1, max_size=4))
def test_random_valid_recipes_build(stages):
    doc = {**TINY, "space": {"stem_channels": 8, "stage": stages}}
    recipe = parse_recipe(doc)
    assert len(recipe.space.stages) == len(stages)
    Supernet(recipe.space, 3, 4)


@settings(max_examples=100, deadline=None)
@given(st.dictionaries(st.sampled_from(["channels", "stride", "depths", "expansions", "kernels", "activation"]),
                       st.one_of(st.integers(-3, 3), st.text(max_size=3), st.lists(st.integers(-2, 4), max_size=3),
                                 st.floats(allow_nan=True), st.none().map(lambda _: {}))))
def test_random_invalid_stages_raise_user_error_only(garbage):
    doc = {**TINY, "space": {"stem_channels": 8, "stage": [garbage]}}
    try:
        parse_recipe(doc)
    except UserError as e:
        assert "\n" not in str(e)


def test_training_levers_at_their_defaults_keep_the_recipe_hash():
    # Checkpoints, caches and manifests are keyed by Recipe.hash(): recipes that do not use the
    # training levers keep the hash they had before the levers existed; setting one changes it.
    import dataclasses
    import hashlib
    import json
    recipe = parse_recipe(TINY)
    d = recipe.to_dict()
    for key in ("zero_init_residual", "largest_dropout", "final_lr_fraction", "largest_only_epochs", "distill_loss",
                "distill_temperature", "random_macs_target", "random_candidates", "distill_weight", "targets",
                "target_subnets", "target_band_bottom", "target_candidates", "distill_when", "distill_alpha_low",
                "distill_alpha_high", "teacher", "teacher_decay", "target_elite"):
        del d["train"][key]
    assert recipe.hash() == hashlib.sha256(json.dumps(d, sort_keys=True).encode()).hexdigest()[:16]
    changed = dataclasses.replace(recipe, train=dataclasses.replace(recipe.train, final_lr_fraction=0.05))
    assert changed.hash() != recipe.hash()


def test_the_recipe_reference_is_generated_from_the_dataclasses_and_documents_every_key():
    # This project's rule (src/tightfit/recipe_reference.py): docs/recipe-reference.md is generated, every key the
    # parser accepts is in it with a meaning, so a new key without a comment fails here.
    from dataclasses import fields
    from tightfit.recipe import DataConfig, TrainConfig
    from tightfit.recipe_tables import SPACE_KEYS, STAGE_KEYS
    from tightfit.recipe_reference import field_notes, reference_markdown
    text = reference_markdown()
    committed = (Path(__file__).resolve().parents[1] / "docs" / "recipe-reference.md").read_text("utf-8")
    assert committed == text + "\n", "docs/recipe-reference.md is stale: python -m tightfit.recipe_reference > docs/recipe-reference.md"
    for cls in (DataConfig, TrainConfig):
        notes = field_notes(cls)
        missing = [f.name for f in fields(cls) if not notes.get(f.name)]
        assert not missing, f"{cls.__name__} fields without a trailing comment: {missing}"
        assert all(f"| `{f.name}` |" in text for f in fields(cls))
    assert all(f"| `{k}` |" in text and m for k, (_, m) in {**SPACE_KEYS, **STAGE_KEYS}.items())
    assert "| `random_subnets` | `2` |" in text and "| `shift` | `2` |" in text  # defaults come from the dataclass


def test_kernel_mode_under_train_names_its_new_key_in_one_line(tmp_path):
    # It moved to [space] as smaller_kernels (it adds parameters, so the model owns it): an older recipe,
    # and a checkpoint's stored recipe, get one line naming the new key rather than a list of allowed keys.
    doc = _with("train.kernel_mode", "transform")
    with pytest.raises(UserError) as e:
        parse_recipe(doc)
    assert "\n" not in str(e.value) and "smaller_kernels" in str(e.value) and "[space]" in str(e.value)
    stored = parse_recipe(TINY).to_dict()
    stored["train"]["kernel_mode"] = "centre"
    with pytest.raises(UserError, match="smaller_kernels") as e:
        recipe_from_dict(stored)
    assert "\n" not in str(e.value) and "train again" in str(e.value)


def test_the_kernel_rule_reaches_the_model_from_the_space_table():
    recipe = parse_recipe(_with("space.smaller_kernels", "mapped"))
    assert recipe.space.smaller_kernels == "mapped" and parse_recipe(TINY).space.smaller_kernels == "centre"
    assert recipe_from_dict(recipe.to_dict()) == recipe
    assert any("transforms" in n for n, _ in build_supernet(recipe, 4).named_parameters())

"""Search fitness: recalibration that reuses shared prefixes, and held-out re-scoring."""
from __future__ import annotations

import random

import pytest
import torch



@pytest.mark.parametrize("wide", [False, True], ids=["fixed-width", "elastic-width"])
@pytest.mark.parametrize("room_bytes", [1 << 30, 300_000, 0])
def test_cached_prefix_recalibration_matches_full(room_bytes, wide):
    # Reference: tightfit.recalibrate.recalibrate_bn, the plain procedure of Yu & Huang 2019
    # (Sec. 3.3: reset, then cumulative averages over fixed batches). The cached version must
    # give the same statistics in every BatchNorm of the extracted subnet, whether the shared
    # prefix and first-block outputs are cached (big cap), only some fit (small) or none (0).
    from helpers import perturb, tiny_recipe
    from tightfit.model.extract import extract_subnet
    from tightfit.model.recalibrate import preserved_bn_stats, recalibrate_bn
    from tightfit.search.fitness import Recalibrator, fixed_stages
    from tightfit.model.supernet import Supernet
    space = tiny_recipe(wide=wide).space
    assert fixed_stages(space) == 1
    sn = Supernet(space, 3, 5).eval()
    perturb(sn, seed=3)
    calib = [torch.randn(8, 3, 16, 16) for _ in range(3)]
    rng = random.Random(2)
    subnets = [space.smallest(), space.largest()] + [space.sample(rng) for _ in range(2)] + [space.smallest()]
    before = {k: v.clone() for k, v in sn.state_dict().items()}
    recal = Recalibrator(sn, calib, room_bytes=room_bytes)
    for subnet in subnets:
        sn.set_subnet(subnet)
        with preserved_bn_stats(sn):
            recalibrate_bn(sn, calib)
            want = extract_subnet(sn, subnet).state_dict()
        with preserved_bn_stats(sn):
            recal()
            got = extract_subnet(sn, subnet).state_dict()
        assert got.keys() == want.keys()
        for k in want:
            assert torch.allclose(got[k].float(), want[k].float(), rtol=1e-5, atol=1e-6), (subnet.to_key(), k)
        assert all(torch.equal(v, sn.state_dict()[k]) for k, v in before.items())  # supernet left as it was
    assert (not any(recal.prefixes.values())) == (room_bytes == 0) and not sn.training
    if wide and room_bytes > 1 << 20:
        assert len(recal.prefixes) > 1  # one shared prefix per (stem, first stage) width choice
    if room_bytes > 1 << 20:
        assert len([v for v in recal.variants.values() if v]) > 1  # first-block outputs were reused


def test_held_out_accuracy_uses_the_images_the_search_did_not(tiny_run):
    """RunAccuracy(skip=N) scores on validation images N.. only; scores on the two parts weigh up to
    the score on the whole split (accuracy is a count over images: common practice), and the cache tag
    tells the parts apart so a held-out figure is never served as a search figure."""
    from tightfit.data.dataset import load_dataset
    from tightfit.rundir import load_trained
    from tightfit.search.fitness import RunAccuracy
    run = load_trained(tiny_run)
    ds = load_dataset(run.recipe.data, run.recipe.seed)
    n_val = len(ds.val_y)
    first = RunAccuracy(run, ds, val_images=n_val // 3)
    rest = RunAccuracy(run, ds, skip=first.images)
    whole = RunAccuracy(run, ds)
    assert first.images + rest.images == whole.images == n_val
    subnet = run.recipe.space.middle()
    a, b, w = (r(subnet)["val_acc"] for r in (first, rest, whole))
    assert (a * first.images + b * rest.images) / n_val == pytest.approx(w, abs=1e-3)  # figures kept to 4 decimals
    assert rest.tag(tiny_run)["skip"] == first.images and "skip" not in first.tag(tiny_run)
    # a held-out figure in the cache file is not served to a search with the same image count
    from tightfit.search.cache import AccuracyCache
    path = tiny_run / "held_out_cache.jsonl"
    AccuracyCache(path, {**rest.tag(tiny_run), "images": 7}).put("k", {"val_acc": 1.0})
    assert AccuracyCache(path, {**first.tag(tiny_run), "images": 7}).get("k") is None


def test_whole_split_from_a_scored_part_and_the_rest_equals_the_whole_split(tiny_run):
    """A re-score adds the images not yet scored to the capped part's count: top-1 is a count over images
    (common practice), so the figure must equal a whole-split evaluation's to its 4 decimals, under the
    same cache tag, and the capped part is read from its cache, not evaluated again."""
    from tightfit.data.dataset import load_dataset
    from tightfit.rundir import load_trained
    from tightfit.search.cache import AccuracyCache, CachedAccuracy
    from tightfit.search.fitness import RunAccuracy, WholeSplit
    run = load_trained(tiny_run)
    ds = load_dataset(run.recipe.data, run.recipe.seed)
    part = RunAccuracy(run, ds, val_images=len(ds.val_y) // 3)
    cached = CachedAccuracy(AccuracyCache(tiny_run / "part_cache.jsonl", part.tag(tiny_run)), part)
    combined = WholeSplit(cached, part.images, RunAccuracy(run, ds, skip=part.images, recalibrator=part.recalibrate))
    whole = RunAccuracy(run, ds)
    assert combined.tag(tiny_run) == whole.tag(tiny_run)
    rng = random.Random(5)
    for subnet in [run.recipe.space.smallest(), run.recipe.space.largest(), run.recipe.space.sample(rng)]:
        cached(subnet)
        fresh = cached.fresh
        assert combined(subnet)["val_acc"] == pytest.approx(whole(subnet)["val_acc"], abs=1e-9)
        assert cached.fresh == fresh  # the part came from the cache

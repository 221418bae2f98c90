"""Training for the targets the user declares: subnets drawn from each target's latency band.

Latency depends on the architecture only, so a device's table exists before training. A target's
band is [bottom * budget, budget] as its table predicts it; the search later picks from that band,
so those are the architectures worth training often (weight sharing costs the middle of the space
most when it is trained rarely). Band members come from a seeded uniform sample of the space, so a
band holds what the space offers there, in proportion.

With ``target_elite`` a band also keeps a few architectures it trains again and again (the band's
current front, where the search will pick): each turn, one member is challenged by a fresh band draw
on the current batch, and the lower loss is trained and keeps the slot.
"""
from __future__ import annotations

import random
from dataclasses import dataclass
from typing import Callable

import torch
import torch.nn.functional as F

from tightfit.budgets import budget_label
from tightfit.errors import UserError
from tightfit.latency.predict import load_predictor
from tightfit.model.space import SpaceSpec, Subnet
from tightfit.model.supernet import Supernet
from tightfit.recipe import Recipe, TrainConfig

Elite = dict[str, tuple[Subnet, ...]]  # band name -> the architectures it keeps

POOL_DRAWS = 20_000  # uniform draws a band is filled from (~1 s of prediction on this host's demo space)


@dataclass(frozen=True)
class Band:
    """The subnets predicted inside one target's band."""
    name: str                   # "camera.json 0.3ms"
    low_ms: float
    high_ms: float
    members: tuple[Subnet, ...]

    def __contains__(self, subnet: Subnet) -> bool:
        return subnet in self.members


def band_members(space: SpaceSpec, predict: Callable[[Subnet], float], low_ms: float, high_ms: float,
                 seed: int, draws: int = POOL_DRAWS) -> tuple[Subnet, ...]:
    """Distinct subnets of a seeded uniform sample with ``low_ms <= predict(s) <= high_ms``, in draw order."""
    rng, seen, out = random.Random(f"{seed}:bands"), set(), []
    for _ in range(draws):
        s = space.sample(rng)
        if s in seen:
            continue
        seen.add(s)
        if low_ms <= predict(s) <= high_ms:
            out.append(s)
    return tuple(out)


def target_bands(recipe: Recipe) -> list[Band]:
    """One band per declared target; a target whose band holds no subnet is refused in one line."""
    bands, cfg = [], recipe.train
    for t in cfg.targets:
        pred = load_predictor(recipe, t.table)
        low, high = cfg.target_band_bottom * t.budget_ms, t.budget_ms
        members = band_members(recipe.space, pred.predict_ms, low, high, recipe.seed)
        name = f"{pred.table.name} {budget_label(t.budget_ms)}"
        if not members:
            lo, hi = pred.predict_ms(recipe.space.smallest()), pred.predict_ms(recipe.space.largest())
            raise UserError(f"target {name}: no subnet is predicted within {low:.4g}-{high:.4g} ms on that table "
                            f"(the space spans {lo:.4g}-{hi:.4g} ms); choose a budget inside that range")
        bands.append(Band(name, low, high, members))
    return bands


def band_draws(bands: list[Band], step: int, seed: int, per_step: int, candidates: int) -> list[tuple[Subnet, ...]]:
    """The band subnets of ``step``: ``per_step`` bands taken in turn, ``candidates`` draws from each;
    the draw depends only on (seed, step), so a resumed run draws the same."""
    if not bands:
        return []
    rng = random.Random(f"{seed}:{step}:targets")
    out = []
    for j in range(per_step):
        band = bands[(step * per_step + j) % len(bands)]
        out.append(tuple(rng.choice(band.members) for _ in range(candidates)))
    return out


def lowest_loss(candidates: tuple[Subnet, ...], loss_of: Callable[[Subnet], float]) -> Subnet:
    """Of several draws, the one with the lowest loss on the current batch (the best-of-k rule of
    Wang et al. 2021; first on ties); one draw is returned without computing anything."""
    if len(candidates) == 1:
        return candidates[0]
    losses = [loss_of(s) for s in candidates]
    return candidates[min(range(len(candidates)), key=losses.__getitem__)]


def first_elite(bands: list[Band], seed: int, size: int) -> Elite:
    """Each band's first ``size`` distinct seeded draws from its members (all of them when it has
    fewer); seeded from (seed, band), so a fresh and a resumed run start alike. {} when ``size`` is 0."""
    if not size:
        return {}
    return {b.name: tuple(random.Random(f"{seed}:{b.name}:elite").sample(b.members, min(size, len(b.members))))
            for b in bands}


def challenge(elite: tuple[Subnet, ...], slot: int, fresh: Subnet,
              loss_of: Callable[[Subnet], float]) -> tuple[Subnet, tuple[Subnet, ...]]:
    """(trained, new elite): the lower-loss of the member in ``slot`` and a fresh draw is trained and
    holds the slot, the member on ties; a draw already kept does not challenge (the elite stays distinct)."""
    member = elite[slot]
    if fresh in elite or loss_of(fresh) >= loss_of(member):
        return member, elite
    return fresh, elite[:slot] + (fresh,) + elite[slot + 1:]


def elite_subnets(bands: list[Band], elite: Elite, step: int, seed: int, per_step: int,
                  loss_of: Callable[[Subnet], float]) -> tuple[list[Subnet], Elite]:
    """The band subnets of ``step`` with a kept elite, and the elite after it: bands in turn as
    ``band_draws`` takes them, its draw the challenger of the slot whose turn it is (each band's own
    turns counted, so every slot is visited in turn)."""
    trained, elite = [], dict(elite)
    for j, (fresh,) in enumerate(band_draws(bands, step, seed, per_step, 1)):
        turn = step * per_step + j
        name = bands[turn % len(bands)].name
        slot = turn // len(bands) % len(elite[name])
        subnet, elite[name] = challenge(elite[name], slot, fresh, loss_of)
        trained.append(subnet)
    return trained, elite


def band_subnets(bands: list[Band], elite: Elite, step: int, seed: int, cfg: TrainConfig,
                 loss_of: Callable[[Subnet], float]) -> tuple[list[Subnet], Elite]:
    """The band subnets ``step`` trains under the recipe's target levers, and the elite after it."""
    if cfg.target_elite:
        return elite_subnets(bands, elite, step, seed, cfg.target_subnets, loss_of)
    draws = band_draws(bands, step, seed, cfg.target_subnets, cfg.target_candidates)
    return [lowest_loss(c, loss_of) for c in draws], elite


def elite_keys(elite: Elite) -> dict[str, list[str]]:
    """The elite as checkpoint data: subnet keys per band name."""
    return {name: [s.to_key() for s in members] for name, members in elite.items()}


def elite_from_keys(keys: dict[str, list[str]]) -> Elite:
    """The elite a checkpoint stored, for the resumed run to continue with."""
    return {name: tuple(Subnet.from_key(k) for k in members) for name, members in keys.items()}


@torch.no_grad()
def batch_loss(model: Supernet, x: torch.Tensor, y: torch.Tensor, subnet: Subnet) -> float:
    """Cross-entropy of ``subnet`` on the batch, in training mode (batch statistics), no gradient."""
    model.set_subnet(subnet)
    with torch.autocast("cuda", dtype=torch.bfloat16, enabled=x.is_cuda):
        return F.cross_entropy(model(x).float(), y).item()

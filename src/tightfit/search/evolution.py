"""Latency-constrained search over a space: regularized evolution, random search, Pareto front.

Pure Python over two callables, ``fitness(subnet) -> float`` (higher is better) and
``latency(subnet) -> float`` (ms), so tests drive it with synthetic functions and the
real search plugs in BN-recalibrated accuracy and a latency predictor.

Regularized (aging) evolution follows Real et al. 2019 (Sec. 2, Algorithm 1): keep a
queue of P models; each cycle samples S of them, mutates the best, appends the child
and removes the OLDEST (not the worst). Here every member and every child satisfies the
latency budget: the initial population is drawn within it and a mutation that would
exceed it is drawn again. Latency is cheap and accuracy is not, so both prefer subnets in
a band just under the budget (``band``; common practice: within a budget, the larger
subnet is usually the more accurate), falling back to anything within the budget when the
band is empty or hard to hit.
"""
from __future__ import annotations

import random
from collections import deque
from dataclasses import dataclass
from typing import Callable, Optional, Sequence

from tightfit.errors import UserError
from tightfit.model.space import SpaceSpec, Subnet

Fitness = Callable[[Subnet], float]
Latency = Callable[[Subnet], float]


@dataclass(frozen=True)
class EvolutionSettings:
    population: int = 16          # P: size of the aging queue
    sample_size: int = 6          # S: tournament size (Real et al. 2019 use S < P)
    evaluations: int = 96         # distinct candidates evaluated, initial population included
    change_probability: float = 0.1      # per decision: a stage's depth, a block's expansion or kernel, a width
    seed: int = 0
    sample_tries: int = 300       # rejection-sampling attempts before shrinking random draws instead
    redraws: int = 100            # mutation attempts before giving up on a parent this cycle
    band: float = 0.9             # prefer latency >= band * min(budget, largest's latency); 0 = off


@dataclass(frozen=True)
class Candidate:
    key: str
    subnet: Subnet
    fitness: float
    latency_ms: float
    generation: int               # 0 = initial population, then one per P children


def fastest_check(space: SpaceSpec, latency: Latency, budget_ms: float, device: str) -> None:
    """Refuse a budget below the smallest subnet's latency, naming what the fastest takes."""
    fastest = latency(space.smallest())
    if fastest > budget_ms:
        raise UserError(f"budget {budget_ms:g} ms is below the fastest subnet: smallest predicts "
                        f"{fastest:.3f} ms on {device}; raise the budget to at least {fastest:.3f} ms")


def shrink(space: SpaceSpec, subnet: Subnet, rng: random.Random) -> Subnet:
    """One random step towards the smallest subnet: drop a block or lower one choice."""
    stages = [list(b) for b in subnet.stages]
    widths = list(subnet.widths)
    moves = [("width", i, -1) for i, (w, options) in enumerate(zip(widths, space.width_options())) if w > min(options)]
    for i, (st, blocks) in enumerate(zip(space.stages, stages)):
        if len(blocks) > min(st.depths):
            moves.append(("depth", i, -1))
        for j, (e, k) in enumerate(blocks):
            if e > min(st.expansions):
                moves.append(("exp", i, j))
            if k > min(st.kernels):
                moves.append(("kernel", i, j))
    if not moves:
        return subnet
    what, i, j = rng.choice(moves)
    if what == "width":
        widths[i] = max(x for x in space.width_options()[i] if x < widths[i])
        return Subnet(subnet.stages, tuple(widths))
    st = space.stages[i]
    if what == "depth":
        stages[i] = stages[i][:max(d for d in st.depths if d < len(stages[i]))]
    elif what == "exp":
        e, k = stages[i][j]
        stages[i][j] = (max(x for x in st.expansions if x < e), k)
    else:
        e, k = stages[i][j]
        stages[i][j] = (e, max(x for x in st.kernels if x < k))
    return Subnet(tuple(tuple(b) for b in stages), subnet.widths)


def sample_within(space: SpaceSpec, rng: random.Random, latency: Latency, budget_ms: float,
                  tries: int = 300, floor_ms: float = 0.0) -> Subnet:
    """A subnet with floor <= latency <= budget: uniform rejection sampling; with no hit, the
    floor is dropped, and then (if the budget admits only a sliver of the space) a uniform
    draw is shrunk step by step until it fits.
    Call fastest_check first: shrinking ends at the smallest subnet, which must fit."""
    for _ in range(tries):
        s = space.sample(rng)
        if floor_ms <= latency(s) <= budget_ms:
            return s
    if floor_ms > 0:
        return sample_within(space, rng, latency, budget_ms, tries)
    s = space.sample(rng)
    while latency(s) > budget_ms:
        smaller = shrink(space, s, rng)
        if smaller == s:
            break
        s = smaller
    return s


def mutate(space: SpaceSpec, subnet: Subnet, rng: random.Random, prob: float) -> Subnet:
    """Change each stage's depth, each block's expansion and kernel, and each width (stem and
    stages, where elastic) with probability ``prob``; at least one decision always changes."""
    while True:
        stages = []
        for st, blocks in zip(space.stages, subnet.stages):
            blocks = list(blocks)
            if len(st.depths) > 1 and rng.random() < prob:
                depth = rng.choice([d for d in st.depths if d != len(blocks)])
                while len(blocks) < depth:  # a new block starts as a copy of the last one
                    blocks.append(blocks[-1])
                blocks = blocks[:depth]
            for j, (e, k) in enumerate(blocks):
                if len(st.expansions) > 1 and rng.random() < prob:
                    e = rng.choice([x for x in st.expansions if x != e])
                if len(st.kernels) > 1 and rng.random() < prob:
                    k = rng.choice([x for x in st.kernels if x != k])
                blocks[j] = (e, k)
            stages.append(tuple(blocks))
        widths = tuple(rng.choice([x for x in options if x != w]) if len(options) > 1 and rng.random() < prob else w
                       for w, options in zip(subnet.widths, space.width_options()))
        child = Subnet(tuple(stages), widths)
        if child != subnet or space.size() == 1:
            return child


class _Ledger:
    """Evaluates each distinct subnet once and remembers everything evaluated, in order."""

    def __init__(self, fitness: Fitness, latency: Latency, on_eval: Optional[Callable[[Candidate], None]]):
        self.fitness, self.latency, self.on_eval = fitness, latency, on_eval
        self.seen: dict[str, Candidate] = {}

    def evaluate(self, subnet: Subnet, generation: int) -> Candidate:
        key = subnet.to_key()
        if key not in self.seen:
            c = Candidate(key, subnet, float(self.fitness(subnet)), float(self.latency(subnet)), generation)
            self.seen[key] = c
            if self.on_eval:
                self.on_eval(c)
        return self.seen[key]

    def adopt(self, c: Candidate) -> None:
        """A candidate evaluated elsewhere: remembered (and reported) without calling the fitness."""
        if c.key not in self.seen:
            self.seen[c.key] = c
            if self.on_eval:
                self.on_eval(c)


def _fresh_within(space: SpaceSpec, rng: random.Random, ledger: _Ledger, budget_ms: float, tries: int,
                  floor_ms: float = 0.0) -> Subnet:
    """A within-budget subnet not evaluated yet when one turns up in a few dozen draws."""
    s = sample_within(space, rng, ledger.latency, budget_ms, tries, floor_ms)
    for _ in range(10):
        if s.to_key() not in ledger.seen:
            break
        s = sample_within(space, rng, ledger.latency, budget_ms, tries, floor_ms)
    return s


def band_floor(space: SpaceSpec, latency: Latency, budget_ms: float, band: float) -> float:
    """Lower edge of the preferred band: band x the budget, or x the largest subnet's latency
    when the whole space fits."""
    return band * min(budget_ms, latency(space.largest())) if band > 0 else 0.0


def _child(space: SpaceSpec, parent: Subnet, rng: random.Random, ledger: _Ledger, budget_ms: float,
           cfg: EvolutionSettings, floor_ms: float = 0.0) -> Subnet:
    """Mutate until the child is new and within budget (the first half of the attempts also
    in the band); else a fresh random subnet within budget."""
    fallback = None
    for i in range(cfg.redraws):
        c = mutate(space, parent, rng, cfg.change_probability)
        if c.to_key() in ledger.seen or ledger.latency(c) > budget_ms:
            continue
        if ledger.latency(c) >= floor_ms or i >= cfg.redraws // 2:
            return c
        fallback = fallback or c
    return fallback or _fresh_within(space, rng, ledger, budget_ms, cfg.sample_tries, floor_ms)


def in_band(seeds: Sequence[Candidate], floor_ms: float, budget_ms: float) -> list[Candidate]:
    """Distinct candidates already evaluated (another budget's) inside [floor, budget], most accurate first."""
    unique = {c.key: c for c in seeds if floor_ms <= c.latency_ms <= budget_ms}
    return sorted(unique.values(), key=lambda c: (-c.fitness, c.latency_ms))


def regularized_evolution(space: SpaceSpec, fitness: Fitness, latency: Latency, budget_ms: float,
                          cfg: EvolutionSettings, on_eval: Optional[Callable[[Candidate], None]] = None,
                          device: str = "device", band_under_ms: Optional[float] = None,
                          seeds: Sequence[Candidate] = ()) -> list[Candidate]:
    """Aging evolution under ``latency <= budget_ms``; returns every evaluated candidate in order.
    The preferred band lies under ``band_under_ms`` (default: the budget searched), so a search that
    may go above the budget still explores the rungs under it (choose.py measures them).
    ``seeds``: candidates other budgets of the device evaluated. A subnet's accuracy does not depend on the
    budget, so those in this band join the ledger without a fitness call, count towards ``evaluations`` and
    start the population (most accurate first); only the rest of the population is drawn."""
    fastest_check(space, latency, budget_ms, device)
    rng = random.Random(cfg.seed)
    ledger = _Ledger(fitness, latency, on_eval)
    floor_ms = band_floor(space, latency, min(budget_ms, band_under_ms or budget_ms), cfg.band)
    population: deque[Candidate] = deque()
    for c in in_band(seeds, floor_ms, budget_ms)[:cfg.evaluations]:
        ledger.adopt(c)
        if len(population) < cfg.population:
            population.append(c)
    while len(population) < min(cfg.population, cfg.evaluations):
        population.append(ledger.evaluate(_fresh_within(space, rng, ledger, budget_ms, cfg.sample_tries, floor_ms), 0))
    cycle, stalls = 0, 0
    # Consecutive cycles without a new subnet: the budget admits too few to find more. Each such cycle
    # costs thousands of draws, and 10 x evaluations of them once took 56 s of a 59 s search.
    while len(ledger.seen) < cfg.evaluations and stalls < max(cfg.population, 8):
        tournament = rng.sample(list(population), min(cfg.sample_size, len(population)))
        parent = max(tournament, key=lambda c: c.fitness)
        before = len(ledger.seen)
        child = ledger.evaluate(_child(space, parent.subnet, rng, ledger, budget_ms, cfg, floor_ms),
                                1 + cycle // max(cfg.population, 1))
        stalls = stalls + 1 if len(ledger.seen) == before else 0
        population.append(child)
        population.popleft()
        cycle += 1
    return list(ledger.seen.values())


def random_search(space: SpaceSpec, fitness: Fitness, latency: Latency, budget_ms: float, evaluations: int,
                  seed: int = 0, on_eval: Optional[Callable[[Candidate], None]] = None,
                  device: str = "device", sample_tries: int = 300, band: float = 0.0) -> list[Candidate]:
    """Baseline: ``evaluations`` distinct subnets drawn uniformly within the budget (rejection
    sampling; where the budget admits only a sliver of the space, see sample_within), or
    within the band under it when ``band`` > 0 (as the evolution draws its first members)."""
    fastest_check(space, latency, budget_ms, device)
    rng = random.Random(seed)
    ledger = _Ledger(fitness, latency, on_eval)
    floor_ms = band_floor(space, latency, budget_ms, band)
    for _ in range(10 * evaluations):
        if len(ledger.seen) >= evaluations:
            break
        ledger.evaluate(_fresh_within(space, rng, ledger, budget_ms, sample_tries, floor_ms), 0)
    return list(ledger.seen.values())


def pareto_front(points: list[tuple[str, float, float]]) -> list[tuple[str, float, float]]:
    """Non-dominated (key, accuracy, latency) points, fastest first: no other point is at least
    as accurate and at least as fast while strictly better in one."""
    ordered = sorted(points, key=lambda p: (p[2], -p[1]))
    front: list[tuple[str, float, float]] = []
    for p in ordered:
        tie = bool(front) and (p[1], p[2]) == (front[-1][1], front[-1][2])  # equal points do not dominate
        if not front or p[1] > front[-1][1] or tie:
            front.append(p)
    return front


def front_first(ranked: list[Candidate]) -> list[Candidate]:
    """Pareto-front candidates first, most accurate first: each is faster than the one before,
    so the measured set spans latencies even when the most accurate few are alike."""
    front = {k for k, _, _ in pareto_front([(c.key, c.fitness, c.latency_ms) for c in ranked])}
    return [c for c in ranked if c.key in front] + [c for c in ranked if c.key not in front]

"""The Fashion-MNIST benchmark's verdict: per (device, budget) the pick against the most accurate
family member that fits in the final session, the CPU split, and the targets of the claim.
"""
from __future__ import annotations

from pathlib import Path

from fashion_mnist_budgets import ABOVE, BETWEEN, Placement
from fashion_mnist_models import DEVICES, relative

SUPERNET_SIDE = ("train supernet", "profile ", "search ")  # a search phase includes its picks' fine-tunes
FAMILY_SIDE = ("train baseline ", "measure family ")
GAIN_TARGET, BEST_TARGET, SMALL_TARGET, USE_TARGET = 0.5, 92.5, 92.0, 0.9  # the claim's targets (points, %, %, share)


def on_device(m: dict, device: str) -> dict:
    """A model row with the device's latency figures in front (p50_ms, p90_ms, ...)."""
    return {**{k: v for k, v in m.items() if k != "latency"}, **m["latency"][device]}


def best_fitting(models: list[dict], budget: float) -> dict | None:
    fits = [m for m in models if m["kind"] == "baseline" and m["p90_ms"] <= budget]
    return max(fits, key=lambda m: m["test_acc"]) if fits else None


def phase_cpu(phases: dict, prefixes: tuple[str, ...]) -> float:
    """CPU-seconds of the phases whose names start with one of ``prefixes``."""
    return sum(v["cpu_s"] for k, v in phases.items() if k.startswith(prefixes))


def budget_row(models: list[dict], device: str, place: Placement, refused: str | None) -> dict:
    """One (device, budget): the pick, the best fitting member, and how the placement held in the final
    session; ``refused`` says why the supernet did not train for this budget (None: it did)."""
    b = place.budget_ms
    pick = next(m for m in models if m["kind"] == "pick" and m["device"] == device and m["budget_ms"] == b)
    base = best_fitting(models, b)
    p90 = {m["name"]: m["p90_ms"] for m in models if m["kind"] == "baseline"}
    held = (p90.get(place.members[0], float("inf")) <= b if place.placement == ABOVE
            else p90.get(place.members[0], float("inf")) <= b < p90.get(place.members[1], 0.0))
    inherited = pick.get("test_acc_inherited")
    return {"device": device, "budget_ms": b, "placement": place.placement, "members": list(place.members),
            "placement_holds": held, "trained_for": refused is None, "not_trained_because": refused, "pick": pick, "baseline": base,
            "pick_fits": pick["p90_ms"] <= b, "budget_use": round(pick["p90_ms"] / b, 4),
            "gain_points": round(pick["test_acc"] - base["test_acc"], 2) if base else None,
            "gain_points_inherited": round(inherited - base["test_acc"], 2) if base and inherited is not None else None}


def targets(rows: list[dict], picks: list[dict], cpu: dict) -> dict:
    """The claim's targets, computed from the measurements."""
    small = [m for m in picks if m["params"] < 100_000]
    gains = [r["gain_points"] for r in rows]

    def least(placement: str) -> float | None:
        return min((r["gain_points"] for r in rows if r["placement"] == placement and r["gain_points"] is not None),
                   default=None)
    return {"min_gain_points": min((g for g in gains if g is not None), default=None), "gain_target": GAIN_TARGET,
            "min_gain_points_above": least(ABOVE), "min_gain_points_between": least(BETWEEN),
            "gain_at_every_budget": all(g is not None and g >= GAIN_TARGET for g in gains),
            "best_pick_test_acc": max(m["test_acc"] for m in picks), "best_pick_target": BEST_TARGET,
            "best_small_pick_test_acc": max((m["test_acc"] for m in small), default=None), "small_pick_target": SMALL_TARGET,
            "min_budget_use": min(r["budget_use"] for r in rows), "budget_use_target": USE_TARGET,
            "cpu_ratio_supernet_search_over_family": round(cpu["supernet_plus_search"] / max(cpu["family"], 1e-9), 3),
            "cpu_ratio_target": 1.0,
            "search_share_of_training": round((cpu["supernet_plus_search"] - cpu["supernet_training"])
                                              / max(cpu["supernet_training"], 1e-9), 3), "search_share_aim": 0.15}


def cpu_split(phases: dict, picks: list[dict]) -> dict:
    """CPU-seconds of each side, the supernet's split into training, profiling, search and fine-tunes."""
    finetune = sum((p.get("finetune") or {}).get("cpu_s", 0.0) for p in picks if not (p.get("finetune") or {}).get("reused"))
    out = {"supernet_training": phase_cpu(phases, ("train supernet",)), "profiling": phase_cpu(phases, ("profile ",)),
           "search": phase_cpu(phases, ("search ",)), "finetune": round(finetune, 1),
           "supernet_plus_search": phase_cpu(phases, SUPERNET_SIDE),
           "family_training": phase_cpu(phases, ("train baseline ",)),
           "family_measuring": phase_cpu(phases, ("measure family ",)), "family": phase_cpu(phases, FAMILY_SIDE)}
    return out


def summarize(phases: dict, measured: dict, placements: dict[str, list[Placement]],
              refused: dict[str, dict[str, str | None]], picks: list[dict]) -> dict:
    """Per (device, budget) the pick vs the most accurate member that fits in the final session; a placement
    that no longer holds there (its member over the budget, or the larger member inside it) is marked, and
    the page says what that does to the comparison."""
    rows = []
    for device, _ in DEVICES:
        models = [on_device(m, device) for m in measured["models"]]
        rows += [budget_row(models, device, p, refused[device].get(str(p.budget_ms))) for p in placements[device]]
    cpu = cpu_split(phases, picks)
    return {"budgets": rows, "targets": targets(rows, [m for m in measured["models"] if m["kind"] == "pick"], cpu),
            "test_images": measured["test_images"], "cpu_seconds": cpu, "models": measured["models"],
            "protocols": measured["protocols"]}


def portable_recipe(recipe, run: Path) -> dict:
    """The recipe as stored in results: its target tables relative to the run folder."""
    d = recipe.to_dict()
    d["train"]["targets"] = [{**t, "table": relative(t["table"], run)} for t in d["train"]["targets"]]
    return d


def format_summary(result: dict) -> str:
    lines = [f"{'device':<15} {'budget':>8} {'placement':<16} {'pick test %':>11} {'p90 ms':>7} {'use':>5} "
             f"{'params':>8}   {'baseline':<10} {'test %':>6} {'p90 ms':>7} {'gain':>6}"]
    for r in result["budgets"]:
        p, b = r["pick"], r["baseline"]
        lines.append(f"{r['device']:<15} {r['budget_ms']:>6.3f}ms {r['placement']:<16} {p['test_acc']:>11.2f} "
                     f"{p['p90_ms']:>7.3f} {r['budget_use']:>5.2f} {p['params']:>8,}   "
                     + (f"{b['name']:<10} {b['test_acc']:>6.2f} {b['p90_ms']:>7.3f} {r['gain_points']:>+6.2f}" if b
                        else "(no baseline fits)"))
    c = result["cpu_seconds"]
    lines.append(f"CPU-s: supernet training {c['supernet_training']:.0f} + profiling {c['profiling']:.0f} + search "
                 f"{c['search']:.0f} (fine-tunes {c['finetune']:.0f}) = {c['supernet_plus_search']:.0f}; family training "
                 f"{c['family_training']:.0f} + measuring {c['family_measuring']:.0f} = {c['family']:.0f}")
    return "\n".join(lines)

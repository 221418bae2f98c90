"""Sentences and lines of the benchmark page (scripts/bench_page.py) that read one part of a result.

Results written before a field existed still render: each reader falls back to what they held then.
"""
from __future__ import annotations


def fmt(v, spec: str, none: str = "none") -> str:
    return none if v is None else format(v, spec)


def sampled_text(eq: dict) -> str:
    """Where the supernet's step cost came from."""
    targets = (eq.get("sampled") or {}).get("targets")
    if targets is None:
        return "sampled from real sandwich steps"
    return f"sampled from real steps of the training loop, its {targets} targets' band draws included"


def targets_text(result: dict) -> str:
    rows = result["budgets"]
    if not any("trained_for" in r for r in rows):
        return ""
    n = sum(bool(r["trained_for"]) for r in rows)
    return (f" The supernet trained for {n} of the {len(rows)} budgets as targets (the two latency profiles as "
            "tables, profiled from the recipe before training), each step also training a subnet drawn from a "
            "target's latency band.")


def placement_gains(t: dict) -> str:
    if "min_gain_points_above" not in t:
        return ""
    return (f"; above a member {fmt(t['min_gain_points_above'], '+.2f')}, between members "
            f"{fmt(t['min_gain_points_between'], '+.2f')}")


def use_lines(t: dict) -> list[str]:
    if "min_budget_use" not in t:
        return []
    return [f"- every pick uses >= {100 * t['budget_use_target']:.0f} % of its budget (measured p90 / budget, final "
            f"session): {'yes' if t['min_budget_use'] >= t['budget_use_target'] else 'NO'} "
            f"(least {100 * t['min_budget_use']:.0f} %)"]


def search_cost(c: dict) -> str:
    """Profiling and search (its fine-tunes included) apart where the result keeps them apart."""
    if "profiling" not in c:
        return f"profiling + search of every device and budget: {c['search']:.0f}"
    return (f"profiling both devices from the recipe: {c['profiling']:.0f}; search of every device and budget: "
            f"{c['search']:.0f} (fine-tuning the picks {c['finetune']:.0f} of it)")


def search_wall(result: dict) -> str:
    if "search_wall_s" in result:
        return "- Search time per device, all its budgets and their confirmation (wall, s): " + ", ".join(
            f"{k}: {v:.0f}" for k, v in result["search_wall_s"].items())
    return "- Search time per (device, budget) (wall, s): " + ", ".join(
        f"{k} ms: {v:.0f}" for k, v in result["picks_search_s"].items())


def timing_heading(timing: dict) -> str:
    if all(isinstance(v, dict) for v in timing.values()):
        return "Choosing each (device, budget)'s pick after its evolution (seconds per phase, from the search's pick records):"
    return "Search timing per (device, budget) (from `tightfit search`):"


def pick_timing(v) -> str:
    """A pick's timing: the seconds of each choosing phase, or (older results) the search's own lines."""
    if isinstance(v, dict):
        return ", ".join(f"{k} {s:.1f} s" for k, s in v.items()) or "none recorded"
    return "; ".join(v)


def kept_text(eq: dict) -> str:
    """What the supernet side kept of the family's CPU-seconds besides training: a share of them for
    profiling and search (older results), or the measured profiles and a share per budget's search."""
    est = eq.get("finetune_cpu_s_estimate")
    finetune = f", {est:.0f} CPU-s for fine-tuning the picks (estimated from sampled steps)," if est else ","
    if "reserve_share" in eq:
        return f"{100 * eq['reserve_share']:.0f} % of that was kept for profiling and search{finetune}"
    return (f"{eq['profiling_cpu_s']:.0f} CPU-s went to profiling both devices before training, "
            f"{100 * eq['search_share_per_budget']:.1f} % of the family's CPU-seconds was kept for each of the "
            f"{eq['budgets']} budgets' search ({eq['search_cpu_s_estimate']:.0f} CPU-s){finetune}")


def finetune_text(result: dict) -> str:
    s = result.get("search_settings") or {}
    if not s.get("finetune_steps"):
        return ""
    return (f" Each pick was fine-tuned {s['finetune_steps']} steps (lr {s['finetune_lr']:g}, cosine to zero) from its "
            "inherited weights, distilling from the supernet's largest subnet; a subnet picked for two budgets was "
            f"fine-tuned once. The fine-tunes cost {finetune_cpu(result):.0f} CPU-s, counted in the search "
            "phases. Both the inherited and the fine-tuned accuracy are shown; the gain is the fine-tuned pick's.")


def finetune_cpu(result: dict) -> float:
    return result["cpu_seconds"].get("finetune", result.get("finetune_cpu_s", 0.0))


def ranking_lines(r: dict | None) -> list[str]:
    """The search's cheap score against the whole validation split, over random subnets."""
    if not r:
        return []
    return [f"The search ranks candidates on {r['images']:,} validation images and re-scores the best on all "
            f"{r['whole_images']:,}. Over {r['subnets']} random subnets the cheap score against the whole split: "
            f"Kendall τ {fmt(r['kendall_tau'], '.3f', 'undefined')}, "
            f"mean |difference| {r['mean_abs_diff_points']:.2f} points; the best by "
            f"the whole split was {'' if r['best_whole_in_cheap_top'] else 'NOT '}among the cheap score's top "
            f"re-scored; CPU-s per subnet {r['cheap_cpu_s_per_subnet']:.2f} (cheap) vs {r['whole_cpu_s_per_subnet']:.2f} "
            "(whole, with a second BN recalibration that reuses the first's cached prefix).", ""]


def ratio_lines(ratio: dict) -> list[str]:
    """How far the machine had moved from its latency table: what the measured top candidates showed."""
    if not any(v is not None for v in ratio.values()):
        return []
    shown = ", ".join(f"{k} ms {'-' if v is None else f'{v:.3f} x'}" for k, v in ratio.items())
    return [f"The measured top candidates against their predictions (median measured / predicted p90, "
            f"last search of each budget): {shown}.", ""]

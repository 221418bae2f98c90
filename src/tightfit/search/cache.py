"""The accuracy cache and memoised latency of a search.

One JSON line per evaluated subnet (tightfit.ondevice.files.append_jsonl), so an interrupted or
repeated search pays only for subnets it has not seen, and other budgets reuse them.
"""
from __future__ import annotations

import time
from pathlib import Path
from typing import Any, Callable, Optional, Protocol

from tightfit.model.space import Subnet
from tightfit.ondevice.files import append_jsonl, read_jsonl


class Predictor(Protocol):
    def predict_ms(self, subnet: Subnet) -> float: ...


class AccuracyCache:
    """Accuracy per subnet key, valid only for the same recipe, weights and evaluation setup (``tag``)."""

    def __init__(self, path: Path, tag: dict[str, Any]):
        self.path, self.tag = Path(path), dict(tag)
        self.entries = {r["key"]: r for r in read_jsonl(self.path)[0]  # held-out scores (skip) never serve a search
                        if "key" in r and all(r.get(k) == v for k, v in self.tag.items())
                        and r.get("skip", 0) == self.tag.get("skip", 0)}

    def get(self, key: str) -> Optional[dict[str, Any]]:
        return self.entries.get(key)

    def put(self, key: str, record: dict[str, Any]) -> None:
        rec = {"key": key, **record, **self.tag}
        append_jsonl(self.path, rec)
        self.entries[key] = rec


class CachedAccuracy:
    """fitness(subnet) through the cache; ``compute`` returns {"val_acc", "params", "macs"}."""

    def __init__(self, cache: AccuracyCache, compute: Callable[[Subnet], dict[str, Any]]):
        self.cache, self.compute = cache, compute
        self.fresh = self.hits = 0

    def record(self, subnet: Subnet) -> dict[str, Any]:
        key = subnet.to_key()
        rec = self.cache.get(key)
        if rec is None:
            self.cache.put(key, self.compute(subnet))
            rec = self.cache.get(key)
            self.fresh += 1
        else:
            self.hits += 1
        return rec

    def __call__(self, subnet: Subnet) -> float:
        return float(self.record(subnet)["val_acc"])


class CachedLatency:
    """Predicted ms per key (the predictor is called once per subnet) and the time it took."""

    def __init__(self, predictor: Predictor):
        self.predictor, self.memo, self.seconds = predictor, {}, 0.0

    def __call__(self, subnet: Subnet) -> float:
        key = subnet.to_key()
        if key not in self.memo:
            t0 = time.perf_counter()
            self.memo[key] = float(self.predictor.predict_ms(subnet))
            self.seconds += time.perf_counter() - t0
        return self.memo[key]

"""What `tightfit report` reads from a run folder, tolerant of missing or torn pieces.

RUN_DIR/metrics.jsonl, search/candidates.jsonl, search/front-*.json, search/picks.json,
baselines.json, latency/*.json and the exports' manifests and verdicts. A missing piece is
a note for the page, never an error.
"""
from __future__ import annotations

import json
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from tightfit.errors import UserError
from tightfit.ondevice.accuracy import Accuracy, format_accuracy
from tightfit.ondevice.files import read_jsonl
from tightfit.recipe import load_recipe
from tightfit.search.evolution import pareto_front


@dataclass
class RunData:
    """Everything the report draws, as read from the run folder."""
    run_dir: Path
    recipe: dict[str, Any] = field(default_factory=dict)
    metrics: list[dict] = field(default_factory=list)
    candidates: list[dict] = field(default_factory=list)
    fronts: dict[str, list[dict]] = field(default_factory=dict)
    picks: list[dict] = field(default_factory=list)
    baselines: list[dict] = field(default_factory=list)
    tables: dict[str, dict] = field(default_factory=dict)     # device name -> latency table "hardware" record
    manifests: dict[str, dict] = field(default_factory=dict)  # export_dir -> manifest
    qa: dict[str, dict] = field(default_factory=dict)         # export_dir -> verify verdict row
    notes: list[str] = field(default_factory=list)


def _read_json(path: Path, notes: list[str]) -> Any:
    """Parsed JSON, or None with a note when the file is unreadable (absent files give None silently)."""
    if not path.is_file():
        return None
    try:
        return json.loads(path.read_text("utf-8"))
    except (OSError, UnicodeDecodeError, json.JSONDecodeError) as exc:
        notes.append(f"{path.name} could not be read ({exc}); it is left out")
        return None


def _read_log(path: Path, notes: list[str]) -> list[dict]:
    """Records of a JSON-lines log; torn or malformed lines are skipped and counted in a note."""
    rows, bad = read_jsonl(path)
    if bad:
        notes.append(f"{path.name}: {bad} malformed line(s) skipped")
    return rows


def _read_recipe(run_dir: Path, notes: list[str]) -> dict[str, Any]:
    """Recipe name and hash; the hash only when the recipe still loads."""
    path = run_dir / "recipe.toml"
    if not path.is_file():
        notes.append("no recipe.toml in the run folder")
        return {}
    try:
        recipe = load_recipe(path)
        return {"name": recipe.name, "hash": recipe.hash()}
    except (UserError, OSError) as exc:
        notes.append(f"recipe.toml does not load ({exc})")
        return {}


def export_folder(pick: dict, run_dir: Path) -> str:
    """The pick's export folder as an absolute path; a relative one is tried from here, then in RUN_DIR/exports."""
    given = Path(pick.get("export_dir") or "")
    if given.is_absolute() or given.is_dir() or not given.name:
        return str(given.resolve())
    return str((run_dir / "exports" / given.name).resolve())


def accuracy_text(record: Any, bare: Any = None) -> str:
    """An accuracy record (a manifest's, a verdict's) in the one printed form; without a readable one,
    the bare figure a log kept (no image count, so no interval), or '-'."""
    acc = Accuracy.from_dict(record)
    if acc is not None or not _number(bare):
        return format_accuracy(acc)
    return f"{bare:.1f} % (image count not recorded)"


def manifest_claim(manifest: Any, split: str) -> Any:
    """The manifest's accuracy record for a split ("validation", "test"); None when there is none."""
    claims = manifest.get("accuracy") if isinstance(manifest, dict) else None
    return claims.get(split) if isinstance(claims, dict) else None


def _read_exports(data: RunData) -> None:
    """Manifests of the picks' exports and the latest QA verdict rows that mention them."""
    for pick in data.picks:
        folder = export_folder(pick, data.run_dir)
        man = _read_json(Path(folder) / "manifest.json", data.notes)
        if isinstance(man, dict):
            data.manifests[folder] = man
    verdicts = [*data.run_dir.glob("verdict.json"), *data.run_dir.glob("exports/**/verdict.json")]
    for path in sorted(verdicts, key=lambda p: p.stat().st_mtime):  # the latest verdict of each export wins
        verdict = _read_json(path, data.notes)
        for row in (verdict or {}).get("models", []) if isinstance(verdict, dict) else []:
            data.qa[str(Path(row.get("export_dir", "")).resolve())] = row


def load_run(run_dir: str | Path) -> RunData:
    """Read every piece the report can use; refuse only a folder that is not a run at all."""
    root = Path(run_dir)
    if not root.is_dir():
        raise UserError(f"run folder {root} not found; pass a folder written by 'tightfit train'")
    if not any((root / p).exists() for p in ("recipe.toml", "metrics.jsonl", "search")):
        raise UserError(f"{root} holds no recipe.toml, metrics.jsonl or search/; "
                        "pass a run folder from 'tightfit train'")
    data = RunData(root)
    data.recipe = _read_recipe(root, data.notes)
    data.metrics = _read_log(root / "metrics.jsonl", data.notes)
    data.candidates = [c for c in _read_log(root / "search" / "candidates.jsonl", data.notes)
                       if _has_numbers(c, "val_acc", "predicted_ms", "budget_ms")]
    for path in sorted((root / "search").glob("front-*.json")):
        raw = _read_json(path, data.notes)
        rows = raw.get("front") if isinstance(raw, dict) else raw
        name = raw.get("device") if isinstance(raw, dict) else None
        if isinstance(rows, list):
            data.fronts[name or path.stem[len("front-"):]] = [r for r in rows
                                                              if _has_numbers(r, "val_acc", "predicted_ms")]
    picks = _read_json(root / "search" / "picks.json", data.notes)
    data.picks = [p for p in picks if _has_numbers(p, "val_acc", "predicted_ms", "budget_ms")] \
        if isinstance(picks, list) else []
    baselines = _read_json(root / "baselines.json", data.notes)
    data.baselines = [b for b in baselines if isinstance(b, dict)] if isinstance(baselines, list) else []
    for path in sorted((root / "latency").glob("*.json")):
        table = _read_json(path, data.notes)
        if isinstance(table, dict) and isinstance(table.get("hardware"), dict):
            data.tables[path.stem] = table["hardware"]
    _read_exports(data)
    return data


def _number(v: Any) -> bool:
    return isinstance(v, (int, float)) and not isinstance(v, bool)


def _has_numbers(row: Any, *keys: str) -> bool:
    """A record the plots can use: a dict with numbers under these keys (others are skipped)."""
    return isinstance(row, dict) and all(_number(row.get(k)) for k in keys)


def front_points(points: list[tuple[float, float]]) -> list[tuple[float, float]]:
    """Non-dominated (latency ms, accuracy) points, fastest first (tightfit.search.evolution.pareto_front)."""
    front = pareto_front([(str(i), acc, ms) for i, (ms, acc) in enumerate(points)])
    return list(dict.fromkeys((ms, acc) for _, acc, ms in front))


def _devices(data: RunData) -> list[str]:
    names = [c.get("device") for c in data.candidates] + list(data.fronts) + [p.get("device") for p in data.picks]
    return [n for n in dict.fromkeys(names) if n]

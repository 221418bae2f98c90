"""Measure a probe bundle on this device and write a latency table (needs only numpy + onnxruntime).

Probe bundle: a folder, or a .zip of that folder (index.json at the zip's top or
inside its single top-level folder), holding ONNX files and index.json:

  {"format": "tightfit-probe-bundle", "version": 1, "space_hash": "<str>",
   "entries": [{"id": "<unique str>", "kind": "layer" | "subnet",
                "file": "relative/path.onnx", "meta": {...}}]}

Latency table (written atomically to --out):

  {"format": "tightfit-latency-table", "version": 2, "space_hash": "<from bundle>",
   "hardware": {cpu, cores, OS, versions, ...}, "protocol": {...}, "created": "<ISO time>",
   "bundle": "<path>", "entries": {"<id>": {"kind", "file", "meta", "p50_ms", "p90_ms",
   "p99_ms", "mean_ms", "min_ms", "budget_stat_ms", "budget_percentile", "cv",
   "iqr_over_median", "repeat_figures_ms", "repeat_spread", "guard", "states", "runs",
   "stable", "note", "repeats": [...]}}}

Protocol: onnxruntime CPU provider, batch 1, 1 intra-op and 1 inter-op thread,
sequential execution, ORT_ENABLE_ALL; settle, then time: untimed runs until the
running median settles (--settle-runs at least, --settle-limit at most), then
timed runs, at least --time-runs of them and --time-seconds per subnet. Single-layer
probes (kind "layer") are many and tiny, so they get their own smaller budget
(--layer-time-runs, --layer-time-seconds). All entries are timed interleaved in
round-robin chunks (layers in one session, whole subnets in another), and each
session is repeated in fresh processes (5 by default); the figures are percentiles of
the pooled runs of every repeat. A budget is met when the budget_percentile (p90 by
default) is at or under it. An entry whose repeats' percentiles differ by more than
10 % is marked stable=false; every note says what was seen (ondevice/repeats.py).
"""
from __future__ import annotations

import argparse
import dataclasses
import json
import sys
import tempfile
import zipfile
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import Any

import onnxruntime as ort

from tightfit.ondevice.arguments import module_parser
from tightfit.ondevice.files import BUNDLE_FORMAT, TABLE_FORMAT, TABLE_VERSION, check_writable, write_json
from tightfit.ondevice.hardware import describe_hardware
from tightfit.ondevice.repeats import measure_repeated
from tightfit.ondevice.timing import Protocol, make_session, random_input, stderr_progress

KINDS = ("layer", "subnet")
QUICK = dict(repeats=1, settle_runs=10, settle_window=5, settle_limit=100, time_runs=50,
             time_seconds=0.25, layer_time_runs=20, layer_time_seconds=0.05)
# Protocol fields the command line sets (flag: --name-with-dashes), with help; the default is the Protocol's.
FLAGS = {
    "threads": "intra-op threads",
    "repeats": "fresh-process repeats; 0 or 1: one in-process run",
    "settle_runs": "untimed runs at least before timing, until the running median settles",
    "settle_limit": "untimed runs at most, if the running median never settles",
    "time_runs": "timed runs at least, per subnet per repeat",
    "time_seconds": "timed seconds at least, per subnet per repeat",
    "layer_time_runs": "timed runs at least, per layer probe per repeat",
    "layer_time_seconds": "timed seconds at least, per layer probe per repeat",
    "percentile": "percentile compared with a budget",
}
_AT_LEAST_ONE = ("threads", "settle_limit")


class BundleError(Exception):
    """Bad input the user can fix: printed as one `error:` line, exit code 2."""


@dataclass(frozen=True)
class Entry:
    id: str
    kind: str
    file: str
    path: str
    meta: dict


@dataclass(frozen=True)
class Bundle:
    space_hash: str
    entries: tuple[Entry, ...]


def open_bundle(source: Path, workdir: Path) -> Bundle:
    """Read a bundle folder, or unpack a .zip into workdir and read that."""
    if not source.exists():
        raise BundleError(f"bundle not found: {source} (pass the probe bundle folder or its .zip)")
    if source.is_dir():
        return read_index(_find_root(source, source))
    if not zipfile.is_zipfile(source):
        raise BundleError(f"{source} is neither a folder nor a .zip; pass the probe bundle folder or its .zip")
    with zipfile.ZipFile(source) as zf:
        for name in zf.namelist():
            if name.startswith(("/", "\\")) or ".." in Path(name).parts:
                raise BundleError(f"{source} contains an unsafe path {name!r}; re-create the zip from the bundle folder")
        zf.extractall(workdir)
    return read_index(_find_root(workdir, source))


def _find_root(folder: Path, source: Path) -> Path:
    """The folder holding index.json: the top, or a zip's single top-level folder."""
    if (folder / "index.json").is_file():
        return folder
    roots = [d for d in folder.iterdir() if d.is_dir() and (d / "index.json").is_file()]
    if len(roots) == 1:  # a zip's one data folder (its code sits beside it)
        return roots[0]
    raise BundleError(f"{source} has no index.json, so it is not a probe bundle; "
                      "pass the folder written by the probe exporter (see --help for the layout)")


def read_index(root: Path) -> Bundle:
    """Parse and validate index.json; every problem names the file and the fix."""
    index = root / "index.json"
    try:
        data = json.loads(index.read_text("utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise BundleError(f"{index} is not valid JSON ({exc}); re-export the bundle") from None
    if not isinstance(data, dict) or data.get("format") != BUNDLE_FORMAT:
        got = data.get("format") if isinstance(data, dict) else type(data).__name__
        raise BundleError(f"{index}: format is {got!r}, expected {BUNDLE_FORMAT!r}; is this a probe bundle?")
    if data.get("version") != 1:
        raise BundleError(f"{index}: unsupported version {data.get('version')!r}; this runner reads version 1")
    if not isinstance(data.get("space_hash"), str):
        raise BundleError(f"{index}: 'space_hash' must be a string; re-export the bundle")
    raw = data.get("entries")
    if not isinstance(raw, list) or not raw:
        raise BundleError(f"{index}: 'entries' must be a non-empty list; re-export the bundle")
    entries = tuple(_entry(root, index, i, e) for i, e in enumerate(raw))
    dupes = sorted({e.id for e in entries if sum(x.id == e.id for x in entries) > 1})
    if dupes:
        raise BundleError(f"{index}: duplicate entry ids {dupes}; ids must be unique")
    return Bundle(data["space_hash"], entries)


def _entry(root: Path, index: Path, i: int, raw: Any) -> Entry:
    """One validated entry whose file lies inside the bundle."""
    where = f"{index}: entries[{i}]"
    if not isinstance(raw, dict):
        raise BundleError(f"{where} must be an object with id, kind, file, meta")
    eid, kind, file, meta = raw.get("id"), raw.get("kind"), raw.get("file"), raw.get("meta", {})
    if not isinstance(eid, str) or not eid:
        raise BundleError(f"{where}: 'id' must be a non-empty string")
    if kind not in KINDS:
        raise BundleError(f"{where} ({eid}): 'kind' is {kind!r}, expected one of {list(KINDS)}")
    if not isinstance(meta, dict):
        raise BundleError(f"{where} ({eid}): 'meta' must be an object")
    if not isinstance(file, str) or not file or Path(file).is_absolute() or ".." in Path(file).parts:
        raise BundleError(f"{where} ({eid}): 'file' must be a relative path inside the bundle, got {file!r}")
    path = root / file
    if not path.is_file():
        raise BundleError(f"{where} ({eid}): file {file!r} is missing from the bundle; re-export it")
    return Entry(eid, kind, file, str(path.resolve()), meta)


def check_loadable(bundle: Bundle, protocol: Protocol) -> None:
    """Load every model once so a bad file fails fast, before minutes of measuring."""
    for e in bundle.entries:
        try:
            random_input(make_session(e.path, protocol), protocol.batch, seed=0)
        except Exception as exc:  # ORT raises several pybind types; all mean "cannot load"
            reason = " ".join(str(exc).split())[:240]
            raise BundleError(f"entry {e.id!r}: onnxruntime {ort.__version__} cannot load {e.file} "
                              f"({reason}); re-export it as an ONNX model this runtime supports") from None


def measure_bundle(bundle: Bundle, protocol: Protocol, chunk: int, source: str) -> dict[str, Any]:
    """Measure every entry interleaved and assemble the latency table."""
    layers = [e.path for e in bundle.entries if e.kind == "layer"]
    n_sub = len(bundle.entries) - len(layers)
    floor_s = max(protocol.repeats, 1) * (len(layers) * protocol.layer_time_seconds + n_sub * protocol.time_seconds)
    print(f"measuring {len(bundle.entries)} entries ({len(layers)} layer, {n_sub} subnet), "
          f"{max(protocol.repeats, 1)} repeat(s), at least {floor_s:.1f} s of timed runs", file=sys.stderr)
    # Layers and whole subnets are timed in separate sessions of fresh processes: a subnet
    # timed among hundreds of loaded probes measured ~20 % slower than the same subnet timed
    # among subnets only (demo space, 2-core VM), and subnets are later verified among
    # subnets, so the calibration must see them in that setting.
    results = measure_repeated(layers, protocol, chunk, layers, stderr_progress("measure layers")) if layers else {}
    subnets = [e.path for e in bundle.entries if e.kind != "layer"]
    if subnets:
        results.update(measure_repeated(subnets, protocol, chunk, (), stderr_progress("measure subnets")))
    return {
        "format": TABLE_FORMAT, "version": TABLE_VERSION, "space_hash": bundle.space_hash,
        "hardware": describe_hardware(), "protocol": {**protocol.to_dict(), "chunk": chunk},
        "created": datetime.now(timezone.utc).isoformat(timespec="seconds"), "bundle": source,
        "entries": {e.id: {"kind": e.kind, "file": e.file, "meta": e.meta, **results[e.path].to_dict()}
                    for e in bundle.entries},
    }


def _parser() -> argparse.ArgumentParser:
    p = module_parser("runner", __doc__)
    p.add_argument("bundle", type=Path, help="probe bundle folder or .zip")
    p.add_argument("--out", type=Path, required=True, help="latency table to write (JSON)")
    p.add_argument("--quick", action="store_true",
                   help="smoke-test settings: 1 repeat, few runs (figures are not stable); other flags override")
    defaults = Protocol()
    for name, help_ in FLAGS.items():
        value = getattr(defaults, name)
        p.add_argument(f"--{name.replace('_', '-')}", type=type(value), default=None,
                       help=f"{help_} (default {value:g})")
    p.add_argument("--chunk", type=int, default=10, help="timed runs per model per round-robin turn (default 10)")
    return p


def protocol_from_args(args: argparse.Namespace) -> Protocol:
    """Defaults, then --quick, then explicit flags; rejects nonsense values."""
    protocol = Protocol(**QUICK) if args.quick else Protocol()
    overrides = {n: getattr(args, n) for n in FLAGS if getattr(args, n) is not None}
    for name, value in overrides.items():
        low = 1 if name in _AT_LEAST_ONE else 0
        if value < low or (name == "percentile" and value > 100):
            raise BundleError(f"--{name.replace('_', '-')} {value} is out of range (must be >= {low}"
                              + (" and <= 100)" if name == "percentile" else ")"))
    if args.chunk < 1:
        raise BundleError(f"--chunk {args.chunk} must be at least 1")
    return dataclasses.replace(protocol, **overrides)


def main(argv: list[str] | None = None) -> int:
    """CLI entry: 0 on success, 2 on bad input (one `error:` line), 1 if measuring fails."""
    args = _parser().parse_args(argv)
    try:
        protocol = protocol_from_args(args)
        check_writable(args.out, BundleError, "table.json")
        with tempfile.TemporaryDirectory(prefix="tightfit-bundle-") as tmp:
            bundle = open_bundle(args.bundle, Path(tmp))
            check_loadable(bundle, protocol)
            table = measure_bundle(bundle, protocol, args.chunk, str(args.bundle))
        try:
            write_json(args.out, table)
        except OSError as exc:
            raise BundleError(f"cannot write {args.out} ({exc.strerror}); choose a writable --out path") from None
    except BundleError as exc:
        print(f"error: {exc}", file=sys.stderr)
        return 2
    except RuntimeError as exc:
        print(f"error: {' '.join(str(exc).split())}", file=sys.stderr)
        return 1
    except KeyboardInterrupt:
        print("error: interrupted; no table written", file=sys.stderr)
        return 130
    unstable = sum(not e["stable"] for e in table["entries"].values())
    print(f"wrote {args.out}: {len(table['entries'])} entries, {unstable} not stable", file=sys.stderr)
    return 0


if __name__ == "__main__":
    sys.exit(main())

"""Reading results: ``ranktide status``, ``top`` and ``score`` from the newest snapshot."""

from __future__ import annotations

import json
import sys
from datetime import datetime, timezone
from pathlib import Path

from ranktide.stream.snapshots import SnapshotError, read_manifest, snapshot_dirs


def newest(root: Path) -> Path:
    """The newest complete snapshot folder; SnapshotError when there is none."""
    dirs = snapshot_dirs(root)
    if not dirs:
        raise SnapshotError(f"{root}: no snapshot here (expected folders named snap-NNNNNNNN)")
    return dirs[-1]


def _age(created: str) -> str:
    try:
        seconds = (datetime.now(timezone.utc) - datetime.fromisoformat(created)).total_seconds()
    except (TypeError, ValueError):
        return "unknown age"
    for unit, size in (("days", 86400), ("hours", 3600), ("minutes", 60)):
        if seconds >= size:
            return f"{seconds / size:.1f} {unit} ago"
    return f"{seconds:.0f} seconds ago"


def _targets_in_words(manifest: dict) -> str:
    parts = []
    if manifest.get("rtol"):
        parts.append(f"contract: every score within {manifest['rtol']:.3g} relative")
    if manifest.get("tolerance"):
        parts.append(f"L1 tolerance {manifest['tolerance']:g}")
    return "; ".join(parts)


def _profile_in_words(manifest: dict, name: str, l1: float | None) -> str:
    """One profile's certified figures against the targets."""
    facts = manifest.get("profiles", {}).get(name, {})
    parts = []
    rtol, tolerance = manifest.get("rtol"), manifest.get("tolerance")
    if "rtol_reached" in facts:
        reached = facts["rtol_reached"]
        top = facts.get("certified_top")
        scope = "every node" if top is None else f"the {top} best nodes (the rest absolute)"
        if reached is None:
            parts.append(f"relative error not certified on {scope}")
        else:
            ok = "" if not rtol else (" (within rtol)" if reached <= rtol and (facts.get("absolute_reached") or 0)
                                      <= rtol else " (ABOVE rtol)")
            parts.append(f"certified relative error at most {reached:.3g} on {scope}{ok}")
    if l1 is None:
        parts.append("L1 error not certified")
    else:
        ok = "" if not tolerance else (" (within tolerance)" if l1 <= tolerance else " (ABOVE tolerance)")
        parts.append(f"certified L1 error at most {l1:.3g}{ok}")
    return "; ".join(parts)


def describe(manifest: dict, path: Path) -> list[str]:
    """The manifest in words."""
    lines = [
        f"snapshot {path.name} (sequence {manifest['sequence']}), written {manifest['created_at']} "
        f"({_age(manifest['created_at'])})",
        f"graph: {manifest.get('nodes', '?'):,} nodes, {manifest.get('edges', '?'):,} edges; "
        f"damping {manifest['damping']}; {_targets_in_words(manifest)}",
        f"events: {manifest['events_applied']:,} applied ({manifest['events_noop']:,} no-ops), "
        f"{manifest['events_rejected']:,} rejected",
    ]
    for name, bound in manifest["certified_bound"].items():
        lines.append(f"profile {name}: {_profile_in_words(manifest, name, bound)}")
    pos = manifest.get("positions", {})
    for path, where in pos.get("files", {}).items():
        lines.append(f"source: file {path} up to byte {where.get('offset', 0):,} (line {where.get('line', 0):,})")
    for topic, parts in pos.get("kafka", {}).items():
        desc = ", ".join(f"p{p}@{o}" for p, o in sorted(parts.items(), key=lambda kv: int(kv[0])))
        lines.append(f"source: kafka topic {topic}, next offsets {desc}")
    return lines


def describe_newest(root: Path, as_json: bool = False) -> int:
    try:
        path = newest(root)
        manifest = read_manifest(path)
    except SnapshotError as exc:
        print(f"ranktide status: error: {exc}", file=sys.stderr)
        return 2
    print(json.dumps(manifest, indent=2) if as_json else "\n".join(describe(manifest, path)))
    return 0


def _profile_scores(root: Path, profile: str):
    import pyarrow.compute as pc  # here, not at start-up: status reads no Parquet
    import pyarrow.parquet as pq

    path = newest(root)
    table = pq.read_table(path / "scores.parquet")
    part = table.filter(pc.equal(table["profile"], profile))
    if part.num_rows == 0:
        known = sorted(set(table["profile"].to_pylist()))
        raise SnapshotError(f"{path}: no profile {profile!r} (profiles: {', '.join(known)})")
    return path, part


def print_top(root: Path, k: int, profile: str, as_json: bool = False) -> int:
    try:
        path, part = _profile_scores(root, profile)
    except SnapshotError as exc:
        print(f"ranktide top: error: {exc}", file=sys.stderr)
        return 2
    import pyarrow.compute as pc

    order = pc.sort_indices(part, sort_keys=[("score", "descending"), ("node", "ascending")])
    best = part.take(order[: max(k, 0)])
    rows = list(zip(best["node"].to_pylist(), best["score"].to_pylist()))
    if as_json:
        print(json.dumps({"snapshot": path.name, "profile": profile, "top": [{"node": n, "score": s} for n, s in rows]}))
    else:
        width = max([len(n) for n, _ in rows] + [4])
        print(f"{'rank':>4}  {'node':<{width}}  score")
        for i, (n, s) in enumerate(rows, 1):
            print(f"{i:>4}  {n:<{width}}  {s:.6e}")
    return 0


def print_scores(root: Path, nodes: list[str], profile: str, as_json: bool = False) -> int:
    try:
        path, part = _profile_scores(root, profile)
    except SnapshotError as exc:
        print(f"ranktide score: error: {exc}", file=sys.stderr)
        return 2
    import pyarrow as pa
    import pyarrow.compute as pc

    found = part.filter(pc.is_in(part["node"], value_set=pa.array(nodes, pa.string())))
    by_node = dict(zip(found["node"].to_pylist(), found["score"].to_pylist()))
    if as_json:
        print(json.dumps({"snapshot": path.name, "profile": profile, "scores": {n: by_node.get(n) for n in nodes}}))
    else:
        for n in nodes:
            print(f"{n}\t{by_node[n]:.6e}" if n in by_node else f"{n}\tunknown node")
    return 0 if all(n in by_node for n in nodes) else 1

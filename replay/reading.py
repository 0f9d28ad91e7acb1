"""Reading results: ``ranktide status``, ``snapshots``, ``top`` and ``score``.

Every command serves a snapshot only after its files pass their sha256
checksums (:func:`~ranktide.stream.snapshots.select_snapshot`): by default
the newest valid one, naming on standard error each newer one it skipped and
why. Output is built in two steps so that columns can be added: a command
makes plain records (one ``dict`` per row), and :func:`render_table` or
:func:`emit_json` prints them.

``--json`` style, common to these commands: one JSON object on standard
output, indented by two spaces; ``snapshot`` names the folder served and
``skipped`` lists ``{"snapshot", "reason"}`` for each newer one passed over;
rows are a list of objects whose keys are the text columns' names; numbers
are plain JSON numbers and a missing value is ``null``.
"""

from __future__ import annotations

import json
import math
import sys
from dataclasses import dataclass
from datetime import datetime, timezone
from pathlib import Path
from typing import TYPE_CHECKING, Callable

from ranktide.stream.snapshots import (
    SnapshotError,
    Selected,
    inspect_snapshot,
    is_snapshot_folder,
    select_snapshot,
    snapshot_dirs,
)

if TYPE_CHECKING:
    # pyarrow is imported by the functions that read Parquet, not at start-up: status,
    # snapshots and the checksums need none of it
    import pyarrow as pa


# ------------------------------------------------------------------ records and their rendering


@dataclass(frozen=True)
class Column:
    """One text column: the record key it shows, its header, how a value prints, its alignment."""

    key: str
    header: str
    fmt: Callable[[object], str] = str
    right: bool = False


def _score_text(value: object) -> str:
    return "unknown node" if value is None else f"{value:.6e}"


def _bound_text(value: object) -> str:
    return "-" if value is None else f"±{value:.2e}"


def _ranks_text(value: object) -> str:
    if value is None:
        return "-"
    best, worst = value
    return str(best) if best == worst else f"{best}-{worst}"


TOP_COLUMNS = [Column("rank", "rank", str, right=True), Column("node", "node"), Column("score", "score", _score_text),
               Column("error_bound", "bound", _bound_text), Column("rank_range", "possible ranks", _ranks_text)]
SCORE_COLUMNS = [Column("node", "node"), Column("score", "score", _score_text),
                 Column("error_bound", "bound", _bound_text)]


def render_table(records: list[dict], columns: list[Column]) -> list[str]:
    """Records as aligned text lines under a header (the last column is not padded)."""
    cells = [[c.header for c in columns]] + [[c.fmt(r.get(c.key)) for c in columns] for r in records]
    widths = [max(len(row[i]) for row in cells) for i in range(len(columns))]
    lines = []
    for row in cells:
        parts = [
            (cell.rjust(w) if col.right else cell.ljust(w)) if i < len(columns) - 1 else cell
            for i, (cell, w, col) in enumerate(zip(row, widths, columns))
        ]
        lines.append("  ".join(parts).rstrip())
    return lines


def _json_safe(value):
    """NaN and infinities are not JSON: they print as null."""
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, dict):
        return {k: _json_safe(v) for k, v in value.items()}
    if isinstance(value, list):
        return [_json_safe(v) for v in value]
    return value


def emit_json(obj: dict) -> None:
    """Print one object in the reading commands' ``--json`` style."""
    print(json.dumps(_json_safe(obj), indent=2, allow_nan=False))


def envelope(chosen: Selected, **fields) -> dict:
    """The keys every ``--json`` object of a served snapshot starts with."""
    skipped = [{"snapshot": name, "reason": reason} for name, reason in chosen.skipped]
    return {"snapshot": chosen.path.name, "skipped": skipped, **fields}


# ------------------------------------------------------------------ choosing the snapshot


def choose(root: Path, name: str | None, command: str) -> Selected:
    """The snapshot ``command`` serves; each skipped one is named on standard error.

    Raises
    ------
    SnapshotError
        No valid snapshot, or the one named is missing or invalid.
    """

    def say(skipped: str, reason: str) -> None:
        print(f"ranktide {command}: skipping {skipped}: {reason}", file=sys.stderr)

    return select_snapshot(root, name, on_skip=say)


def _fail(command: str, exc: Exception) -> int:
    print(f"ranktide {command}: error: {exc}", file=sys.stderr)
    return 2


# ------------------------------------------------------------------ status


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


def describe_newest(root: Path, as_json: bool = False, name: str | None = None, command: str = "status") -> int:
    """``ranktide status``: the served snapshot's manifest in words (or as JSON)."""
    try:
        chosen = choose(root, name, command)
        text = None if as_json else "\n".join(describe(chosen.manifest, chosen.path))
    except SnapshotError as exc:
        return _fail(command, exc)
    except (KeyError, TypeError, ValueError) as exc:  # a manifest that passed the checks but lies
        return _fail(command, SnapshotError(f"{root}: manifest.json: unexpected content ({exc})"))
    if as_json:
        emit_json(envelope(chosen, manifest=chosen.manifest))
    else:
        from ranktide.stream.recompute_job import describe_status

        print("\n".join([text, *describe_status(chosen.path.parent)]))
    return 0


# ------------------------------------------------------------------ snapshots


def snapshot_record(path: Path) -> dict:
    """One row of ``ranktide snapshots``: what the manifest says, and whether the snapshot is valid."""
    manifest, reason = inspect_snapshot(path)
    m = manifest or {}
    return {
        "snapshot": path.name,
        "sequence": m.get("sequence"),
        "created_at": m.get("created_at"),
        "events_applied": m.get("events_applied"),
        "events_rejected": m.get("events_rejected"),
        "certified_bound": m.get("certified_bound"),
        "valid": reason is None,
        "reason": reason,
    }


def _bounds_text(bounds: object) -> str:
    if not isinstance(bounds, dict):
        return "?"
    # null: the L1 error is not certified (an rtol-only contract may leave it so)
    return " ".join(f"{name}={b:.2g}" if isinstance(b, (int, float)) else f"{name}=n/a" for name, b in bounds.items())


def _count_text(value: object) -> str:
    return f"{value:,}" if isinstance(value, int) else "?"


SNAPSHOT_COLUMNS = [
    Column("snapshot", "snapshot"),
    Column("sequence", "sequence", lambda v: "?" if v is None else str(v), right=True),
    Column("created_at", "written", lambda v: v or "?"),
    Column("events_applied", "applied", _count_text, right=True),
    Column("events_rejected", "rejected", _count_text, right=True),
    Column("certified_bound", "bounds", _bounds_text),
    Column("validity", "validity"),
]


def list_snapshots(root: Path, as_json: bool = False) -> int:
    """``ranktide snapshots``: every snapshot under ``root``, oldest first, with its validity."""
    root = Path(root)
    try:
        dirs = [root] if is_snapshot_folder(root) else snapshot_dirs(root)
    except OSError as exc:
        return _fail("snapshots", SnapshotError(f"{root}: cannot list snapshots: {exc.strerror or exc}"))
    if not dirs:
        what = "no such folder" if not root.is_dir() else "no snapshot here (expected folders named snap-NNNNNNNN)"
        return _fail("snapshots", SnapshotError(f"{root}: {what}"))
    records = [snapshot_record(d) for d in dirs]
    if as_json:
        emit_json({"root": str(root), "snapshots": records})
        return 0
    for r in records:
        r["validity"] = "valid" if r["valid"] else f"INVALID: {r['reason']}"
    print("\n".join(render_table(records, SNAPSHOT_COLUMNS)))
    return 0


# ------------------------------------------------------------------ top and score


def _profile_scores(chosen: Selected, profile: str) -> pa.Table:
    """The rows of one profile in the served snapshot's scores.parquet."""
    import pyarrow as pa
    import pyarrow.compute as pc
    import pyarrow.parquet as pq

    try:
        table = pq.read_table(chosen.path / "scores.parquet")
    except (OSError, pa.ArrowException) as exc:
        raise SnapshotError(f"{chosen.path}: unreadable scores.parquet: {exc}") from exc
    part = table.filter(pc.equal(table["profile"], profile))
    if part.num_rows == 0:
        known = sorted(set(table["profile"].to_pylist()))
        raise SnapshotError(f"{chosen.path}: no profile {profile!r} (profiles: {', '.join(known)})")
    return part


def _unlisted(chosen: Selected, part: pa.Table, profile: str) -> tuple[int, float]:
    """How many nodes a personalization leaves out (score 0), and the bound that covers them."""
    facts = chosen.manifest.get("profiles", {}).get(profile, {})
    unlisted = max(int(chosen.manifest.get("nodes", part.num_rows)) - part.num_rows, 0)
    bound = facts.get("unlisted_bound")
    return unlisted, (float("inf") if bound is None else float(bound)) if unlisted else 0.0


def top_records(part: pa.Table, k: int, unlisted: tuple[int, float] = (0, 0.0)) -> tuple[list[dict], bool | None]:
    """The ``k`` best-scored nodes of one profile, and whether that set is certainly the top k.

    Each record: rank, node, score, its certified ``error_bound`` and the
    ``rank_range`` it may hold given every node's interval ``score +- bound``
    (design notes 4b; ``solver.bounds.ranks_between``). Snapshots without
    bounds (format 1) give ``None`` for both.
    """
    import numpy as np
    import pyarrow.compute as pc

    from ranktide.solver.bounds import ranks_between, sorted_ends

    order = pc.sort_indices(part, sort_keys=[("score", "descending"), ("node", "ascending")])
    best = part.take(order[:k])
    records = [{"rank": i, "node": n, "score": s, "error_bound": None, "rank_range": None}
               for i, (n, s) in enumerate(zip(best["node"].to_pylist(), best["score"].to_pylist()), 1)]
    if "error_bound" not in part.column_names or not records:
        return records, None
    scores = part["score"].to_numpy()
    bounds = part["error_bound"].to_numpy()
    lo_sorted, hi_sorted = sorted_ends(scores, bounds)
    s, b = best["score"].to_numpy(), best["error_bound"].to_numpy()
    first, last = ranks_between(lo_sorted, hi_sorted, s - b, s + b, *unlisted)
    for rec, bound, lo_rank, hi_rank in zip(records, b.tolist(), first.tolist(), last.tolist()):
        rec["error_bound"], rec["rank_range"] = bound, [lo_rank, hi_rank]
    # certain when the smallest lower end inside beats every upper end outside (the unlisted too)
    taken = np.zeros(scores.size, dtype=bool)
    taken[order[:k].to_numpy()] = True
    outside = float((scores[~taken] + bounds[~taken]).max(initial=unlisted[1] if unlisted[0] else -np.inf))
    return records, bool(float((s - b).min()) > outside)


def score_records(part: pa.Table, nodes: list[str], unlisted: tuple[int, float] = (0, 0.0),
                  known: set[str] | None = None) -> list[dict]:
    """Node, score and ``error_bound`` of each named node, in the order given (score None: unknown node).

    A node of the graph that a personalization leaves out (``known``) scores
    0 within the profile's unlisted bound.
    """
    import pyarrow as pa
    import pyarrow.compute as pc

    found = part.filter(pc.is_in(part["node"], value_set=pa.array(nodes, pa.string())))
    has_bounds = "error_bound" in found.column_names
    bounds = found["error_bound"].to_pylist() if has_bounds else [None] * found.num_rows
    by_node = {n: (s, b) for n, s, b in zip(found["node"].to_pylist(), found["score"].to_pylist(), bounds)}
    for n in nodes:
        if n not in by_node and known is not None and n in known:
            by_node[n] = (0.0, unlisted[1] if has_bounds else None)
    return [{"node": n, "score": by_node.get(n, (None, None))[0], "error_bound": by_node.get(n, (None, None))[1]}
            for n in nodes]


def _bound(chosen: Selected, profile: str) -> float | None:
    return chosen.manifest["certified_bound"].get(profile)


def print_top(root: Path, k: int, profile: str, as_json: bool = False, name: str | None = None) -> int:
    """``ranktide top``; returns the exit code (2: no valid snapshot or no such profile)."""
    try:
        chosen = choose(root, name, "top")
        part = _profile_scores(chosen, profile)
        records, certain = top_records(part, k, _unlisted(chosen, part, profile))
    except SnapshotError as exc:
        return _fail("top", exc)
    if as_json:
        emit_json(envelope(chosen, profile=profile, certified_bound=_bound(chosen, profile),
                           top_set_certified=certain, nodes=records))
    else:
        print("\n".join(render_table(records, TOP_COLUMNS)))
        if certain is not None:
            verdict = "certified: no other node can be in it" if certain else \
                "not certified: intervals overlap at its edge"
            print(f"top-{len(records)} set {verdict}")
    return 0


def _known_nodes(chosen: Selected, profile: str, nodes: list[str]) -> set[str] | None:
    """Which of ``nodes`` the graph has (from the global rows), for a personalization's left-out nodes."""
    if profile == "global":
        return None
    found = _profile_scores(chosen, "global")
    return set(found["node"].to_pylist()) & set(nodes)


def print_scores(root: Path, nodes: list[str], profile: str, as_json: bool = False, name: str | None = None) -> int:
    """``ranktide score``; exit 1 when a node is unknown, 2 when no valid snapshot serves."""
    try:
        chosen = choose(root, name, "score")
        part = _profile_scores(chosen, profile)
        records = score_records(part, nodes, _unlisted(chosen, part, profile), _known_nodes(chosen, profile, nodes))
    except SnapshotError as exc:
        return _fail("score", exc)
    if as_json:
        emit_json(envelope(chosen, profile=profile, certified_bound=_bound(chosen, profile), nodes=records))
    else:
        print("\n".join(render_table(records, SCORE_COLUMNS)))
    return 0 if all(r["score"] is not None for r in records) else 1

"""Audit: a snapshot's scores against an exact recompute from scratch.

For every profile of a snapshot the audit re-solves ``x = a s + d P^T x`` cold,
to a certified 1e-12, on the snapshot's own edge set, and reports

* the measured normalised L1 and L-infinity errors of the stored scores;
* the certified bound of the manifest, and whether the measured error
  respects it (it must: a measured error above the bound means a bug);
* node by node, the measured error against the node's published
  ``error_bound`` (every node of every profile; a node above its bound is a
  failure naming the worst one), and the largest measured relative error
  among the nodes the per-node contract certifies, against ``rtol``;
* top-k overlap and Kendall's tau on the exact top k;
* the largest relative errors among the exact top k;
* the drift of the residual: the bound the manifest states against the
  bound recomputed exactly from the stored scores, as an absolute figure and,
  when the stated bound is above ``DRIFT_FLOOR``, relative to it.

A failure (error above the bound, or a file failing its checksum) exits 1.
Without ``--snapshot`` or ``--all`` the newest valid snapshot is audited;
newer ones that fail their checksums are named and fail the audit too.
"""

from __future__ import annotations

import json
import math
import sys
from dataclasses import asdict, dataclass
from pathlib import Path

import numpy as np
import pyarrow.compute as pc
import pyarrow.parquet as pq

from ranktide.solver import GLOBAL
from ranktide.solver.metrics import (
    certified_bound,
    kendall_tau_top_k,
    l1_error,
    largest_relative_errors,
    linf_error,
    top_k_overlap,
)
from ranktide.stream.snapshots import (
    NoValidSnapshot,
    SnapshotError,
    is_snapshot_folder,
    load_snapshot,
    select_snapshot,
    snapshot_dirs,
)

#: Certified error of the exact recompute itself; added to the bound when comparing.
EXACT_TOLERANCE = 1e-12
#: Stated bounds at or below this are rounding-level (often exactly 0, for a graph the
#: engine solved exactly): a drift relative to them means nothing and is not given.
DRIFT_FLOOR = 1e-12


@dataclass
class ProfileAudit:
    """Audit figures of one profile."""

    l1: float
    linf: float
    certified_bound: float
    within_bound: bool
    top_k_overlap: float
    kendall_tau_top_k: float
    largest_relative_errors: list[dict]
    recomputed_bound: float
    residual_drift: float | None
    residual_drift_relative: float | None
    nodes_within_bounds: bool | None = None
    worst_node: str | None = None
    worst_error: float | None = None
    worst_error_bound: float | None = None
    rtol: float | None = None
    relative_error_certified: float | None = None


def residual_drift(stated: float, recomputed: float) -> tuple[float | None, float | None]:
    """Absolute drift of the bound, and the drift relative to the stated bound.

    The relative figure is None when the stated bound is at or below
    ``DRIFT_FLOOR``; both are None when no L1 bound is stated (infinite).
    """
    if not math.isfinite(stated):
        return None, None
    drift = abs(recomputed - stated)
    return drift, (drift / stated if stated > DRIFT_FLOOR else None)


def audit_snapshot(path: Path, k: int = 100) -> dict:
    """Audit one snapshot folder; returns the ``--json`` object.

    Raises
    ------
    SnapshotError
        When the snapshot fails its checksums or cannot be read.
    """
    snap = load_snapshot(path)
    ranker, manifest = snap.ranker, snap.manifest
    eng = ranker.engine
    n = eng.n_nodes
    profiles = {}
    for name in eng.profiles:
        stored = eng.scores(name)
        exact = eng.exact_scores(name, tol=EXACT_TOLERANCE, warm=False)
        stated = manifest["certified_bound"][name]
        stated = math.inf if stated is None else float(stated)
        k_row = eng.profile_index(name)
        recomputed = certified_bound(eng.P[k_row, :n], eng.R[k_row, :n])
        err = l1_error(stored, exact)
        drift, relative = residual_drift(stated, recomputed)
        per_node = _per_node(path, manifest, ranker, name, stored, exact)
        l1_ok = err <= stated * (1 + 1e-9) + EXACT_TOLERANCE
        profiles[name] = asdict(ProfileAudit(
            l1=err,
            linf=linf_error(stored, exact),
            certified_bound=stated,
            within_bound=bool(l1_ok and per_node.get("nodes_within_bounds") is not False),
            top_k_overlap=top_k_overlap(exact, stored, k),
            kendall_tau_top_k=kendall_tau_top_k(exact, stored, k),
            largest_relative_errors=[
                {"node": ranker.ids.name(i), "relative_error": rel}
                for i, rel in largest_relative_errors(exact, stored, k)
            ],
            recomputed_bound=recomputed,
            residual_drift=drift,
            residual_drift_relative=relative,
            **per_node,
        ))
    return {
        "snapshot": path.name,
        "events_applied": manifest["events_applied"],
        "nodes": n,
        "edges": eng.n_edges,
        "k": k,
        "ok": all(p["within_bound"] for p in profiles.values()),
        "profiles": profiles,
    }


def _published_bounds(path: Path, manifest: dict, ranker, name: str) -> np.ndarray | None:
    """The ``error_bound`` of every node of profile ``name`` (None for a format without them).

    A personalization lists its non-zero scores only; the manifest's
    ``unlisted_bound`` covers every node it leaves out.
    """
    table = pq.read_table(path / "scores.parquet")
    if "error_bound" not in table.column_names:
        return None
    part = table.filter(pc.equal(table["profile"], name))
    unlisted = manifest["profiles"][name].get("unlisted_bound")
    bounds = np.full(len(ranker.ids), math.inf if unlisted is None else float(unlisted))
    bounds[ranker.ids.intern(part["node"].combine_chunks())] = part["error_bound"].to_numpy()
    return bounds


def _per_node(path: Path, manifest: dict, ranker, name: str, stored: np.ndarray, exact: np.ndarray) -> dict:
    """Every node's measured error against its published bound; relative error of the certified nodes."""
    bounds = _published_bounds(path, manifest, ranker, name)
    if bounds is None:
        return {}
    error = np.abs(stored - exact)
    excess = error - (bounds * (1 + 1e-9) + EXACT_TOLERANCE)
    worst = int(np.argmax(excess)) if error.size else 0
    facts = manifest["profiles"][name]
    threshold = facts.get("certified_threshold") or 0.0
    certified = stored >= threshold if threshold > 0 else stored > 0
    with np.errstate(divide="ignore", invalid="ignore"):
        relative = np.where(exact[certified] > 0, error[certified] / exact[certified], 0.0)
    return {
        "nodes_within_bounds": bool(error.size == 0 or excess[worst] <= 0.0),
        "worst_node": ranker.ids.name(worst) if error.size else None,
        "worst_error": float(error[worst]) if error.size else None,
        "worst_error_bound": float(bounds[worst]) if error.size else None,
        "rtol": manifest.get("rtol"),
        "relative_error_certified": float(relative.max(initial=0.0)),
    }


def _describe(result: dict) -> list[str]:
    lines = [f"audit of {result['snapshot']}: {result['nodes']:,} nodes, {result['edges']:,} edges, "
             f"{result['events_applied']:,} events; exact recompute from scratch to {EXACT_TOLERANCE:g}"]
    for name, p in result["profiles"].items():
        verdict = "ok" if p["within_bound"] else "FAIL: measured error above the certified bound"
        lines += [
            f"profile {name}: {verdict}",
            f"  measured L1 {p['l1']:.3e}   L-inf {p['linf']:.3e}   certified bound {p['certified_bound']:.3e}",
            f"  top-{result['k']} overlap {p['top_k_overlap']:.4f}   Kendall tau on top-{result['k']} "
            f"{p['kendall_tau_top_k']:.4f}   residual drift {_drift_text(p)}",
        ]
        if p.get("nodes_within_bounds") is not None:
            scope = "every node within its error_bound" if p["nodes_within_bounds"] else \
                f"FAIL: node {p['worst_node']} off by {p['worst_error']:.3e}, its error_bound {p['worst_error_bound']:.3e}"
            rtol = f" (rtol {p['rtol']:g})" if p.get("rtol") else ""
            lines.append(f"  per node: {scope}; largest relative error of the certified nodes "
                         f"{p['relative_error_certified']:.3e}{rtol}")
        worst = ", ".join(f"{e['node']} {e['relative_error']:.2e}" for e in p["largest_relative_errors"][:3])
        if worst:
            lines.append(f"  largest relative errors in the top {result['k']}: {worst}")
    return lines


def _drift_text(p: dict) -> str:
    if p["residual_drift"] is None:
        return "n/a (no L1 bound stated)"
    if p["residual_drift_relative"] is None:
        return f"{p['residual_drift']:.2e} absolute (stated bound {p['certified_bound']:.1e})"
    return f"{p['residual_drift_relative']:.2e} relative"


def plot_series(results: list[dict], path: Path) -> Path:
    """Measured error and certified bound against events applied, per profile (log scale)."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, ax = plt.subplots(figsize=(8, 4.5))
    names = sorted({name for r in results for name in r["profiles"]}, key=lambda x: (x != GLOBAL, x))
    for i, name in enumerate(names):
        rows = [(r["events_applied"], r["profiles"][name]) for r in results if name in r["profiles"]]
        x = [e for e, _ in rows]
        color = f"C{i}"
        ax.plot(x, [max(p["l1"], 1e-16) for _, p in rows], "o-", color=color, label=f"{name}: measured L1")
        ax.plot(x, [p["certified_bound"] for _, p in rows], "s--", color=color, label=f"{name}: certified bound")
    ax.set_yscale("log")
    ax.set_xlabel("events applied")
    ax.set_ylabel("normalised L1 error")
    ax.set_title("Measured error against the certified bound")
    ax.grid(True, which="both", alpha=0.3)
    ax.legend(fontsize=8)
    fig.tight_layout()
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(path, dpi=120)
    plt.close(fig)
    return path


def _targets(root: Path, snapshot: str | None, every: bool) -> tuple[list[Path], list[dict]]:
    """The snapshot folders to audit, and the newer ones skipped for failing their checks.

    Raises
    ------
    SnapshotError
        No snapshot, no snapshot of that name, or none valid.
    """
    root = Path(root)
    if is_snapshot_folder(root) or snapshot:
        folder = root if is_snapshot_folder(root) else root / snapshot
        if (snapshot and folder.name != snapshot) or not folder.is_dir():
            raise SnapshotError(f"{root}: no snapshot named {snapshot}")
        return [folder], []
    if every:
        dirs = snapshot_dirs(root)
        if not dirs:
            raise SnapshotError(f"{root}: no snapshot")
        return dirs, []

    def say(name: str, reason: str) -> None:
        print(f"ranktide audit: FAIL: skipping {name}: {reason}", file=sys.stderr)

    chosen = select_snapshot(root, on_skip=say)
    return [chosen.path], [{"snapshot": name, "reason": reason} for name, reason in chosen.skipped]


def run_audit(root: Path, snapshot: str | None, every: bool, k: int, as_json: bool, plot: Path | None) -> int:
    """``ranktide audit``; returns the exit code (1 on a failed check, 2 on unreadable input)."""
    try:
        dirs, skipped = _targets(root, snapshot, every)
    except SnapshotError as exc:
        print(f"ranktide audit: error: {exc}", file=sys.stderr)
        # snapshots that exist but all fail their checksums fail the audit
        return 1 if isinstance(exc, NoValidSnapshot) else 2
    results, failed = [], bool(skipped)
    for path in dirs:
        try:
            results.append(audit_snapshot(path, k))
        except SnapshotError as exc:
            print(f"ranktide audit: FAIL: {exc}", file=sys.stderr)
            failed = True
            continue
        failed |= not results[-1]["ok"]
        if not as_json:
            print("\n".join(_describe(results[-1])))
    if as_json:
        # the reading commands' style: one object; a single audit's keys, or every audit under 'audits'
        from ranktide.replay.reading import emit_json  # infinite figures print as null

        if every:
            emit_json({"root": str(root), "audits": results})
        elif results:
            emit_json({**results[0], "skipped": skipped})
    if plot is not None and results:
        try:
            print(f"plot: {plot_series(results, plot)}", file=sys.stderr)
        except OSError as exc:
            print(f"ranktide audit: error: cannot write the picture {plot}: {exc.strerror or exc}", file=sys.stderr)
            return 3
    return 1 if failed else 0


# ------------------------------------------------------------------ against a full recompute


def _profile_vectors(table, manifest: dict, ids, name: str) -> tuple[np.ndarray, np.ndarray]:
    """Scores and error bounds of profile ``name`` on ``ids`` (unlisted nodes: 0 and ``unlisted_bound``)."""
    part = table.filter(pc.equal(table["profile"], name))
    unlisted = manifest["profiles"][name].get("unlisted_bound")
    n = len(ids)
    scores = np.zeros(n)
    bounds = np.full(n, math.inf if unlisted is None else float(unlisted))
    rows = ids.intern(part["node"].combine_chunks())
    scores[rows] = part["score"].to_numpy()
    bounds[rows] = part["error_bound"].to_numpy()
    return scores, bounds


def _read_scores(path: Path) -> tuple[dict, object]:
    from ranktide.stream.snapshots import read_manifest, verify

    manifest = read_manifest(path)
    verify(path, manifest)
    table = pq.read_table(path / "scores.parquet")
    if "error_bound" not in table.column_names:
        raise SnapshotError(f"{path}: snapshot format {manifest.get('format')} has no error_bound column")
    return manifest, table


def compare_snapshots(live: Path, recomputed: Path) -> dict:
    """Node by node: ``|live - recomputed| <= live error_bound + recomputed error_bound`` in every profile.

    Both bounds are certified, so a difference beyond their sum proves one of
    the two wrong. Returns the ``--json`` object; ``ok`` false names the
    worst node of each failing profile.

    Raises
    ------
    SnapshotError
        When either snapshot fails its checksums or cannot be read.
    """
    from ranktide.solver.ids import NodeIds

    live_m, live_t = _read_scores(live)
    rec_m, rec_t = _read_scores(recomputed)
    ids = NodeIds(live_t.filter(pc.equal(live_t["profile"], GLOBAL))["node"])
    n = len(ids)
    rec_nodes = rec_t.filter(pc.equal(rec_t["profile"], GLOBAL))["node"]
    ids.intern(rec_nodes.combine_chunks())
    problems = []
    if len(ids) != n or len(rec_nodes) != n:
        problems.append(f"the graphs differ: {len(ids) - n} nodes of the recompute are not in {live.name}, "
                        f"{n - len(rec_nodes)} of its nodes are not in the recompute")
    elif (live_m.get("edges"), live_m.get("damping")) != (rec_m.get("edges"), rec_m.get("damping")):
        problems.append(f"the graphs differ: {live_m.get('edges')} edges (damping {live_m.get('damping')}) live, "
                        f"{rec_m.get('edges')} (damping {rec_m.get('damping')}) recomputed")
    profiles = {}
    for name, facts in live_m["profiles"].items():
        if name not in rec_m["profiles"]:
            problems.append(f"profile {name} is missing from the recompute")
            continue
        a, ba = _profile_vectors(live_t, live_m, ids, name)
        b, bb = _profile_vectors(rec_t, rec_m, ids, name)
        diff = np.abs(a - b)
        excess = diff - ((ba + bb) * (1 + 1e-9) + EXACT_TOLERANCE)
        worst = int(np.argmax(excess)) if n else 0
        threshold = facts.get("certified_threshold") or 0.0
        certified = a >= threshold if threshold > 0 else a > 0
        with np.errstate(divide="ignore", invalid="ignore"):
            rel = np.where(b[certified] > 0, diff[certified] / b[certified], 0.0)
        profiles[name] = {
            "l1": float(diff.sum()),
            "linf": float(diff.max(initial=0.0)),
            "relative_error_certified": float(rel.max(initial=0.0)),
            "rtol": live_m.get("rtol"),
            "within_bounds": bool(n == 0 or excess[worst] <= 0.0),
            "worst_node": ids.name(worst) if n else None,
            "worst_difference": float(diff[worst]) if n else None,
            "worst_allowed": float(ba[worst] + bb[worst]) if n else None,
        }
    return {
        "snapshot": live.name,
        "against": str(recomputed),
        "recompute_engine": rec_m.get("engine"),
        "recompute_iterations": rec_m.get("iterations"),
        "nodes": n,
        "edges": live_m.get("edges"),
        "events_applied": live_m.get("events_applied"),
        "problems": problems,
        "ok": not problems and all(p["within_bounds"] for p in profiles.values()),
        "profiles": profiles,
    }


def _describe_comparison(result: dict) -> list[str]:
    lines = [f"audit of {result['snapshot']} against the recompute {result['against']} "
             f"({result['recompute_engine']}, {result['recompute_iterations']} iterations): "
             f"{result['nodes']:,} nodes, {result['edges']:,} edges"]
    lines += [f"FAIL: {p}" for p in result["problems"]]
    for name, p in result["profiles"].items():
        verdict = "ok: every node within both bounds" if p["within_bounds"] else \
            (f"FAIL: node {p['worst_node']} differs by {p['worst_difference']:.3e}, "
             f"more than its two error_bounds together {p['worst_allowed']:.3e}")
        rtol = f" (rtol {p['rtol']:g})" if p.get("rtol") else ""
        lines.append(f"profile {name}: {verdict}")
        lines.append(f"  measured drift: L1 {p['l1']:.3e}, L-inf {p['linf']:.3e}, largest relative difference of "
                     f"the certified nodes {p['relative_error_certified']:.3e}{rtol}")
    return lines


def _snapshot_in(root: Path, snapshot: str | None) -> Path | None:
    if (root / "manifest.json").is_file():
        return root
    dirs = snapshot_dirs(root)
    if snapshot:
        dirs = [d for d in dirs if d.name == snapshot]
    return dirs[-1] if dirs else None


def run_audit_against(root: Path, snapshot: str | None, against: Path | None, engine: str | None,
                      as_json: bool, recompute_options: dict) -> int:
    """``ranktide audit --against`` / ``--engine``: compare with a recompute; returns the exit code."""
    import shutil
    import tempfile

    from ranktide.replay.recompute import RecomputeError, resolve_input, run_engine, settings_for

    live = _snapshot_in(root, snapshot)
    if live is None:
        print(f"ranktide audit: error: {root}: no snapshot{f' named {snapshot}' if snapshot else ''}", file=sys.stderr)
        return 2
    scratch = None
    try:
        if against is None:
            out = recompute_options.get("out")
            if out is None:
                out = scratch = Path(tempfile.mkdtemp(prefix="ranktide-recompute-"))
            inp = resolve_input(str(live))
            settings = settings_for(inp, recompute_options.get("rtol") or 1e-6, None, None, None, None)
            recomputed = run_engine(inp, Path(out), settings, engine or "local", recompute_options.get("master"),
                                    recompute_options.get("spark_conf") or {}, progress=not as_json)
        else:
            recomputed = _snapshot_in(against, None)
            if recomputed is None:
                print(f"ranktide audit: error: {against}: no snapshot", file=sys.stderr)
                return 2
        result = compare_snapshots(live, recomputed)
    except RecomputeError as exc:
        print(f"ranktide audit: error: {exc}", file=sys.stderr)
        return exc.code
    except SnapshotError as exc:
        print(f"ranktide audit: FAIL: {exc}", file=sys.stderr)
        return 1
    finally:
        if scratch is not None:
            shutil.rmtree(scratch, ignore_errors=True)
    print(json.dumps(result, indent=2) if as_json else "\n".join(_describe_comparison(result)))
    if not result["ok"]:
        worst = [f"{name}: node {p['worst_node']}" for name, p in result["profiles"].items() if not p["within_bounds"]]
        print("ranktide audit: FAIL: " + "; ".join(result["problems"] + worst), file=sys.stderr)
    return 0 if result["ok"] else 1

"""``ranktide demo``: the built-in scenario end to end, no broker needed.

Steps: write the scenario log (:mod:`replay.scenario`), run the long-lived
consumer on it through its file source until the end of the log with a
snapshot every few thousand events, audit every snapshot, and draw two
pictures: the top movers over time and the measured error against the
certified bound.
"""

from __future__ import annotations

import json
import sys
import time
from pathlib import Path

import numpy as np
import pyarrow.compute as pc
import pyarrow.parquet as pq

from ranktide.replay.audit import audit_snapshot, plot_series
from ranktide.replay.scenario import write_scenario
from ranktide.stream.config import ServiceConfig
from ranktide.stream.rootlock import RootLock, RootLocked
from ranktide.stream.service import Service
from ranktide.stream.snapshots import SnapshotError, snapshot_dirs


def run_demo(out: Path, snapshot_events: int = 4000) -> int:
    """Run the demo into ``out``; print where everything is. Returns the exit code."""
    started = time.perf_counter()
    out = Path(out)
    root = out / "snapshots"
    # refuse before writing anything when another process writes this root
    try:
        lock = RootLock.acquire(root, "ranktide demo")
    except SnapshotError as exc:
        print(f"ranktide demo: error: {exc}", file=sys.stderr)
        return 2 if isinstance(exc, RootLocked) else 3
    log_path = write_scenario(out / "scenario")
    _say(f"scenario log: {log_path} ({sum(1 for _ in open(log_path, 'rb')):,} lines)")
    cfg = ServiceConfig(
        source=f"file:{log_path}", out=str(root), stop_at_end=True, snapshot_events=snapshot_events,
        keep_snapshots=1000, metrics="", file_chunk_bytes=128 << 10,
    ).validate()
    if snapshot_dirs(root):
        _say(f"{root} already holds snapshots: the consumer resumes after them")
    code = Service(cfg, root_lock=lock).run()  # releases the lock when done
    if code != 0:
        return code
    dirs = snapshot_dirs(root)
    results = [audit_snapshot(d) for d in dirs]
    (out / "audit.json").write_text(json.dumps(results, indent=2) + "\n", encoding="utf-8")
    error_png = plot_series(results, out / "error-vs-bound.png")
    movers_png = plot_top_movers(dirs, out / "top-movers.png")
    ok = all(r["ok"] for r in results)
    _say(f"snapshots:  {root} ({len(dirs)} of them)")
    _say(f"rejects:    {root / 'rejects.jsonl'}")
    _say(f"audit:      {out / 'audit.json'} ({'every snapshot within its certified bound' if ok else 'FAILED'})")
    _say(f"pictures:   {movers_png}, {error_png}")
    _say(f"try:        ranktide top {root} -k 10 --profile platform-team")
    _say(f"done in {time.perf_counter() - started:.1f} s")
    return 0 if ok else 1


def _say(text: str) -> None:
    print(text, file=sys.stdout, flush=True)


def _score_series(dirs: list[Path], profile: str) -> tuple[list[int], dict[str, np.ndarray]]:
    events, series = [], {}
    for i, d in enumerate(dirs):
        manifest = json.loads((d / "manifest.json").read_text(encoding="utf-8"))
        events.append(manifest["events_applied"])
        table = pq.read_table(d / "scores.parquet")
        part = table.filter(pc.equal(table["profile"], profile))
        for node, score in zip(part["node"].to_pylist(), part["score"].to_pylist()):
            series.setdefault(node, np.zeros(len(dirs)))[i] = score
    return events, series


def plot_top_movers(dirs: list[Path], path: Path, profile: str = "global", count: int = 8) -> Path:
    """Scores over time of the nodes whose score moved most between first and last snapshot."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    events, series = _score_series(dirs, profile)
    movers = sorted(series, key=lambda n: -abs(series[n][-1] - series[n][0]))[:count]
    fig, ax = plt.subplots(figsize=(8, 4.5))
    for node in movers:
        ax.plot(events, series[node], marker=".", label=node)
    ax.set_xlabel("events applied")
    ax.set_ylabel(f"score ({profile} profile)")
    ax.set_title(f"Top movers: the {len(movers)} packages whose score changed most")
    ax.grid(True, alpha=0.3)
    ax.legend(fontsize=8, ncol=2)
    fig.tight_layout()
    path = Path(path)
    fig.savefig(path, dpi=120)
    plt.close(fig)
    return path

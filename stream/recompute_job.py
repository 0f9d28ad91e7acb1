"""Periodic full recomputes for the service (``recompute_interval``).

When due, the newest snapshot is hard-linked into ``OUT/.recompute/live`` (so
that pruning cannot take it away mid-run) and ``ranktide audit --engine
ENGINE`` runs on it in a child process: it recomputes the snapshot's graph
from scratch and compares the service's published scores with the recompute
node by node, within both certified bounds. The service polls the child from
its loop (never waits on it), then exports the ``ranktide_recompute_*``
metrics, writes ``OUT/recompute.json`` (what ``ranktide status`` shows) and
logs a failure at error level.
"""

from __future__ import annotations

import json
import logging
import os
import shutil
import subprocess
import sys
import time
from datetime import datetime, timezone
from pathlib import Path

from ranktide.stream.metrics import Metrics
from ranktide.stream.snapshots import snapshot_dirs

log = logging.getLogger("ranktide.recompute")

#: The status file ``ranktide status`` reads, in the snapshot root.
STATUS_FILE = "recompute.json"
WORK_DIR = ".recompute"


class RecomputeJob:
    """Starts and follows the periodic recompute's child process.

    Parameters
    ----------
    out : Path
        The service's snapshot root.
    interval : float
        Seconds between the starts of two recomputes (0: never).
    engine, master : str
        ``local`` or ``spark``, and the Spark master URL ('' for local mode).
    metrics : Metrics
        Where the results go.
    """

    def __init__(self, out: Path, interval: float, engine: str, master: str, metrics: Metrics) -> None:
        self.out = Path(out)
        self.interval = float(interval)
        self.engine = engine
        self.master = master
        self.metrics = metrics
        self._proc: subprocess.Popen | None = None
        self._started = time.monotonic()
        self._snapshot = ""

    @property
    def work(self) -> Path:
        return self.out / WORK_DIR

    def tick(self) -> None:
        """Collect a finished child, or start one when due; returns at once either way."""
        if self._proc is not None:
            if self._proc.poll() is not None:
                self._finish()
            return
        if self.interval > 0 and time.monotonic() - self._started >= self.interval:
            self._start()

    def _start(self) -> None:
        dirs = snapshot_dirs(self.out)
        if not dirs:
            return
        self._started = time.monotonic()
        newest = dirs[-1]
        shutil.rmtree(self.work, ignore_errors=True)
        live = self.work / "live" / newest.name
        live.mkdir(parents=True)
        for f in newest.iterdir():
            try:
                os.link(f, live / f.name)
            except OSError:  # another file system: copy instead
                shutil.copy2(f, live / f.name)
        command = [sys.executable, "-m", "ranktide.stream.cli", "audit", str(live.parent), "--engine", self.engine,
                   "--json", "--recompute-out", str(self.work / "recomputed")]
        if self.master:
            command += ["--master", self.master]
        self._snapshot = newest.name
        with open(self.work / "result.json", "wb") as stdout, open(self.work / "stderr.log", "wb") as stderr:
            self._proc = subprocess.Popen(command, stdout=stdout, stderr=stderr, stdin=subprocess.DEVNULL)
        log.info("full recompute of %s started (%s engine, process %d)", newest.name, self.engine, self._proc.pid)

    def _finish(self) -> None:
        code = self._proc.returncode
        self._proc = None
        seconds = time.monotonic() - self._started
        m = self.metrics
        m.recompute_total += 1
        m.recompute_seconds = seconds
        m.recompute_last = time.time()
        result = None
        if code in (0, 1):
            try:
                result = json.loads((self.work / "result.json").read_text(encoding="utf-8"))
            except (OSError, json.JSONDecodeError):
                result = None
        status = {"finished_at": datetime.now(timezone.utc).isoformat(timespec="seconds"), "snapshot": self._snapshot,
                  "engine": self.engine, "seconds": round(seconds, 3)}
        if result is None:
            reason = self._last_error_line() or f"exit code {code}"
            status.update(ok=False, error=reason)
            m.recompute_ok = 0
            m.recompute_failures += 1
            log.error("FULL RECOMPUTE FAILED to run on %s: %s (see %s)", self._snapshot, reason,
                      self.work / "stderr.log")
        else:
            drift = {name: {k: p[k] for k in ("l1", "linf", "relative_error_certified", "within_bounds",
                                              "worst_node")} for name, p in result["profiles"].items()}
            status.update(ok=bool(result["ok"]), iterations=result.get("recompute_iterations"),
                          problems=result.get("problems", []), profiles=drift)
            m.recompute_ok = 1 if result["ok"] else 0
            m.recompute_error = {name: p["l1"] for name, p in drift.items()}
            m.recompute_relative_error = {name: p["relative_error_certified"] for name, p in drift.items()}
            if result["ok"]:
                log.info("full recompute of %s: every score within both bounds; drift %s (%.1f s)", self._snapshot,
                         ", ".join(f"{n} L1 {p['l1']:.2e}" for n, p in drift.items()), seconds)
            else:
                m.recompute_failures += 1
                worst = "; ".join(result.get("problems", []) + [
                    f"{n}: node {p['worst_node']} outside both bounds" for n, p in drift.items()
                    if not p["within_bounds"]])
                log.error("FULL RECOMPUTE AUDIT FAILED on %s: %s", self._snapshot, worst)
        tmp = self.out / f".{STATUS_FILE}.tmp"
        tmp.write_text(json.dumps(status, indent=2) + "\n", encoding="utf-8")
        os.replace(tmp, self.out / STATUS_FILE)

    def _last_error_line(self) -> str:
        try:
            lines = (self.work / "stderr.log").read_text(encoding="utf-8", errors="replace").splitlines()
        except OSError:
            return ""
        errors = [line for line in lines if "error" in line.lower()]
        return (errors or lines or [""])[-1].strip()[:500]

    def close(self) -> None:
        """Stop a running child (the service is stopping)."""
        if self._proc is not None and self._proc.poll() is None:
            self._proc.terminate()
            try:
                self._proc.wait(10)
            except subprocess.TimeoutExpired:
                self._proc.kill()
                self._proc.wait(10)
        self._proc = None


def describe_status(root: Path) -> list[str]:
    """``ranktide status`` lines for the last periodic recompute (none when there was none)."""
    try:
        status = json.loads((Path(root) / STATUS_FILE).read_text(encoding="utf-8"))
    except (OSError, json.JSONDecodeError):
        return []
    head = f"last full recompute ({status.get('engine')}) of {status.get('snapshot')}, finished {status.get('finished_at')}"
    if "error" in status:
        return [f"{head}: FAILED to run: {status['error']}"]
    verdict = "every score within both bounds" if status.get("ok") else "FAIL: " + "; ".join(
        status.get("problems", []) + [f"{n}: node {p['worst_node']} outside both bounds"
                                      for n, p in status.get("profiles", {}).items() if not p["within_bounds"]])
    lines = [f"{head}: {verdict}"]
    for name, p in status.get("profiles", {}).items():
        lines.append(f"  measured drift of {name}: L1 {p['l1']:.3g}, largest relative {p['relative_error_certified']:.3g}")
    return lines

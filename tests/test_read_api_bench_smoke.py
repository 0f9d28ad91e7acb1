"""Smoke test of the read API cost measurement (``python -m ranktide.replay.bench_read_api``).

Runs it at its smallest size and checks the report's shape: the service
replayed every event, the reader was answered (status 200) and the answers'
CPU time was counted. No figure is compared with a target: speed belongs to
the benchmark, not to the tests.
"""

from __future__ import annotations

import json
import math
import subprocess
import sys


def test_read_api_cost_report() -> None:
    done = subprocess.run([sys.executable, "-m", "ranktide.replay.bench_read_api", "--size", "tiny",
                           "--window", "0.3", "--rate", "100", "--json"], capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stderr[-3000:]
    report = json.loads(done.stdout)
    assert report["exit_code"] == 0 and report["events"] == 200_000
    assert sum(w["events"] for w in report["windows"]) <= report["events"]
    assert report["reader"]["statuses"].get("200", 0) > 0
    assert report["api_requests"] >= report["reader"]["statuses"]["200"]
    assert report["api_cpu_seconds"] > 0 and math.isfinite(report["api_cpu_ms_per_request"])
    assert report["views_published"] >= 2  # the restored state and the final snapshot at least

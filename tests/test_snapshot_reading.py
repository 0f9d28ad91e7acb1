"""Reading commands (top, score, status, snapshots, audit) never serve a corrupt snapshot.

Each command runs as a child process. The reference for what a command must
print is read independently with pyarrow from the snapshot folder that should
be served; the relative drift reference for the audit is plain arithmetic on
the manifest's stated bound.
"""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq
import pytest

from ranktide.replay.replay import ReplayOptions, replay_log
from stream_helpers import Stream

READERS = ("top", "score", "status")


def _cli(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "ranktide.stream.cli", "--log-level", "WARNING", *args],
                          capture_output=True, text=True, timeout=300)


def _scores(snap: Path, profile: str = "global") -> dict[str, float]:
    table = pq.read_table(snap / "scores.parquet").to_pylist()
    return {r["node"]: r["score"] for r in table if r["profile"] == profile}


def _best(snap: Path, k: int) -> list[tuple[str, float]]:
    return sorted(_scores(snap).items(), key=lambda kv: (-kv[1], kv[0]))[:k]


@pytest.fixture()
def series(tmp_path: Path) -> tuple[Path, list[Path]]:
    """A root with three snapshots of one replay (1,000 / 2,000 / 2,500 records)."""
    stream = Stream()
    stream.extend(np.random.default_rng(5), 2_500, n_nodes=300)
    log = tmp_path / "events.jsonl"
    log.write_bytes(b"".join(value + b"\n" for _, value in stream.records))
    summary = replay_log(log, tmp_path / "snaps", ReplayOptions(snapshot_every=1_000))
    assert len(summary.snapshots) == 3
    return tmp_path / "snaps", summary.snapshots


def _flip(path: Path, count: int = 200) -> None:
    """Flip ``count`` bytes in the middle of a file (a bit rot the checksum must catch)."""
    data = bytearray(path.read_bytes())
    mid = len(data) // 2
    for i in range(mid, min(mid + count, len(data))):
        data[i] ^= 0xFF
    path.write_bytes(bytes(data))


def _truncate(path: Path) -> None:
    data = path.read_bytes()
    path.write_bytes(data[: len(data) // 2])


def _one_clean_line(stderr: str) -> None:
    assert "Traceback" not in stderr, stderr
    assert len(stderr.strip().splitlines()) == 1, stderr


@pytest.mark.parametrize("damage", [_flip, _truncate], ids=["bit-flip", "truncated"])
def test_a_damaged_newest_snapshot_is_skipped_by_every_reader(series, damage) -> None:
    root, snaps = series
    damage(snaps[-1] / "scores.parquet")
    served = snaps[-2]
    best = _best(served, 5)

    top = _cli("top", str(root), "-k", "5", "--json")
    assert top.returncode == 0, top.stderr
    assert "Traceback" not in top.stderr
    assert snaps[-1].name in top.stderr and "sha256" in top.stderr  # says what it skipped and why
    got = json.loads(top.stdout)
    assert got["snapshot"] == served.name
    assert [(r["node"], r["score"]) for r in got["nodes"]] == best
    assert [r["rank"] for r in got["nodes"]] == [1, 2, 3, 4, 5]
    assert got["skipped"] == [{"snapshot": snaps[-1].name, "reason": "scores.parquet fails its sha256 checksum"}]

    text = _cli("top", str(root), "-k", "5")
    assert text.returncode == 0 and snaps[-1].name in text.stderr
    rows = text.stdout.splitlines()[1:-1]  # under the header, above the line on the top-k set
    assert len(rows) == 5 and all(float(line.split()[2]) <= 1.0 for line in rows)

    score = _cli("score", str(root), best[0][0], "--json")
    assert score.returncode == 0 and snaps[-1].name in score.stderr
    assert [(r["node"], r["score"]) for r in json.loads(score.stdout)["nodes"]] == [best[0]]

    status = _cli("status", str(root))
    assert status.returncode == 0 and snaps[-1].name in status.stderr
    assert status.stdout.startswith(f"snapshot {served.name} ")


def test_no_valid_snapshot_is_one_line_and_exit_2(series) -> None:
    root, snaps = series
    for snap in snaps:
        _flip(snap / "edges.parquet")
    for command in (("top", str(root)), ("score", str(root), "v1"), ("status", str(root))):
        proc = _cli(*command)
        assert proc.returncode == 2, proc.stderr
        assert proc.stdout == ""
        assert "no valid snapshot" in proc.stderr.splitlines()[-1]
        assert all(s.name in proc.stderr for s in snaps)  # each skip is named
        assert "Traceback" not in proc.stderr


def test_snapshot_option_and_a_snapshot_folder_as_root(series) -> None:
    root, snaps = series
    first = snaps[0]
    expected = [{"rank": i, "node": n, "score": s} for i, (n, s) in enumerate(_best(first, 3), 1)]
    by_option = _cli("top", str(root), "-k", "3", "--snapshot", first.name, "--json")
    by_folder = _cli("top", str(first), "-k", "3", "--json")
    for proc in (by_option, by_folder):
        assert proc.returncode == 0, proc.stderr
        got = json.loads(proc.stdout)
        assert got["snapshot"] == first.name
        assert [{key: r[key] for key in ("rank", "node", "score")} for r in got["nodes"]] == expected
    status = _cli("status", str(first), "--json")
    assert json.loads(status.stdout)["manifest"]["sequence"] == 1

    _flip(first / "scores.parquet")
    for args in (("top", str(root), "--snapshot", first.name), ("top", str(first)),
                 ("score", str(first), "v1"), ("status", str(root), "--snapshot", first.name)):
        proc = _cli(*args)
        assert proc.returncode == 2 and "sha256" in proc.stderr, (args, proc.stderr)
        _one_clean_line(proc.stderr)
    missing = _cli("top", str(root), "--snapshot", "snap-00000099")
    assert missing.returncode == 2 and "snap-00000099" in missing.stderr
    _one_clean_line(missing.stderr)


def test_snapshots_lists_every_snapshot_with_its_validity(series) -> None:
    root, snaps = series
    _truncate(snaps[1] / "edges.parquet")
    proc = _cli("snapshots", str(root), "--json")
    assert proc.returncode == 0, proc.stderr
    listed = json.loads(proc.stdout)["snapshots"]
    manifests = [json.loads((s / "manifest.json").read_text()) for s in snaps]
    assert [r["snapshot"] for r in listed] == [s.name for s in snaps]
    for row, m in zip(listed, manifests):
        assert row["sequence"] == m["sequence"]
        assert row["created_at"] == m["created_at"]
        assert row["events_applied"] == m["events_applied"]
        assert row["events_rejected"] == m["events_rejected"]
        assert row["certified_bound"] == m["certified_bound"]
    assert [r["valid"] for r in listed] == [True, False, True]
    assert listed[1]["reason"] == "edges.parquet fails its sha256 checksum"
    assert listed[0]["reason"] is None

    text = _cli("snapshots", str(root))
    assert text.returncode == 0
    lines = text.stdout.splitlines()
    assert len(lines) == 4  # header and one line per snapshot
    assert "INVALID" in lines[2] and "sha256" in lines[2] and "valid" in lines[1] and "INVALID" not in lines[3]

    empty = _cli("snapshots", str(root / "nothing-here"))
    assert empty.returncode == 2
    _one_clean_line(empty.stderr)


def test_audit_skips_a_damaged_newest_snapshot_but_fails(series) -> None:
    root, snaps = series
    _flip(snaps[-1] / "scores.parquet")
    proc = _cli("audit", str(root), "--json")
    assert proc.returncode == 1  # a file failing its checksum fails the audit
    assert snaps[-1].name in proc.stderr and "sha256" in proc.stderr
    report = json.loads(proc.stdout)
    assert report["snapshot"] == snaps[-2].name  # and the newest valid one is audited
    assert report["skipped"] == [{"snapshot": snaps[-1].name, "reason": "scores.parquet fails its sha256 checksum"}]
    assert report["ok"] is True
    every = _cli("audit", str(root), "--all", "--json")
    assert every.returncode == 1
    audits = json.loads(every.stdout)["audits"]
    assert [a["snapshot"] for a in audits] == [s.name for s in snaps[:-1]]


def test_top_k_must_be_positive_and_every_reading_argument_has_help() -> None:
    proc = _cli("top", "anywhere", "-k", "0")
    assert proc.returncode == 2 and "-k" in proc.stderr and "Traceback" not in proc.stderr
    from ranktide.stream.cli import build_parser

    parser = build_parser()
    commands = next(a for a in parser._actions if a.dest == "command").choices
    for name in ("top", "score", "status", "snapshots"):
        for action in commands[name]._actions:
            assert action.help, f"{name} {action.option_strings or action.dest} has no help line"


def test_audit_shows_a_drift_against_a_zero_bound_as_an_absolute_figure(tmp_path: Path) -> None:
    """One edge a->b: the engine solves it exactly, so the stated bound is 0."""
    log = tmp_path / "one.jsonl"
    log.write_text('{"op": "insert", "src": "a", "dst": "b"}\n')
    summary = replay_log(log, tmp_path / "snaps")
    manifest = json.loads((summary.snapshot / "manifest.json").read_text())
    assert manifest["certified_bound"]["global"] == 0.0
    proc = _cli("audit", str(tmp_path / "snaps"), "--json")
    assert proc.returncode == 0, proc.stderr
    prof = json.loads(proc.stdout)["profiles"]["global"]
    # with nothing to be relative to, the drift is the absolute difference of the bounds
    assert prof["residual_drift_relative"] is None
    assert prof["residual_drift"] == abs(prof["recomputed_bound"] - prof["certified_bound"]) < 1e-12
    text = _cli("audit", str(tmp_path / "snaps")).stdout
    drift = text.split("residual drift ")[1].split()[0]
    assert float(drift) < 1e-12 and "absolute" in text


def test_residual_drift_figures() -> None:
    """Plain arithmetic: |recomputed - stated|, relative only above the floor, none without a stated bound."""
    from ranktide.replay.audit import DRIFT_FLOOR, residual_drift

    assert residual_drift(2e-6, 3e-6) == (pytest.approx(1e-6), pytest.approx(0.5))
    assert residual_drift(0.0, 1e-15) == (1e-15, None)
    assert residual_drift(DRIFT_FLOOR, 2 * DRIFT_FLOOR) == (DRIFT_FLOOR, None)
    assert residual_drift(float("inf"), 1e-3) == (None, None)  # the manifest states no L1 bound (null)


def test_replay_from_a_root_starts_at_its_newest_valid_snapshot(series, tmp_path: Path) -> None:
    root, snaps = series
    _flip(snaps[-1] / "scores.parquet")
    log = tmp_path / "events.jsonl"
    proc = _cli("replay", str(log), "--out", str(root), "--from", str(root), "--quiet")
    assert proc.returncode == 0, proc.stderr
    assert f"skipping {snaps[-1].name}" in proc.stderr and "sha256" in proc.stderr
    new = json.loads((root / "snap-00000004" / "manifest.json").read_text())
    start = json.loads((snaps[-2] / "manifest.json").read_text())
    # it went on from snap-2 (2,000 records) to the end of the log: 2,500 records, each once
    assert start["events_applied"] + start["events_rejected"] == 2_000
    assert new["events_applied"] + new["events_rejected"] == 2_500
    # the same graph as the damaged snapshot, whose edges file is intact (files are sorted, so equal bytes)
    assert (root / "snap-00000004" / "edges.parquet").read_bytes() == (snaps[-1] / "edges.parquet").read_bytes()

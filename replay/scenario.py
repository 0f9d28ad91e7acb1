"""The demo scenario: a fictional package ecosystem whose dependencies change with releases.

Everything here is invented for the demo. Packages of the made-up
"Tidewater" registry depend on one another; preferential attachment makes
a few foundation libraries popular. Each release of a package rewrites its
dependency list: some dependencies are added (insert), some dropped
(delete), some re-weighted (a dependency used in more modules weighs more).
A platform team maintains a handful of internal services, the seeds of the
``platform-team`` personalization: its scores answer "which packages matter
most to us". A few producer bugs leave malformed lines in the log.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

_FIRST = ["amber", "birch", "cinder", "delta", "ember", "fable", "garnet", "harbor", "indigo", "juniper",
          "kestrel", "lumen", "marlin", "nectar", "onyx", "pebble", "quartz", "raven", "sable", "thistle",
          "umber", "vesper", "willow", "yarrow", "zephyr"]
_SECOND = ["core", "kit", "io", "parse", "net", "cache", "log", "auth", "math", "time", "codec", "queue",
           "store", "text", "graph", "crypto", "test", "cli", "http", "sync"]
PLATFORM_SERVICES = ["platform-billing", "platform-gateway", "platform-search", "platform-notify", "platform-ledger"]
_MALFORMED = [
    '{"op": "insert", "src": "harbor-net"}',
    '{"op": "insert", "src": "amber-io", "dst": "birch-core", "weight": -1}',
    '{"op": "upsert", "src": "amber-io", "dst": "birch-core"}',
    'release notes: see changelog',
    '{"op": "insert", "src": "amber-io", "dst": "birch-core", "weight": "heavy"}',
]


def package_names(count: int) -> list[str]:
    """Deterministic made-up package names (with a numeric suffix past the combinations)."""
    names = [f"{a}-{b}" for a in _FIRST for b in _SECOND]
    return [names[i] if i < len(names) else f"{names[i % len(names)]}{i // len(names)}" for i in range(count)]


def _popular(rng: np.random.Generator, popularity: np.ndarray, k: int) -> np.ndarray:
    return rng.choice(popularity.size, size=k, replace=False, p=popularity / popularity.sum())


def generate_events(packages: int = 2500, releases: int = 9000, seed: int = 7) -> list[dict]:
    """The scenario's events, in time order (ts in milliseconds from a fixed start)."""
    rng = np.random.default_rng(seed)
    names = package_names(packages) + PLATFORM_SERVICES
    n = len(names)
    popularity = 1.0 / (1.0 + np.arange(n)) ** 0.9  # earlier packages become foundations
    popularity[-len(PLATFORM_SERVICES):] = 0.0      # nobody depends on internal services
    deps: list[dict[int, float]] = [dict() for _ in range(n)]
    ts = 1_700_000_000_000
    events: list[dict] = []
    for node in PLATFORM_SERVICES:
        events.append({"op": "seed", "profile": "platform-team", "node": node, "weight": 1.0, "ts": ts})
    for _ in range(releases):
        ts += int(rng.integers(1_000, 120_000))
        pkg = int(rng.integers(n)) if rng.random() < 0.9 else n - 1 - int(rng.integers(len(PLATFORM_SERVICES)))
        events += _release(rng, pkg, deps[pkg], popularity, names, ts)
    return events


def _release(rng, pkg: int, current: dict[int, float], popularity: np.ndarray, names: list[str], ts: int) -> list[dict]:
    out = []
    src = names[pkg]
    if current and rng.random() < 0.5:
        for dep in rng.choice(list(current), size=min(len(current), int(rng.integers(1, 3))), replace=False):
            del current[int(dep)]
            out.append({"op": "delete", "src": src, "dst": names[int(dep)], "ts": ts})
    for dep in _popular(rng, popularity, int(rng.integers(1, 5))):
        dep = int(dep)
        if dep == pkg:
            continue
        weight = float(rng.choice([1.0, 1.0, 2.0, 3.0]))
        if current.get(dep) != weight:
            current[dep] = weight
            out.append({"op": "insert", "src": src, "dst": names[dep], "weight": weight, "ts": ts})
    return out


def write_scenario(folder: Path, packages: int = 2500, releases: int = 9000, seed: int = 7) -> Path:
    """Write ``events.jsonl`` (with a few malformed lines) and ``platform-team.seeds``; return the log."""
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    events = generate_events(packages, releases, seed)
    rng = np.random.default_rng(seed + 1)
    bad_at = set(rng.choice(len(events), size=len(_MALFORMED) * 3, replace=False).tolist())
    log_path = folder / "events.jsonl"
    with open(log_path, "w", encoding="utf-8") as fh:
        for i, event in enumerate(events):
            if i in bad_at:
                fh.write(_MALFORMED[i % len(_MALFORMED)] + "\n")
            fh.write(json.dumps(event) + "\n")
    (folder / "platform-team.seeds").write_text("\n".join(PLATFORM_SERVICES) + "\n", encoding="utf-8")
    return log_path

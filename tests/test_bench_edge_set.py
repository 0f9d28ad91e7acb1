"""The benchmark's edge set against a Python set of the same keys (the reference)."""

import numpy as np

from ranktide.replay.bench_workloads import EdgeSet


def test_edge_set_follows_a_python_set_through_random_updates(monkeypatch):
    monkeypatch.setattr(EdgeSet, "MERGE_AT", 50)  # merges happen during the run, not only at the end
    rng = np.random.default_rng(7)
    n = 40
    src, dst = rng.integers(0, n, 300), rng.integers(0, n, 300)
    keys = np.unique(src * n + dst)
    edges = EdgeSet(keys // n, keys % n, n)
    present = set(keys.tolist())
    for _ in range(200):
        deleted = edges.sample(int(rng.integers(0, 6)), rng)
        assert len(set(deleted.tolist())) == deleted.size and set(deleted.tolist()) <= present
        absent = np.setdiff1d(np.arange(n * n), np.array(sorted(present), dtype=np.int64))
        inserted = rng.choice(absent, size=int(rng.integers(0, 6)), replace=False)
        # a key deleted and inserted in one step is not a valid pair of lists: keep them apart
        inserted = np.setdiff1d(inserted, deleted)
        edges.update(inserted, deleted)
        present -= set(deleted.tolist())
        present |= set(inserted.tolist())
        probe = rng.integers(0, n * n, 64)
        assert edges.contains(probe).tolist() == [int(k) in present for k in probe]
        assert len(edges) == len(present)
    copy = edges.copy()
    assert copy.keys.tolist() == sorted(present) == edges.keys.tolist()

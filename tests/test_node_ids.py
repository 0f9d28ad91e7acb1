"""Interning of node names (``solver.ids``) against a Python dict in first-appearance order.

The reference is the plain definition: ids ``0, 1, 2, ...`` handed out in the
order names first appear, the same name always getting the same id.
"""

from __future__ import annotations

import numpy as np
import pyarrow as pa
from hypothesis import given, settings
from hypothesis import strategies as st

from ranktide.solver.ids import NodeIds


def _reference(batches: list[list[str]]) -> tuple[dict[str, int], list[np.ndarray]]:
    ids: dict[str, int] = {}
    outs = [np.array([ids.setdefault(name, len(ids)) for name in batch], dtype=np.int64) for batch in batches]
    return ids, outs


def _check(batches: list[list[str]]) -> None:
    want, want_outs = _reference(batches)
    ids = NodeIds()
    for batch, expected in zip(batches, want_outs):
        got = ids.intern(pa.array(batch, pa.string()))
        assert got.dtype == np.int32 and np.array_equal(got, expected)
    assert len(ids) == len(want)
    assert ids.names().to_pylist() == list(want)
    for name, idx in want.items():
        assert ids.lookup(name) == idx and ids.name(idx) == name
    assert ids.lookup("\x00absent") is None


names = st.text(alphabet=st.sampled_from("ab\u00e9\u4e2d0\U0001f600"), min_size=0, max_size=6)


@settings(max_examples=200, deadline=None)
@given(st.lists(st.lists(names, max_size=80), max_size=6))
def test_ids_are_handed_out_in_order_of_first_appearance(batches: list[list[str]]) -> None:
    _check(batches)


def test_a_large_table_with_many_repeats_and_growth_in_every_batch() -> None:
    """Hundreds of thousands of names, batches larger than the table was: growth, rehash, long probes."""
    rng = np.random.default_rng(5)
    pool = [f"acct-{k}" for k in rng.integers(0, 10**9, size=150_000)] + ["x" * 300, "", "\u00e9t\u00e9"]
    batches = [[pool[k] for k in rng.integers(0, len(pool), size=size)] for size in (10, 1_000, 60_000, 250_000)]
    _check(batches)


def test_frozen_view_keeps_its_names_across_growth() -> None:
    ids = NodeIds([f"n{i}" for i in range(1000)])
    frozen = ids.frozen()
    ids.intern(pa.array([f"m{i}" for i in range(100_000)], pa.string()))  # several rehashes of the live table
    assert [frozen.lookup(f"n{i}") for i in range(0, 1000, 7)] == list(range(0, 1000, 7))
    assert frozen.lookup("m5") is None and ids.lookup("m5") == 1005

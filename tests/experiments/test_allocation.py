"""Randomised allocation (experiments/allocation.py)."""
from collections import Counter

import pytest

from experiments import allocation

CONDITIONS = ["sham", "low", "mid", "high"]


@pytest.mark.parametrize("method", [allocation.SIMPLE, allocation.BLOCK])
def test_every_condition_gets_each_replicate_once_with_unique_codes(method):
    plan = allocation.allocate(CONDITIONS, 5, method, seed=42)
    assert [p["slot"] for p in plan] == list(range(1, 21))
    assert Counter((p["condition"], p["replicate"]) for p in plan) == {(c, r): 1 for c in CONDITIONS for r in range(1, 6)}
    codes = [p["code"] for p in plan]
    assert len(set(codes)) == 20
    assert all(len(c) == 4 and set(c) <= set(allocation.CODE_ALPHABET) for c in codes)


def test_the_same_seed_gives_the_same_list_and_another_seed_another():
    assert allocation.allocate(CONDITIONS, 3, allocation.SIMPLE, 7) == allocation.allocate(CONDITIONS, 3, allocation.SIMPLE, 7)
    assert allocation.allocate(CONDITIONS, 3, allocation.SIMPLE, 7) != allocation.allocate(CONDITIONS, 3, allocation.SIMPLE, 8)


def test_blocks_run_every_condition_once_before_repeating():
    plan = allocation.allocate(CONDITIONS, 3, allocation.BLOCK, seed=3)
    for block in range(3):
        assert sorted(p["condition"] for p in plan[4 * block:4 * block + 4]) == sorted(CONDITIONS)


@pytest.mark.parametrize("conditions,replicates,message", [
    (["a", "a"], 2, "different"), (["a", " "], 2, "label"), (["a"], 0, "Replicates per condition 0"),
])
def test_bad_designs_are_refused(conditions, replicates, message):
    with pytest.raises(ValueError, match=message):
        allocation.allocate(conditions, replicates, allocation.BLOCK, 1)

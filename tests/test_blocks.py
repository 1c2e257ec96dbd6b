"""Tests for chitally.blocks: every item is covered exactly once, blocks follow the pacer
and the weights, states are made once per thread, failures and interrupts in any thread
stop every thread and reach the caller."""

from __future__ import annotations

import threading

import numpy as np
import pytest

from chitally import blocks
from chitally.blocks import Pacer, run_blocks, whole_calls


def covered(calls: list[tuple[int, int]], lo: int, hi: int) -> bool:
    """The blocks tile [lo, hi): no gap, no overlap."""
    items = sorted(calls)
    return bool(items) and items[0][0] == lo and items[-1][1] == hi and all(
        a < b for a, b in items) and all(items[k][1] == items[k + 1][0] for k in range(len(items) - 1))


def test_one_thread_tiles_the_range_in_order() -> None:
    calls: list[tuple[int, int]] = []
    run_blocks(3, 1000, lambda a, b: calls.append((a, b)), Pacer(first=10))
    assert covered(calls, 3, 1000)
    assert calls == sorted(calls)  # one thread: consecutive blocks, in order
    assert calls[0] == (3, 13)  # the first block is `first` items


def test_small_range_is_one_call() -> None:
    calls: list[tuple[int, int]] = []
    run_blocks(0, 50, lambda a, b: calls.append((a, b)), Pacer(first=64))
    assert calls == [(0, 50)]


def test_empty_range_makes_no_call() -> None:
    calls: list[tuple[int, int]] = []
    assert run_blocks(5, 5, lambda a, b: calls.append((a, b)), Pacer(first=1), state=list) == []
    assert calls == []


def test_pacer_scales_to_the_target_and_caps_growth() -> None:
    p = Pacer(first=100, seconds=0.1)
    p.observe(100, 0.05)  # half the target: twice the work next
    assert p.budget == pytest.approx(200)
    p.observe(200, 1e-6)  # far too fast: grows by at most _GROWTH
    assert p.budget == pytest.approx(200 * blocks._GROWTH)
    p.observe(1600, 1.6)  # ten times too slow: a tenth next
    assert p.budget == pytest.approx(100)
    p.observe(0, 5.0)  # an empty block says nothing
    assert p.budget == pytest.approx(100)


def test_pacer_reads_the_module_target_when_made() -> None:
    assert Pacer(first=1).seconds == blocks.BLOCK_SECONDS


def test_weights_bound_the_cost_of_a_block() -> None:
    cost = np.array([1.0] * 50 + [100.0] + [1.0] * 49)
    weights = np.concatenate([[0.0], np.cumsum(cost)])
    calls: list[tuple[int, int]] = []
    pacer = Pacer(first=10, seconds=1e9)  # observe() never shrinks it below the growth cap
    pacer.observe = lambda work, elapsed: None  # keep the budget at 10 units
    run_blocks(0, 100, lambda a, b: calls.append((a, b)), pacer, weights=weights)
    assert covered(calls, 0, 100)
    for a, b in calls:
        # within budget, or one item that alone exceeds it
        assert weights[b] - weights[a] <= 10 or b - a == 1
    assert (50, 51) in calls


def test_bad_weights_are_refused() -> None:
    with pytest.raises(ValueError, match="cumulative"):
        run_blocks(0, 10, lambda a, b: None, Pacer(first=1), weights=np.zeros(10))


def test_threads_cover_every_item_once_with_one_state_each() -> None:
    before = threading.active_count()
    seen = np.zeros(5000, dtype=np.int64)
    lock = threading.Lock()
    owners: dict[int, int] = {}

    def call(a: int, b: int, state: list) -> None:
        state.append((a, b))
        with lock:
            seen[a:b] += 1
            owners[id(state)] = threading.get_ident()

    pacer = Pacer(first=7)
    pacer.observe = lambda work, elapsed: None  # blocks of 7: many blocks for 3 threads
    states = run_blocks(0, 5000, call, pacer, threads=3, state=list)
    assert np.all(seen == 1)
    assert 1 <= len(states) <= 3
    assert covered([blk for s in states for blk in s], 0, 5000)
    assert len(set(owners.values())) == len(states)  # one state per thread
    assert threading.active_count() == before  # every helper joined


def test_no_helper_threads_when_one_block_suffices() -> None:
    idents = set()
    run_blocks(0, 10, lambda a, b: idents.add(threading.get_ident()), Pacer(first=100), threads=4)
    assert idents == {threading.get_ident()}


def test_a_failing_helper_stops_the_run_and_reaches_the_caller() -> None:
    before = threading.active_count()
    main = threading.get_ident()
    done: list[tuple[int, int]] = []
    helper_failed = threading.Event()

    def call(a: int, b: int) -> None:
        if threading.get_ident() != main:
            helper_failed.set()
            raise ValueError("bad block")
        # the main thread keeps taking blocks until the helper has failed (bounded)
        helper_failed.wait(timeout=10)
        done.append((a, b))

    pacer = Pacer(first=1)
    pacer.observe = lambda work, elapsed: None
    with pytest.raises(ValueError, match="bad block"):
        run_blocks(0, 10_000, call, pacer, threads=2)
    assert helper_failed.is_set()
    assert len(done) < 10_000 - 1  # stopped early: not every block ran
    assert threading.active_count() == before


def test_an_interrupt_in_the_main_thread_stops_the_helpers() -> None:
    before = threading.active_count()
    main = threading.get_ident()
    helper_blocks: list[tuple[int, int]] = []
    started = threading.Event()
    lock = threading.Lock()

    def call(a: int, b: int) -> None:
        if threading.get_ident() == main:
            if a > 0:  # after its first block, once a helper has started
                started.wait(timeout=10)
                raise KeyboardInterrupt
        else:
            started.set()
            with lock:
                helper_blocks.append((a, b))

    pacer = Pacer(first=1)
    pacer.observe = lambda work, elapsed: None
    with pytest.raises(KeyboardInterrupt):
        run_blocks(0, 1_000_000, call, pacer, threads=2)
    assert started.is_set()
    assert threading.active_count() == before  # the helper was joined
    assert len(helper_blocks) < 1_000_000 - 2  # and it stopped taking blocks


def test_whole_calls_make_one_block_per_thread() -> None:
    calls: list[tuple[int, int]] = []
    lock = threading.Lock()

    def call(a: int, b: int) -> None:
        with lock:
            calls.append((a, b))

    with whole_calls():
        run_blocks(0, 1000, call, Pacer(first=1))
        assert calls == [(0, 1000)]
        calls.clear()
        run_blocks(0, 1000, call, Pacer(first=1), threads=2)
        assert sorted(calls) == [(0, 500), (500, 1000)]
        calls.clear()
        weights = np.concatenate([[0.0], np.cumsum(np.arange(1.0, 101.0))])
        run_blocks(0, 100, call, Pacer(first=1), weights=weights)
        assert calls == [(0, 100)]
    calls.clear()
    run_blocks(0, 1000, call, Pacer(first=1))  # outside the context: blocks again
    assert len(calls) > 1

"""Item rows read a block at a time (measurement/input/rows.py): the blocks put together are
the answers themselves. Outside reference: the arrays they are made from (numpy indexing)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from samesource.input.rows import CodedRows, FrameRows, codable


def _answers(n=1000, p=6, seed=3):
    rng = np.random.default_rng(seed)
    X = rng.integers(1, 6, size=(n, p)).astype(float)
    X[rng.random((n, p)) < 0.05] = np.nan
    return X


def _whole(rows, columns=None, size=97):
    parts = list(rows.blocks(columns, size=size))
    starts = [s for s, _ in parts]
    assert starts == list(np.cumsum([0] + [len(b) for _, b in parts])[:-1])
    return np.vstack([b for _, b in parts])


@pytest.mark.parametrize("kind", ["frame", "coded"])
def test_blocks_give_the_answers_and_a_selection_its_rows(kind):
    X = _answers()
    names = [f"q{j}" for j in range(X.shape[1])]
    labels = np.arange(2, 2 + len(X))
    frame = pd.DataFrame(X, columns=names, index=labels)
    rows = FrameRows(frame) if kind == "frame" else CodedRows.encode(X, names, labels, 1.0)
    assert len(rows) == len(X)
    np.testing.assert_array_equal(_whole(rows), X)
    np.testing.assert_array_equal(_whole(rows, ["q4", "q1"]), X[:, [4, 1]])
    np.testing.assert_array_equal(rows.column("q2"), X[:, 2])
    keep = np.random.default_rng(1).random(len(X)) < 0.6
    sub = rows.select(keep)
    np.testing.assert_array_equal(_whole(sub), X[keep])
    np.testing.assert_array_equal(sub.labels, labels[keep])
    keep2 = np.random.default_rng(2).random(len(sub)) < 0.5  # a selection of a selection
    np.testing.assert_array_equal(_whole(sub.select(keep2), ["q0"]), X[keep][keep2][:, [0]])
    with pytest.raises(KeyError, match="q9"):
        list(rows.blocks(["q9"]))


def test_only_whole_numbers_on_a_short_scale_are_coded():
    assert codable(np.array([[1.0, np.nan], [5.0, 3.0]]), 1, 5)
    assert not codable(np.array([[1.5]]), 1, 5)
    assert not codable(np.array([[7.0]]), 1, 5)
    assert not codable(np.array([[1.0]]), 0.5, 5)
    assert not codable(np.array([[1.0]]), 0, 1000)
    assert codable(np.full((3, 2), np.nan), 1, 5)  # no answer at all: nothing that cannot be coded
    assert not codable(np.array([[np.inf, 1.0]]), 1, 5) and not codable(np.array([[-np.inf]]), 1, 5)
    assert not codable(np.array([[0.0, 2.0]]), 1, 5)  # below the scale


def test_map_in_threads_keeps_the_order_raises_the_error_and_holds_few_items():
    # results in the items' order whatever thread finished first; an error in a worker is
    # raised to the caller; the items are drawn a few ahead, not all at once
    import threading
    import time

    from samesource.input.rows import map_in_threads

    def slow_first(i):
        time.sleep(0.02 if i % 2 == 0 else 0.0)
        return i, threading.current_thread().name

    got = list(map_in_threads(slow_first, range(12), threads=2))
    assert [i for i, _ in got] == list(range(12))
    assert list(map_in_threads(lambda i: i * i, range(5), threads=1)) == [0, 1, 4, 9, 16]

    def fails(i):
        if i == 3:
            raise ValueError("block 3")
        return i

    with pytest.raises(ValueError, match="block 3"):
        list(map_in_threads(fails, range(8), threads=2))
    drawn = []

    def items():
        for i in range(100):
            drawn.append(i)
            yield i

    it = map_in_threads(lambda i: i, items(), threads=2)
    assert next(it) == 0 and len(drawn) <= 4
    it.close()

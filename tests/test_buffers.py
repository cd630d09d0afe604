"""service.buffers: an array is lent again only when nothing refers to it any more."""

from __future__ import annotations

import numpy as np
import pandas as pd

from service.buffers import MIN_POOLED_BYTES, ArrayPool

BIG = (MIN_POOLED_BYTES // 8 // 1000 + 1, 1000)  # just above the smallest pooled size


def test_an_array_in_use_is_not_lent_again_and_a_dropped_one_is() -> None:
    pool = ArrayPool(1 << 31)
    first = pool.empty(BIG)
    second = pool.empty(BIG)
    assert not np.shares_memory(first, second) and pool.fresh == 2
    del first
    third = pool.empty(BIG)
    assert pool.reused == 1 and pool.fresh == 2
    assert not np.shares_memory(third, second)


def test_views_and_frames_keep_an_array_lent() -> None:
    """A view, a row of it, or a pandas frame made from the array without a copy keep it from being lent again."""
    pool = ArrayPool(1 << 31)
    for keep in (lambda a: a[3:, 10:20], lambda a: a[0], lambda a: pd.DataFrame(a[:, :5], copy=False)):
        array = pool.empty(BIG)
        array[:] = 1.5
        held = keep(array)
        del array
        other = pool.empty(BIG)
        other[:] = -2.0  # would overwrite what ``held`` reads if the pool lent the same memory
        values = held.to_numpy() if isinstance(held, pd.DataFrame) else held
        assert (values == 1.5).all()
        del held, other, values
        pool.clear()


def test_a_smaller_request_reuses_a_spare_up_to_half_its_size_and_small_arrays_are_not_pooled() -> None:
    pool = ArrayPool(1 << 31)
    big = pool.empty((BIG[0] * 4, BIG[1]))
    del big
    half = pool.empty((BIG[0] * 2, BIG[1]))
    assert pool.reused == 1 and half.shape == (BIG[0] * 2, BIG[1]) and half.flags.c_contiguous
    del half
    tiny = pool.empty((10, 10))
    assert tiny.shape == (10, 10) and pool.fresh == 1 and pool.reused == 1
    quarter = pool.empty(BIG)  # below half of the spare: fresh
    assert pool.fresh == 2 and quarter.shape == BIG


def test_the_budget_bounds_the_arrays_tracked_and_clear_forgets_them() -> None:
    nbytes = BIG[0] * BIG[1] * 8
    pool = ArrayPool(int(nbytes * 2.5))
    held = [pool.empty(BIG) for _ in range(3)]  # the third does not fit: lent, not tracked
    assert pool.nbytes == 2 * nbytes
    del held
    assert pool.spare_bytes() == 2 * nbytes
    pool.clear()
    assert pool.nbytes == 0 and pool.spare_bytes() == 0


def test_spares_are_freed_after_two_sweeps_and_lent_arrays_are_not() -> None:
    pool = ArrayPool(1 << 31)
    lent = pool.empty(BIG)
    spare = pool.empty(BIG)
    del spare
    pool.sweep()  # seen spare once: kept for the next batch
    assert pool.spare_bytes() == lent.nbytes
    pool.sweep()  # spare on two sweeps in a row: freed
    assert pool.spare_bytes() == 0 and pool.nbytes == lent.nbytes
    again = pool.empty(BIG)  # a spare taken between two sweeps starts over
    del again
    pool.sweep()
    pool.empty(BIG)
    pool.sweep()
    pool.sweep()
    assert pool.nbytes == lent.nbytes  # the one taken and dropped again is freed; the lent one stays

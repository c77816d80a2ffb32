"""The intake's array path for a row of samples compiled with numba (optional).

:meth:`IntakeBank.add_many <arxwatch.daemon.intake.IntakeBank.add_many>`
takes a trend export row (one sample of each of a few hundred (asset,
signal) pairs, all at one time) in a few dozen numpy calls; at a replay's
tens of thousands of rows the calls, not the arithmetic, take the time.
:func:`take_row` does the same in one call into machine code, a sample at
a time as :meth:`IntakeBank.add` would: hold the sample in its cell, note
the first cell of an asset not yet advanced, the newest time, the quality
check of a checked signal (its numbers queued as ``add_many`` queues them)
and the outcome counters. The checks that decide whether the row can take
this path at all (:meth:`IntakeBank._vector_ready`) stay in Python.

numba is the optional ``fast`` extra, as for :mod:`arxwatch.daemon.fleetnative`:
this module is imported by an intake made with the compiled back end only.
Every value is computed by the same IEEE-754 double operations as the
Python reference (``IntakeBank._take`` and ``_check_quality``), numba used
without ``fastmath``; ``tests/property/test_intake_properties.py`` runs the
row path of both back ends against ``add`` one sample at a time.
"""

from __future__ import annotations

import numba
import numpy as np
from numpy.typing import NDArray

__all__ = ["take_row"]


@numba.njit(cache=True, fastmath=False, error_model="numpy")
def take_row(
    pairs: NDArray[np.intp],
    slots: NDArray[np.intp],
    checks: NDArray[np.intp],
    time_s: float,
    values: NDArray[np.float64],
    usable: NDArray[np.bool_],
    cell: int,
    period: float,
    staleness_s: float,
    cells: int,
    held_time: NDArray[np.float64],
    held_value: NDArray[np.float64],
    newest: NDArray[np.float64],
    first_index: NDArray[np.int64],
    last_index: NDArray[np.int64],
    counts: NDArray[np.int32],
    count_columns: NDArray[np.intp],
    quality: NDArray[np.float64],
    gap_count: NDArray[np.int64],
    gap_total: NDArray[np.float64],
    run_min: NDArray[np.float64],
    run_max: NDArray[np.float64],
    run_start_s: NDArray[np.float64],
    has_moved: NDArray[np.bool_],
    open_index: int,
    crowded: NDArray[np.bool_],
    pending: NDArray[np.float64],
) -> int:
    """Take one sample of each of ``pairs`` at ``time_s``; return the quality rows queued.

    The row is one :meth:`IntakeBank._vector_ready` accepts: distinct
    pairs of slots in use and numeric signals, each sample newer than all
    of its pair, its cell after the asset's last closed grid point.

    Parameters
    ----------
    pairs, slots : ndarray of intp, shape (k,)
        Flat (slot, signal) position and slot of each sample.
    checks : ndarray of intp, shape (k,)
        Flat (slot, checked signal) position of each sample, -1 for a
        signal not checked.
    time_s, values, usable, cell
        The samples' time, values, whether each is held, the time's cell.
    period, staleness_s : float
        ``config.sample_period_s``, ``config.staleness_s``.
    cells : int
        Held entries per pair.
    held_time, held_value, newest, first_index, last_index, counts
        The bank's arrays, flat (``counts`` row-major, slots by counters).
    count_columns : ndarray of intp, shape (3,)
        Columns of ``accepted``, ``out_of_range`` and ``overflow`` in ``counts``.
    quality : ndarray of float64, shape (3, checked signals)
        Expected period, gap factor and flat-run tolerance of each checked
        signal.
    gap_count, gap_total, run_min, run_max, run_start_s, has_moved
        The bank's quality arrays (``gap_total`` is ``gap_total_s``), flat.
    open_index : int
        ``last_index`` of an asset never advanced.
    crowded : ndarray of bool, shape (k,)
        Set where a sample took its pair's last free entry.
    pending : ndarray of float64, shape (k, 11)
        The quality rows queued, in sample order (the bank's ``_CHECK_FIELDS``).
    """
    n_quality = quality.shape[1]
    n_counts = counts.shape[0] // last_index.shape[0]
    top = cell * period
    bottom = (cell - 1) * period
    holds = top <= time_s + staleness_s
    queued = 0
    for i in range(pairs.shape[0]):
        pair, slot = pairs[i], slots[i]
        start = pair * cells
        if usable[i] and holds:
            same = -1
            free = -1
            n_free = 0
            for j in range(cells):
                t = held_time[start + j]
                if bottom < t <= top:
                    same = j
                elif t != t:
                    free = j
                    n_free += 1
            target = same if same >= 0 else free
            if same < 0 and n_free <= 1:
                crowded[i] = True
            if target < 0:  # every entry holds an older cell: the oldest goes
                counts[slot * n_counts + count_columns[2]] += 1
                target = 0
                for j in range(1, cells):
                    if held_time[start + j] < held_time[start + target]:
                        target = j
            held_time[start + target] = time_s
            held_value[start + target] = values[i]
        if last_index[slot] == open_index and cell < first_index[slot]:
            first_index[slot] = cell
        last = newest[pair]
        newest[pair] = time_s
        at = checks[i]
        if at >= 0:
            q = at % n_quality
            value = values[i]
            first = last != last
            interval = 0.0 if first else time_s - last
            periods = interval / quality[0, q]
            gap = periods > quality[1, q]
            count = gap_count[at]
            total = gap_total[at]
            if gap:
                count += 1
                total += interval
                gap_count[at] = count
                gap_total[at] = total
            moved = has_moved[at]
            if first:
                run_start, low, high = time_s, value, value
            else:
                run_start = run_start_s[at]
                # numpy's minimum and maximum, as add_many's array path (signed zeros too)
                low = run_min[at] if run_min[at] < value else value
                high = run_max[at] if run_max[at] > value else value
                if high - low > quality[2, q]:
                    moved = True
                    has_moved[at] = True
                    run_start, low, high = time_s, value, value
            run_min[at] = low
            run_max[at] = high
            run_start_s[at] = run_start
            row = pending[queued]
            row[0] = slot
            row[1] = q
            row[2] = value
            row[3] = interval
            row[4] = periods
            row[5] = 1.0 if gap else 0.0
            row[6] = time_s - run_start
            row[7] = high - low
            row[8] = 1.0 if moved else 0.0
            row[9] = count
            row[10] = total
            queued += 1
        counts[slot * n_counts + count_columns[0 if usable[i] else 1]] += 1
    return queued

r"""Running sums from which the autocovariances of a stretch follow exactly.

For a stretch ``x_0 .. x_{n-1}`` with mean ``m``, the centred lag-k sums are

.. math::

    C_k = \sum_{t=k}^{n-1} (x_t - m)(x_{t-k} - m)
        = P_k - m\,(S - T_k) - m\,(S - H_k) + (n - k)\,m^2,

with ``S`` the sum, ``P_k = \sum_t x_t x_{t-k}``, ``H_k`` the sum of the
first k values and ``T_k`` the sum of the last k. Keeping ``S``, ``P_0..P_p``,
the first p and the last p values (``3 p + 2`` numbers) therefore gives
``C_0 .. C_p`` of a stretch of any length, without storing it: the
prewhitening filter's Yule-Walker fit and the whiteness test's Ljung-Box
statistic both need only these. The column-wise monitor of the daemon runs
the same arithmetic on arrays, so the functions here fix the order of the
floating-point operations.
"""

from __future__ import annotations

import numpy as np
from numpy.typing import NDArray


def add_value(
    sums: list[float], head: list[float], past: list[float], count: int, x: float
) -> None:
    """Add ``x`` to running sums (in place).

    Parameters
    ----------
    sums : list of float, length p + 2
        ``[S, P_0, P_1, .., P_p]``.
    head : list of float, length p
        First p values of the stretch (filled while ``count < p``).
    past : list of float, length p
        Last p values, newest first (zeros before they exist).
    count : int
        Values added before ``x``.
    x : float
        The new value.
    """
    sums[0] += x
    sums[1] += x * x
    for lag in range(1, min(count, len(past)) + 1):
        sums[lag + 1] += x * past[lag - 1]
    if count < len(head):
        head[count] = x
    if past:
        past.insert(0, x)
        del past[-1]


def centred_sums(
    sums: NDArray[np.float64],
    head: NDArray[np.float64],
    past: NDArray[np.float64],
    count: NDArray[np.int64] | int,
) -> NDArray[np.float64]:
    """Return ``C_0 .. C_p`` (see the module docstring) of one or many stretches.

    Parameters
    ----------
    sums : ndarray, shape (p + 2,) or (p + 2, k)
        ``[S, P_0, .., P_p]`` as kept by :func:`add_value`, one column per stretch.
    head, past : ndarray, shape (p,) or (p, k)
        First and last p values, as kept by :func:`add_value`.
    count : int or ndarray of shape (k,)
        Length n of each stretch, > p.

    Returns
    -------
    ndarray, shape (p + 1,) or (p + 1, k)
        Centred lag-k product sums; ``C_k / n`` is the biased autocovariance.
        Element-wise arithmetic only, so a column's result does not depend
        on the other columns.
    """
    n = np.asarray(count, dtype=np.float64)
    total = sums[0]
    mean = total / n
    out = []
    head_sum = np.zeros_like(total)
    tail_sum = np.zeros_like(total)
    for lag in range(head.shape[0] + 1):
        if lag:
            head_sum = head_sum + head[lag - 1]
            tail_sum = tail_sum + past[lag - 1]
        centred = sums[lag + 1] - mean * (total - tail_sum) - mean * (total - head_sum)
        out.append(centred + (n - lag) * mean * mean)
    return np.array(out)

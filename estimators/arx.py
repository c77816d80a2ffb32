r"""ARX model structure and regressor construction.

The multi-input ARX model is

.. math::

    A(q) y(k) = \sum_i B_i(q) u_i(k - nk_i) + c + e(k)

with :math:`A(q) = 1 + a_1 q^{-1} + ... + a_{na} q^{-na}` and
:math:`B_i(q) = b_{i,1} + b_{i,2} q^{-1} + ... + b_{i,nb_i} q^{-nb_i+1}`.
Written as a linear regression :math:`y(k) = \varphi(k)^T \theta + e(k)`,

.. math::

    \varphi(k) = [-y(k-1), ..., -y(k-na),
                   u_1(k-nk_1), ..., u_1(k-nk_1-nb_1+1), ..., 1]

    \theta = [a_1, ..., a_{na}, b_{1,1}, ..., b_{1,nb_1}, ..., c]

References
----------
L. Ljung, *System Identification: Theory for the User*, 2nd ed., Prentice
Hall, 1999, section 4.2 (equation error model structure).
"""

from __future__ import annotations

from collections.abc import Iterable, Sequence
from dataclasses import dataclass

import numpy as np
from numpy.typing import ArrayLike, NDArray

from arxwatch.estimators.errors import DimensionError, OrderError

#: Largest order or delay accepted for one polynomial: HVAC loops sampled at
#: seconds to minutes never need more, and a typo like 1000 should fail loudly.
MAX_LAG = 240


@dataclass(frozen=True)
class ArxOrder:
    """Structure of a multi-input ARX model.

    Parameters
    ----------
    na : int
        Order of the output polynomial A (number of past outputs), >= 0.
    nb : tuple of int
        Number of coefficients of each input polynomial B_i, each >= 1.
    nk : tuple of int
        Delay (dead time in samples) of each input, each >= 0; ``nk_i = 0``
        means the current input sample u_i(k) enters the regressor.
    constant : bool
        Whether a constant term c (an offset) is estimated.

    Raises
    ------
    OrderError
        If an order or delay is negative, too large, the per-input tuples
        differ in length, or the model has no parameter at all.

    Examples
    --------
    >>> order = ArxOrder(na=1, nb=(1,), nk=(2,))
    >>> order.n_params, order.depth
    (3, 2)
    >>> order.param_names
    ('a1', 'b1_1', 'c')
    """

    na: int
    nb: tuple[int, ...]
    nk: tuple[int, ...]
    constant: bool = True

    def __post_init__(self) -> None:
        object.__setattr__(self, "nb", _as_int_tuple(self.nb, "nb"))
        object.__setattr__(self, "nk", _as_int_tuple(self.nk, "nk"))
        if isinstance(self.na, bool) or not isinstance(self.na, (int, np.integer)):
            raise OrderError(f"na must be an integer, got {self.na!r}")
        object.__setattr__(self, "na", int(self.na))
        if not 0 <= self.na <= MAX_LAG:
            raise OrderError(f"na must be in [0, {MAX_LAG}], got {self.na}")
        if len(self.nb) != len(self.nk):
            raise OrderError(
                f"nb and nk need one entry per input: got {len(self.nb)} orders "
                f"{self.nb} and {len(self.nk)} delays {self.nk}"
            )
        for i, (nb_i, nk_i) in enumerate(zip(self.nb, self.nk, strict=True)):
            if not 1 <= nb_i <= MAX_LAG:
                raise OrderError(f"nb[{i}] must be in [1, {MAX_LAG}], got {nb_i}")
            if not 0 <= nk_i <= MAX_LAG:
                raise OrderError(f"nk[{i}] must be in [0, {MAX_LAG}], got {nk_i}")
        if self.n_params == 0:
            raise OrderError("model has no parameters: need na >= 1, an input, or constant=True")

    @property
    def n_inputs(self) -> int:
        """Number of input signals."""
        return len(self.nb)

    @property
    def n_params(self) -> int:
        """Length of the parameter vector theta."""
        return self.na + sum(self.nb) + int(self.constant)

    @property
    def input_depth(self) -> int:
        """Input samples kept per input: u_i(k) back to the oldest one used."""
        return max((nk + nb for nb, nk in zip(self.nb, self.nk, strict=True)), default=0)

    @property
    def depth(self) -> int:
        """Samples of history needed before the first full regressor.

        The regressor at time k reaches back to y(k - na) and to
        u_i(k - nk_i - nb_i + 1), so ``depth = max(na, max_i(nk_i + nb_i - 1))``.
        """
        return max(self.na, self.input_depth - 1)

    @property
    def param_names(self) -> tuple[str, ...]:
        """Names of the entries of theta, in regressor order."""
        names = [f"a{j + 1}" for j in range(self.na)]
        for i, nb_i in enumerate(self.nb):
            names.extend(f"b{i + 1}_{j + 1}" for j in range(nb_i))
        if self.constant:
            names.append("c")
        return tuple(names)

    def input_slice(self, i: int) -> slice:
        """Slice of theta holding the B_i coefficients of input ``i``."""
        if not 0 <= i < self.n_inputs:
            raise OrderError(f"input index must be in [0, {self.n_inputs}), got {i}")
        start = self.na + sum(self.nb[:i])
        return slice(start, start + self.nb[i])


def _as_int_tuple(values: object, name: str) -> tuple[int, ...]:
    if isinstance(values, (int, np.integer)) and not isinstance(values, bool):
        return (int(values),)
    if not isinstance(values, Iterable) or isinstance(values, (str, bytes)):
        raise OrderError(f"{name} must be a sequence of integers, got {values!r}")
    items = tuple(values)
    out = []
    for v in items:
        if isinstance(v, bool) or not isinstance(v, (int, np.integer)):
            raise OrderError(f"{name} must hold integers, got {v!r} in {items!r}")
        out.append(int(v))
    return tuple(out)


def _check_series(
    order: ArxOrder, y: ArrayLike, u: ArrayLike | None
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    y_arr = np.asarray(y, dtype=np.float64)
    if y_arr.ndim != 1:
        raise DimensionError(f"y must be 1-D (N,), got shape {y_arr.shape}")
    n = y_arr.shape[0]
    if u is None:
        u_arr = np.empty((n, 0), dtype=np.float64)
    else:
        u_arr = np.asarray(u, dtype=np.float64)
        if u_arr.ndim == 1:
            u_arr = u_arr[:, None]
        if u_arr.ndim != 2 or u_arr.shape[0] != n:
            raise DimensionError(f"u must have shape (N={n}, n_inputs), got {u_arr.shape}")
    if u_arr.shape[1] != order.n_inputs:
        raise DimensionError(
            f"u has {u_arr.shape[1]} input column(s) but the order names {order.n_inputs}"
        )
    return y_arr, u_arr


def regression_matrix(
    order: ArxOrder, y: ArrayLike, u: ArrayLike | None = None
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Stack the regressors of a recorded series for a batch fit.

    Parameters
    ----------
    order : ArxOrder
        Model structure.
    y : array_like, shape (N,)
        Output samples on a uniform grid.
    u : array_like, shape (N, n_inputs) or (N,), optional
        Input samples on the same grid; omit for a model without inputs.

    Returns
    -------
    Phi : ndarray, shape (N - depth, n_params)
        Row ``r`` is the regressor for sample ``k = depth + r``.
    target : ndarray, shape (N - depth,)
        ``y[depth:]``.

    Raises
    ------
    DimensionError
        If shapes disagree with the order, or the series is not longer than
        ``order.depth``.

    Examples
    --------
    >>> Phi, target = regression_matrix(ArxOrder(1, (1,), (1,)), [1.0, 2.0, 4.0], [1.0, 0.0, 0.0])
    >>> Phi.tolist(), target.tolist()
    ([[-1.0, 1.0, 1.0], [-2.0, 0.0, 1.0]], [2.0, 4.0])
    """
    y_arr, u_arr = _check_series(order, y, u)
    n = y_arr.shape[0]
    d = order.depth
    if n <= d:
        raise DimensionError(f"series of {n} samples is too short for order depth {d}")
    rows = n - d
    phi = np.empty((rows, order.n_params), dtype=np.float64)
    col = 0
    for j in range(1, order.na + 1):
        phi[:, col] = -y_arr[d - j : n - j]
        col += 1
    for i, (nb_i, nk_i) in enumerate(zip(order.nb, order.nk, strict=True)):
        for j in range(nb_i):
            lag = nk_i + j
            phi[:, col] = u_arr[d - lag : n - lag, i]
            col += 1
    if order.constant:
        phi[:, col] = 1.0
    return phi, y_arr[d:].copy()


def check_breaks(breaks: Sequence[int], n_total: int) -> tuple[int, ...]:
    """Validate the starts of segments 2, 3, ... of a concatenated record.

    Parameters
    ----------
    breaks : sequence of int
        Index of the first sample of each segment after the first, strictly
        increasing, each in [1, n_total - 1].
    n_total : int
        Samples in the concatenated record.

    Returns
    -------
    tuple of int
        ``breaks`` as plain ints.

    Raises
    ------
    DimensionError
        If a break is not an integer, out of range or not after the one
        before.

    Examples
    --------
    >>> check_breaks([3, 5], 8)
    (3, 5)
    """
    out: list[int] = []
    for j, b in enumerate(breaks):
        if isinstance(b, bool) or not isinstance(b, (int, np.integer)):
            raise DimensionError(f"breaks[{j}] must be an integer, got {b!r}")
        if not (out[-1] if out else 0) < b < n_total:
            raise DimensionError(
                f"breaks must increase strictly within (0, {n_total}) for {n_total} samples, "
                f"got {list(breaks)!r}"
            )
        out.append(int(b))
    return tuple(out)


def segment_lengths(breaks: Sequence[int], n_total: int) -> tuple[int, ...]:
    """Return the length of each segment of a record of ``n_total`` samples cut at ``breaks``.

    Examples
    --------
    >>> segment_lengths((3, 5), 8)
    (3, 2, 3)
    """
    bounds = (0, *check_breaks(breaks, n_total), n_total)
    return tuple(b - a for a, b in zip(bounds[:-1], bounds[1:], strict=True))


def scored_rows(breaks: Sequence[int], n_total: int, start: int) -> int:
    """Return the regression rows of all segments when each scores from its sample ``start``.

    Examples
    --------
    >>> scored_rows((3, 5), 8, 1)
    5
    """
    return sum(max(n - start, 0) for n in segment_lengths(breaks, n_total))


def segment_regression_matrix(
    order: ArxOrder,
    y: ArrayLike,
    u: ArrayLike | None = None,
    breaks: Sequence[int] = (),
    *,
    start: int | None = None,
) -> tuple[NDArray[np.float64], NDArray[np.float64]]:
    """Stack the regressors of several gap-free segments of one record.

    ``y`` and ``u`` hold the segments one after the other; ``breaks`` says
    where each new one starts. Each segment is built by
    :func:`regression_matrix` on its own, so no regressor reaches back across
    a join (splicing segments would invent dynamics there), and each gives
    the rows of its samples ``start``, ``start + 1``, ... A segment of at
    most ``start`` samples gives none. With no breaks and the default
    ``start`` this is :func:`regression_matrix`.

    Parameters
    ----------
    order : ArxOrder
        Model structure.
    y : array_like, shape (N,)
        Output samples, segment after segment, each on a uniform grid.
    u : array_like, shape (N, n_inputs) or (N,), optional
        Input samples likewise; omit for a model without inputs.
    breaks : sequence of int, optional
        Index of the first sample of each segment after the first,
        strictly increasing, in [1, N - 1].
    start : int, optional
        First scored sample within each segment, >= ``order.depth``
        (default); a common ``start`` lets candidates of different depths
        be scored on the same samples.

    Returns
    -------
    Phi : ndarray, shape (M, n_params)
        The rows of every segment, in order.
    target : ndarray, shape (M,)
        The matching outputs.

    Raises
    ------
    DimensionError
        If shapes disagree with the order, ``breaks`` or ``start`` are out of
        range, or no segment is longer than ``start``.

    Examples
    --------
    >>> order = ArxOrder(1, (1,), (1,))
    >>> Phi, target = segment_regression_matrix(
    ...     order, [1.0, 2.0, 4.0, 8.0], [1.0, 0.0, 0.0, 1.0], breaks=[2]
    ... )
    >>> Phi.tolist(), target.tolist()
    ([[-1.0, 1.0, 1.0], [-4.0, 0.0, 1.0]], [2.0, 8.0])
    """
    y_arr, u_arr = _check_series(order, y, u)
    n = y_arr.shape[0]
    cuts = check_breaks(breaks, n)
    first = order.depth if start is None else start
    if isinstance(first, bool) or not isinstance(first, (int, np.integer)):
        raise DimensionError(f"start must be an integer, got {first!r}")
    if not order.depth <= first:
        raise DimensionError(f"start must be at least the order depth {order.depth}, got {first}")
    if not cuts and start is None:
        return regression_matrix(order, y_arr, u_arr)
    drop = int(first) - order.depth
    phis: list[NDArray[np.float64]] = []
    targets: list[NDArray[np.float64]] = []
    bounds = (0, *cuts, n)
    for a, b in zip(bounds[:-1], bounds[1:], strict=True):
        if b - a <= first:
            continue
        phi, target = regression_matrix(order, y_arr[a:b], u_arr[a:b])
        phis.append(phi[drop:])
        targets.append(target[drop:])
    if not phis:
        longest = max(b - a for a, b in zip(bounds[:-1], bounds[1:], strict=True))
        raise DimensionError(
            f"no segment is longer than {first} samples (the longest of {len(bounds) - 1} has "
            f"{longest}): none gives a regression row after its history"
        )
    return np.concatenate(phis), np.concatenate(targets)


class RegressorHistory:
    """Past outputs and inputs of one asset, for building phi(k) sample by sample.

    Call :meth:`regressor` with the current inputs u(k) to get phi(k), then
    :meth:`push` with y(k) and u(k) once the sample has been used. After a
    gap in the data call :meth:`clear`: the next regressor is ready only
    once ``order.depth`` fresh samples have been pushed.

    Parameters
    ----------
    order : ArxOrder
        Model structure.

    Examples
    --------
    >>> h = RegressorHistory(ArxOrder(1, (1,), (1,)))
    >>> h.push(1.0, [1.0]); h.ready
    True
    >>> h.regressor([0.0])
    [-1.0, 1.0, 1.0]
    """

    __slots__ = ("order", "_depth", "_y", "_u", "_count")

    def __init__(self, order: ArxOrder) -> None:
        self.order = order
        self._depth = order.depth  # cached: this runs per sample
        self._y: list[float] = [0.0] * order.na  # _y[0] = y(k-1)
        # _u[i][0] = u_i(k-1), _u[i][1] = u_i(k-2), ...
        self._u: list[list[float]] = [[0.0] * max(order.input_depth - 1, 0) for _ in order.nb]
        self._count = 0

    @property
    def ready(self) -> bool:
        """Whether enough samples have been pushed for a full regressor."""
        return self._count >= self._depth

    def clear(self) -> None:
        """Forget the history (after a gap the old samples are not the past)."""
        self._y = [0.0] * self.order.na
        self._u = [[0.0] * len(row) for row in self._u]
        self._count = 0

    def regressor(self, u_now: Sequence[float]) -> list[float]:
        """Return phi(k) for the current inputs ``u_now`` = u(k).

        Raises
        ------
        DimensionError
            If ``u_now`` has the wrong length.
        """
        order = self.order
        if len(u_now) != order.n_inputs:
            raise DimensionError(
                f"u_now has {len(u_now)} value(s) but the order names {order.n_inputs} input(s)"
            )
        phi = [-v for v in self._y]
        for i, (nb_i, nk_i) in enumerate(zip(order.nb, order.nk, strict=True)):
            past = self._u[i]
            for lag in range(nk_i, nk_i + nb_i):
                phi.append(float(u_now[i]) if lag == 0 else past[lag - 1])
        if order.constant:
            phi.append(1.0)
        return phi

    def push(self, y_now: float, u_now: Sequence[float]) -> None:
        """Shift y(k) and u(k) into the history."""
        if len(u_now) != self.order.n_inputs:
            raise DimensionError(
                f"u_now has {len(u_now)} value(s) but the order names "
                f"{self.order.n_inputs} input(s)"
            )
        if self._y:
            self._y.insert(0, float(y_now))
            self._y.pop()
        for i, past in enumerate(self._u):
            if past:
                past.insert(0, float(u_now[i]))
                past.pop()
        if self._count < self._depth:
            self._count += 1

    def to_state(self) -> dict[str, object]:
        """Plain-data copy of the history, for checkpoints."""
        return {"y": list(self._y), "u": [list(p) for p in self._u], "count": self._count}

    @classmethod
    def from_state(cls, order: ArxOrder, state: dict[str, object]) -> RegressorHistory:
        """Rebuild a history saved by :meth:`to_state`.

        Raises
        ------
        DimensionError
            If the saved lengths do not fit ``order``.
        """
        h = cls(order)
        y = [float(v) for v in state["y"]]  # type: ignore[attr-defined]
        u = [[float(v) for v in row] for row in state["u"]]  # type: ignore[attr-defined]
        if len(y) != len(h._y) or [len(r) for r in u] != [len(r) for r in h._u]:
            raise DimensionError("saved regressor history does not fit the model order")
        count = int(state["count"])  # type: ignore[call-overload]
        h._y, h._u, h._count = y, u, min(max(count, 0), order.depth)
        return h

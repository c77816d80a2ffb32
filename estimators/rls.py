"""Recursive least squares with exponential forgetting, in Bierman's UD form.

Why the UD form
---------------
The textbook covariance update ``P <- (P - K phi' P) / lambda`` loses symmetry
and then positive definiteness through rounding; with forgetting it diverges
(eigenvalues near 1e30 after a few thousand samples were seen in trials at
lambda = 0.995). Symmetrising after each step hides the asymmetry but not the
loss of definiteness. Bierman's factorised update keeps ``P = U D U'`` with
``U`` unit upper triangular and ``D`` diagonal: every new ``d_j`` is the old
one times a ratio of positive numbers, so ``P`` stays symmetric and positive
definite by construction, at the same O(n^2) cost as the plain update.

Guards around the update
------------------------
* **Wind-up bound.** With forgetting, directions of parameter space that the
  inputs do not excite grow as ``lambda**-k``. Every ``TRACE_CHECK_EVERY``
  updates (from the first) ``trace(P)`` is computed and, if above ``trace_max *
  lambda**TRACE_CHECK_EVERY``, ``D`` is scaled down to that level (the
  constant-trace idea; scaling keeps ``P`` positive definite). One update
  grows ``P`` by at most ``1 / lambda`` (it subtracts a positive
  semi-definite term, then divides by lambda), so ``trace(P) <= trace_max``
  holds at every sample while the check costs a sixteenth of an update.
* **Excitation gate.** An exponentially weighted standard deviation of every
  input, over the same memory as the estimator, is kept and returned. When
  ``min_input_std`` is set and any input varies less than that, the update is
  frozen (``theta`` and ``P`` untouched, no forgetting) until it moves again.
* **Robust weighting.** An innovation larger than ``huber_k`` standard
  deviations is given the Huber weight ``w = huber_k / |eps|`` so that a
  single spike moves the estimate by a bounded amount.

One kernel, three back ends
---------------------------
At n = 6 parameters numpy's per-call overhead costs more than the arithmetic,
so the per-asset kernel is straight-line Python on floats, unrolled for the
model size. The unrolled source is generated once per (size, settings) by
:func:`kernel_source`; the batched engine runs the *same* generated source
with each state entry a numpy array over assets (struct-of-arrays),
``np.where``/``np.minimum`` in place of the scalar conditionals, and state
updates as in-place statements (``d *= a``) that write into the state arrays
instead of allocating new ones. The optional compiled back end
(:mod:`arxwatch.estimators.native`) hands the same statements to numba, with
the settings read from a small array instead of written in as literals.
All three therefore perform the same IEEE operations in the same order and
agree to the last bit. The state of one asset is a flat list of floats
(layout in :class:`StateLayout`; a float64 array for the compiled kernel),
of a batch a list of 1-D arrays, one per entry.

References
----------
G. J. Bierman, *Factorization Methods for Discrete Sequential Estimation*,
Academic Press, 1977, chapter V (UD measurement update).
K. J. Åström and B. Wittenmark, *Computer-Controlled Systems*, 3rd ed.,
Prentice Hall, 1997, section 13.7 (LS update in UD form with forgetting).
L. Ljung and T. Söderström, *Theory and Practice of Recursive Identification*,
MIT Press, 1983, chapter 6 (numerical aspects).
P. J. Huber, *Robust Statistics*, Wiley, 1981 (the Huber weight; k = 1.345
gives 95 % efficiency under Gaussian noise).
T. Finch, "Incremental calculation of weighted mean and variance", University
of Cambridge Computing Service, 2009 (the exponentially weighted moments).
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from functools import lru_cache
from typing import Any, Literal

import numpy as np
from numpy.typing import NDArray

from arxwatch.estimators.errors import DimensionError

#: Samples between two checks of trace(P) against its cap.
TRACE_CHECK_EVERY = 16

#: What one step returns: (prediction, innovation, normalised innovation,
#: Huber weight, whether the estimate was updated, excitation).
StepResult = tuple[Any, Any, Any, Any, Any, Any]
Kernel = Callable[..., StepResult]

#: One asset's flat state as :class:`StateLayout` reads it: a list of floats
#: (pure-Python kernel) or a 1-D float64 array (compiled kernel).
FlatState = Sequence[float] | NDArray[np.float64]


@dataclass(frozen=True)
class RlsConfig:
    """Settings of the recursive estimator (immutable).

    Parameters
    ----------
    forgetting : float
        Forgetting factor lambda in (0, 1]; the memory is about
        ``1 / (1 - lambda)`` samples (lambda = 0.995 remembers ~200 samples).
    p0 : float
        Initial covariance ``P = p0 * I``: large means "know nothing".
    trace_max : float or None
        Upper bound on ``trace(P)``; None means ``n_params * p0``, i.e. never
        more uncertain than at the start.
    huber_k : float or None
        Huber threshold on normalised innovations; None disables weighting.
    warmup_updates : int
        Updates before robust weighting and the excitation gate engage: the
        noise level is unknown at the start.
    min_input_std : float or None
        Freeze the update while any input's weighted standard deviation over
        the memory is below this value (signal units). None never freezes.

    Raises
    ------
    ValueError
        If a setting is out of range; the message names it.
    """

    forgetting: float = 0.995
    p0: float = 1.0e4
    trace_max: float | None = None
    huber_k: float | None = 1.345
    warmup_updates: int = 50
    min_input_std: float | None = None

    def __post_init__(self) -> None:
        _check_number("forgetting", self.forgetting, low=0.0, high=1.0, open_low=True)
        _check_number("p0", self.p0, low=0.0, open_low=True)
        if self.trace_max is not None:
            _check_number("trace_max", self.trace_max, low=0.0, open_low=True)
        if self.huber_k is not None:
            _check_number("huber_k", self.huber_k, low=0.0, open_low=True)
        if isinstance(self.warmup_updates, bool) or not isinstance(self.warmup_updates, int):
            raise ValueError(f"warmup_updates must be an integer, got {self.warmup_updates!r}")
        if self.warmup_updates < 0:
            raise ValueError(f"warmup_updates must be >= 0, got {self.warmup_updates}")
        if self.min_input_std is not None:
            _check_number("min_input_std", self.min_input_std, low=0.0)

    def trace_bound(self, n_params: int) -> float:
        """Return the effective ``trace(P)`` cap for a model of ``n_params``."""
        return self.trace_max if self.trace_max is not None else n_params * self.p0


def _check_number(
    name: str, value: object, low: float, high: float = math.inf, open_low: bool = False
) -> None:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
        raise ValueError(f"{name} must be a finite number, got {value!r}")
    if value < low or (open_low and value == low) or value > high:
        lo = "(" if open_low else "["
        hi = "inf)" if high == math.inf else f"{high}]"
        raise ValueError(f"{name} must be in {lo}{low}, {hi}, got {value!r}")


@dataclass(frozen=True)
class StateLayout:
    """Where each quantity sits in the flat state vector.

    Order: theta (n), strict upper triangle of U by column (n(n-1)/2), D (n),
    rss, weight, ex_weight, input means (m), input variances (m), n_seen,
    n_updates. ``rss / weight`` is the innovation variance estimate; the
    input moments feed the excitation measure.

    Parameters
    ----------
    n_params : int
        Number of parameters n, >= 1.
    n_inputs : int
        Number of inputs m whose excitation is tracked, >= 0.
    """

    n_params: int
    n_inputs: int

    def __post_init__(self) -> None:
        if isinstance(self.n_params, bool) or not isinstance(self.n_params, int):
            raise DimensionError(f"n_params must be an integer, got {self.n_params!r}")
        if self.n_params < 1:
            raise DimensionError(f"n_params must be >= 1, got {self.n_params}")
        if isinstance(self.n_inputs, bool) or not isinstance(self.n_inputs, int):
            raise DimensionError(f"n_inputs must be an integer, got {self.n_inputs!r}")
        if self.n_inputs < 0:
            raise DimensionError(f"n_inputs must be >= 0, got {self.n_inputs}")

    @property
    def n_upper(self) -> int:
        """Entries in the strict upper triangle of U."""
        return self.n_params * (self.n_params - 1) // 2

    @property
    def size(self) -> int:
        """Length of the flat state vector."""
        return 2 * self.n_params + self.n_upper + 5 + 2 * self.n_inputs

    @property
    def theta(self) -> slice:
        """Parameter estimate."""
        return slice(0, self.n_params)

    @property
    def upper(self) -> slice:
        """U above the diagonal, column by column: U[0,1], U[0,2], U[1,2], ..."""
        return slice(self.n_params, self.n_params + self.n_upper)

    @property
    def diag(self) -> slice:
        """D, the diagonal factor."""
        start = self.n_params + self.n_upper
        return slice(start, start + self.n_params)

    @property
    def rss(self) -> int:
        """Weighted sum of squared errors, Huber-clipped (a robust scale)."""
        return 2 * self.n_params + self.n_upper

    @property
    def weight(self) -> int:
        """Weighted count of updates (denominator of rss)."""
        return self.rss + 1

    @property
    def ex_weight(self) -> int:
        """Weighted count of samples behind the input moments."""
        return self.rss + 2

    @property
    def ex_mean(self) -> slice:
        """Weighted input means."""
        return slice(self.rss + 3, self.rss + 3 + self.n_inputs)

    @property
    def ex_var(self) -> slice:
        """Weighted input variances."""
        start = self.rss + 3 + self.n_inputs
        return slice(start, start + self.n_inputs)

    @property
    def n_seen(self) -> int:
        """Samples offered to the estimator."""
        return self.size - 2

    @property
    def n_updates(self) -> int:
        """Samples that changed the estimate."""
        return self.size - 1

    def initial(self, p0: float) -> list[float]:
        """Fresh state: ``theta = 0``, ``P = p0 * I``, no history."""
        state = [0.0] * self.size
        state[self.diag] = [float(p0)] * self.n_params
        return state

    def covariance(self, state: FlatState) -> NDArray[np.float64]:
        """Dense ``P = U D U'``, shape (n, n), from one asset's state."""
        n = self.n_params
        u = np.eye(n)
        upper = state[self.upper]
        pos = 0
        for j in range(1, n):
            u[:j, j] = upper[pos : pos + j]
            pos += j
        return np.asarray((u * np.asarray(state[self.diag], dtype=np.float64)) @ u.T)

    def trace(self, state: FlatState) -> float:
        """``trace(P) = sum_j d_j (1 + sum_{i<j} U_ij^2)`` of one asset's state."""
        upper, diag = state[self.upper], state[self.diag]
        total, pos = 0.0, 0
        for j, d_j in enumerate(diag):
            column = upper[pos : pos + j]
            total += d_j * (1.0 + sum(v * v for v in column))
            pos += j
        return total

    def sigma2(self, state: FlatState) -> float:
        """Innovation variance estimate (1.0 while no error has been seen)."""
        rss = state[self.rss]
        return rss / state[self.weight] if rss > 0.0 else 1.0


class _Source:
    """Collects lines of generated code with indentation."""

    def __init__(self) -> None:
        self.lines: list[str] = []
        self.indent = 1

    def add(self, line: str) -> None:
        self.lines.append("    " * self.indent + line)


#: What :func:`kernel_source` writes code for: ``"floats"`` one asset in
#: plain Python, ``"arrays"`` a batch of assets as numpy arrays, ``"native"``
#: one asset compiled by numba (:mod:`arxwatch.estimators.native`).
KernelTarget = Literal["floats", "arrays", "native"]
KERNEL_TARGETS: tuple[KernelTarget, ...] = ("floats", "arrays", "native")


def kernel_constants(layout: StateLayout, config: RlsConfig) -> dict[str, float]:
    """Return the settings the kernel uses, named as the ``"native"`` source reads them.

    The ``"floats"`` and ``"arrays"`` kernels have these values written into
    their source as literals; the ``"native"`` kernel reads them, in this
    order, from its argument ``c``, so one compiled kernel serves every
    configuration of the same structure (see :func:`kernel_structure`). A
    literal and a variable holding the same float give the same results.

    Parameters
    ----------
    layout : StateLayout
        Model size.
    config : RlsConfig
        Settings.

    Returns
    -------
    dict of str to float
        ``lam`` (forgetting), ``cap`` (trace cap at a check), ``warm``
        (updates before weighting and gating engage), with Huber weighting
        ``hk`` (threshold) and ``lam_hk`` (lambda / threshold), with the
        excitation gate ``floor`` (least input standard deviation).
    """
    lam = float(config.forgetting)
    constants = {
        "lam": lam,
        "cap": float(config.trace_bound(layout.n_params) * lam**TRACE_CHECK_EVERY),
        "warm": float(config.warmup_updates),
    }
    if config.huber_k is not None:
        constants["hk"] = float(config.huber_k)
        constants["lam_hk"] = float(config.forgetting / config.huber_k)
    if config.min_input_std is not None and layout.n_inputs > 0:
        constants["floor"] = float(config.min_input_std)
    return constants


def kernel_structure(layout: StateLayout, config: RlsConfig) -> tuple[StateLayout, bool, bool]:
    """Return what shapes the kernel's code beyond its constants.

    Returns ``(layout, weighted, gated)``: the model size, whether Huber
    weighting is on and whether the excitation gate is on. Two settings with
    the same structure share one ``"native"`` kernel.
    """
    gated = config.min_input_std is not None and layout.n_inputs > 0
    return layout, config.huber_k is not None, gated


def kernel_source(layout: StateLayout, config: RlsConfig, target: KernelTarget = "floats") -> str:
    """Python source of the unrolled UD-RLS step for ``layout`` and ``config``.

    For every target the source defines ``step(s, phi, y, u)`` (``"arrays"``:
    ``step(s, phi, y, u, check)``), which updates the state ``s`` in place
    and returns (prediction, innovation, normalised innovation, Huber weight,
    updated, excitation), the fields of
    :class:`arxwatch.estimators.estimator.StepResult` in their order. A
    ``phi`` or ``u`` of the wrong length raises
    :class:`~arxwatch.estimators.errors.DimensionError`, a non-finite sample
    ``ValueError``, both before anything changes. See the module docstring
    for the algorithm and sources.

    * ``"floats"``: ``s`` is a list of floats (layout in
      :class:`StateLayout`).
    * ``"arrays"``: ``s``, ``phi`` and ``u`` are lists of 1-D arrays over
      assets, ``check`` a bool array marking the assets due for the trace
      check; results are arrays (the weight, ``updated`` and the excitation
      may be scalars shared by all assets). Non-finite samples are the
      caller's to screen out.
    * ``"native"``: ``s`` is a float64 array. The source also defines
      ``native(s, c, p0, ..., y, x0, ...)``, the part numba compiles, with
      the settings read from the array ``c`` (:func:`kernel_constants`);
      ``step`` unpacks ``phi`` and ``u`` and calls it as ``_native`` with
      ``_constants``, names the caller binds.

    The update itself is the same statements for every target (with
    ``np.where`` in place of the scalar conditionals on arrays), so the three
    perform the same IEEE operations in the same order and agree to the
    last bit.

    A sample of weight ``w`` is a measurement of variance ``1 / w``: in
    Bierman's recursion it starts ``alpha_0 = lambda / w`` instead of
    ``lambda``, so ``alpha_n = lambda / w + phi' P phi`` and the unnormalised
    gain ``k = P phi`` comes out of the recursion.

    Raises
    ------
    ValueError
        If ``target`` is not one of :data:`KERNEL_TARGETS`.
    """
    if target not in KERNEL_TARGETS:
        raise ValueError(f"target must be one of {KERNEL_TARGETS}, got {target!r}")
    vectorised, native = target == "arrays", target == "native"
    n, m = layout.n_params, layout.n_inputs
    theta = [f"t{j}" for j in range(n)]
    upper = [f"u{i}_{j}" for j in range(n) for i in range(j)]
    diag = [f"d{j}" for j in range(n)]
    means = [f"m{i}" for i in range(m)]
    vars_ = [f"v{i}" for i in range(m)]
    learned = [*theta, *upper, *diag, "rss", "wsum"]
    names = [*learned, "exw", *means, *vars_, "nseen", "nupd"]
    if len(names) != layout.size:
        raise AssertionError("kernel variables disagree with StateLayout")
    constants = kernel_constants(layout, config)
    _, weighted, gated = kernel_structure(layout, config)

    def const(name: str) -> str:
        # A literal in Python; a variable read from `c` in the compiled kernel.
        return f"c_{name}" if native else repr(constants[name])

    lam, cap = const("lam"), const("cap")

    # Inline comparisons beat builtin calls on floats; same values for non-NaN.
    def lesser(a: str, b: str) -> str:
        return f"_minimum({a}, {b})" if vectorised else f"({a} if {a} < {b} else {b})"

    def chain(name: str, *steps: tuple[str, str]) -> None:
        # `name = ((name op1 x1) op2 x2) ...`: one expression on floats; on
        # arrays one in-place statement per operation, which writes into the
        # state array instead of allocating a new one. Same operations, same
        # order (each x is evaluated whole), so the same bits either way.
        if vectorised:
            for op, operand in steps:
                src.add(f"{name} {op}= {operand}")
        else:
            expr = name
            for op, operand in steps:
                expr = f"({expr} {op} {f'({operand})' if ' ' in operand else operand})"
            src.add(f"{name} = {expr}")

    def unpack_sample() -> None:
        # Unpacking checks the lengths; a try block costs nothing when it passes.
        src.add("try:")
        src.add(f"    {', '.join(f'p{j}' for j in range(n))}, = phi")
        src.add(f"    {', '.join(f'x{i}' for i in range(m))}, = u" if m else "    () = u")
        src.add("except ValueError:")
        src.add(f"    raise _DimensionError(f'phi needs {n} and inputs {m} values, '")
        src.add("                          f'got {len(phi)} and {len(u)}') from None")

    non_finite = "f'non-finite sample: y={y!r}, phi={phi!r}, inputs={u!r}'"
    src = _Source()
    if native:
        src.add(f"{', '.join(f'c_{name}' for name in constants)}, = c")
    src.add(f"{', '.join(names)}, = s")
    if not native:
        unpack_sample()
    src.add(f"warm = nupd >= {const('warm')}")
    chain("nseen", ("+", "1.0"))
    # Excitation: weighted input moments over the memory (Finch 2009).
    chain("exw", ("*", lam), ("+", "1.0"))
    src.add("rate = 1.0 / exw")
    for i in range(m):
        src.add(f"diff = x{i} - m{i}")
        src.add("incr = rate * diff")
        chain(f"m{i}", ("+", "incr"))
        chain(f"v{i}", ("+", "diff * incr"), ("*", "1.0 - rate"))
    if m:
        src.add(f"lowest = {vars_[0]}")
        for v in vars_[1:]:
            src.add("lowest = " + lesser("lowest", v))
        src.add("excitation = _sqrt(lowest)")
    else:
        src.add("excitation = _inf")
    # Innovation with the prior estimate; f = U' phi (f_0 = phi_0), g = D f,
    # info = phi' P phi. g is kept as k, the start of the gain recursion.
    f = ["p0", *(f"f{j}" for j in range(1, n))]
    src.add("e = y" + "".join(f" - p{j} * t{j}" for j in range(n)))
    for j in range(1, n):
        src.add(f"f{j} = p{j}" + "".join(f" + u{i}_{j} * p{i}" for i in range(j)))
    for j in range(n):
        src.add(f"k{j} = d{j} * {f[j]}")
    for j in range(n):
        src.add(f"h{j} = {f[j]} * k{j}")
    src.add("info = " + " + ".join(f"h{j}" for j in range(n)))
    if not vectorised:
        # A non-finite phi, y or input makes e, info or the variance non-finite.
        probe = "e + info" + (f" + {vars_[0]}" if m else "")
        probe += "".join(f" + {v}" for v in vars_[1:])
        src.add(f"if not _isfinite({probe}):")
        # Compiled code raises a bare marker; `step` words the message.
        src.add("    raise _NonFinite" if native else f"    raise ValueError({non_finite})")
    if vectorised:
        src.add("sigma2 = _where(rss > 0.0, rss / _maximum(wsum, 1e-300), 1.0)")
    else:
        # No error seen yet (or only exact fits): the noise level is unknown,
        # so innovations are scaled by 1 rather than divided by zero.
        src.add("sigma2 = rss / wsum if rss > 0.0 else 1.0")
    src.add(f"nrm = e / _sqrt(sigma2 * ({lam} + info) / {lam})")
    # Huber weight w: the sample counts as a measurement of variance 1 / w.
    if not weighted:
        src.add("w = 1.0")
        src.add(f"a0 = {lam}")
    elif vectorised:
        k = const("hk")
        src.add(f"big = _maximum(abs(nrm), {k})")
        src.add(f"w = _where(warm, {k} / big, 1.0)")
        src.add(f"a0 = _where(warm, big * {const('lam_hk')}, {lam})")
    else:
        # One branch for w and alpha_0, and max(|nrm|, k) without a call to
        # abs() (nrm is finite here).
        k = const("hk")
        src.add("if warm:")
        src.add(f"    big = nrm if nrm > {k} else -nrm if nrm < -{k} else {k}")
        src.add(f"    w = {k} / big")
        src.add(f"    a0 = big * {const('lam_hk')}")
        src.add("else:")
        src.add("    w = 1.0")
        src.add(f"    a0 = {lam}")
    # Freeze while the inputs do not excite the model.
    if gated:
        both = "&" if vectorised else "and"
        src.add(f"frozen = warm {both} (excitation < {const('floor')})")
        if vectorised:
            # The update below writes into the state arrays: keep what the
            # frozen assets must get back.
            src.add("held = frozen.any()")
            src.add("if held:")
            for name in [*learned, "nupd"]:
                src.add(f"    o_{name} = {name}.copy()")
        else:
            src.add("if frozen:")
            src.indent += 1
            for idx, name in enumerate(names):
                if name not in learned:
                    src.add(f"s[{idx}] = {name}")
            src.add("return y - e, e, nrm, w, False, excitation")
            src.indent -= 1
    # Bierman's UD update with alpha_j = a_j; k ends as the unnormalised gain
    # P phi. The text's mu = -f_j / alpha_{j-1} enters as u - k * r with
    # r = -mu: negation is exact, so this is the same number with one
    # operation less. k_j = g_j is first changed in column j + 1.
    for j in range(n):
        src.add(f"a{j + 1} = a{j} + h{j}")
        chain(f"d{j}", ("*", f"a{j}"), ("/", f"a{j + 1} * {lam}"))
        if j:
            src.add(f"r = f{j} / a{j}")
        for i in range(j):
            # Both updates use the old U[i, j] and the old k_i.
            if vectorised:
                src.add(f"uk = u{i}_{j} * k{j}")
                chain(f"u{i}_{j}", ("-", f"k{i} * r"))
                chain(f"k{i}", ("+", "uk"))
            else:
                src.add(f"u{i}_{j}, k{i} = u{i}_{j} - k{i} * r, k{i} + u{i}_{j} * k{j}")
    src.add(f"stp = e / a{n}")
    for j in range(n):
        chain(f"t{j}", ("+", f"k{j} * stp"))
    chain("rss", ("+", "w * e * stp"), ("*", lam))
    chain("wsum", ("*", lam), ("+", "1.0"))
    chain("nupd", ("+", "1.0"))
    # Wind-up guard: on updates 1, 1 + K, 1 + 2K, ... (K = TRACE_CHECK_EVERY)
    # cap trace(P) at `cap`; the first check also brings the initial P = p0 I,
    # whose trace is the bound itself, under the cap.
    exact = " + ".join(
        f"d{j} * (1.0" + "".join(f" + u{i}_{j} * u{i}_{j}" for i in range(j)) + ")"
        for j in range(n)
    )
    if vectorised:
        src.add("if check.any():")
        src.indent += 1
        src.add(f"trace = {exact}")
        src.add(f"scale = _where(check & (trace > {cap}), {cap} / trace, 1.0)")
    else:
        # Below the cap the scale would be 1.0, and d * 1.0 == d: skip it.
        src.add(f"if nupd % {float(TRACE_CHECK_EVERY)!r} == 1.0:")
        src.indent += 1
        src.add(f"trace = {exact}")
        src.add(f"if trace > {cap}:")
        src.indent += 1
        src.add(f"scale = {cap} / trace")
    for j in range(n):
        chain(f"d{j}", ("*", "scale"))
    src.indent = 1
    if vectorised and gated:
        src.add("if held:")
        for name in [*learned, "nupd"]:
            src.add(f"    _copyto({name}, o_{name}, where=frozen)")
    # Stores the new floats; on arrays the entries are already the same objects.
    src.add(f"s[:] = ({', '.join(names)},)")
    updated = "~frozen" if vectorised and gated else "True"
    src.add(f"return y - e, e, nrm, w, {updated}, excitation")
    if not native:
        args = "s, phi, y, u, check" if vectorised else "s, phi, y, u"
        return f"def step({args}):\n" + "\n".join(src.lines) + "\n"
    sample = [*(f"p{j}" for j in range(n)), "y", *(f"x{i}" for i in range(m))]
    body = src.lines
    src = _Source()
    unpack_sample()
    src.add("try:")
    src.add(f"    return _native(s, _constants, {', '.join(sample)})")
    src.add("except _NonFinite:")
    src.add(f"    raise ValueError({non_finite}) from None")
    return (
        f"def native(s, c, {', '.join(sample)}):\n"
        + "\n".join(body)
        + "\n\n\ndef step(s, phi, y, u):\n"
        + "\n".join(src.lines)
        + "\n"
    )


@lru_cache(maxsize=64)
def build_kernel(
    layout: StateLayout, config: RlsConfig, target: Literal["floats", "arrays"] = "floats"
) -> Kernel:
    """Compile (and cache) the step function described by :func:`kernel_source`.

    The ``"native"`` target is built by
    :func:`arxwatch.estimators.native.build_native_kernel` (it needs numba).

    Parameters
    ----------
    layout : StateLayout
        Model size: parameters and tracked inputs.
    config : RlsConfig
        Settings, baked into the code as constants.
    target : {"floats", "arrays"}
        One asset in plain Python, or a batch of assets as arrays.

    Returns
    -------
    callable
        ``step(s, phi, y, u[, check]) -> (prediction, e, eps, w, updated,
        excitation)``, mutating ``s``.

    Raises
    ------
    ValueError
        If ``target`` is neither ``"floats"`` nor ``"arrays"``.
    """
    if target not in ("floats", "arrays"):
        raise ValueError(f"target must be 'floats' or 'arrays', got {target!r}")
    if target == "arrays":
        namespace: dict[str, Any] = {
            "_where": np.where,
            "_minimum": np.minimum,
            "_maximum": np.maximum,
            "_sqrt": np.sqrt,
            "_copyto": np.copyto,
            "_inf": math.inf,
            "_DimensionError": DimensionError,
        }
    else:
        namespace = {
            "_minimum": min,
            "_sqrt": math.sqrt,
            "_inf": math.inf,
            "_isfinite": math.isfinite,
            "_DimensionError": DimensionError,
        }
    source = kernel_source(layout, config, target)
    exec(compile(source, f"<arxwatch rls kernel n={layout.n_params}>", "exec"), namespace)
    kernel: Kernel = namespace["step"]
    return kernel

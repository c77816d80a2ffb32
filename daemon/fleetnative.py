"""The fleet's per-row innovation path compiled with numba (optional).

:meth:`FleetMonitor.step <arxwatch.daemon.fleet.FleetMonitor.step>` judges
the rows of one sample time in about a hundred numpy calls per model order,
whatever the number of assets: at a few hundred assets (a site's VAV boxes
replayed from a trend export) the calls, not the arithmetic, take the time.
This module does what every row needs in one call into machine code per
wave and group, a row at a time: first the innovation path of every row
(:func:`_innovate`: the baseline model's residual and its winsorising, the
regressor histories, prewhitening (the reference's running sums while it is
collected, the AR filter after), CUSUM, the moving variance and the
whiteness test's running sums, and which tracker episodes the evaluations
touch), then the live estimate of every row (regressor, the per-asset RLS
kernel of :mod:`arxwatch.estimators.native`, histories and sample counts).
Both are generated per model structure and detector settings
(:func:`group_kernels`), so that the loops over parameters, prewhitening
coefficients and whiteness lags have constant bounds the compiler unrolls.
The rare steps (fitting a prewhitening filter, ending a whiteness block,
the tracker's transitions, the hourly evaluations, the evidence of a
record) stay with the numpy code of :mod:`arxwatch.daemon.fleet`. A row at
a time pays while a wave's state stays in the processor's cache: the fleet
hands waves of more than about a thousand channels to its numpy path
(``COMPILED_ROWS``).

numba is the optional ``fast`` extra, as for
:mod:`arxwatch.estimators.native`: it is imported on the first kernel
request, never when the package loads.

Same bits as the numpy path
---------------------------
Every value is computed by the same IEEE-754 double operations in the same
order as the element-wise numpy code of :class:`arxwatch.daemon.fleet._Group`
(the sums over regressor entries in the same order, ``a - b + c * d / e``
evaluated left to right as Python does), so the records and the state
arrays agree to the last bit (``tests/unit/test_fleet.py`` runs both back
ends against :class:`~arxwatch.daemon.monitor.AssetMonitor` and compares
every state array). The live estimate is the per-asset compiled kernel,
which matches the batched numpy kernel bit for bit
(``tests/unit/test_native.py``, ``tests/unit/test_batch.py``). That holds
because numba is used without ``fastmath`` (no reassociation, no fused
multiply-add, see :mod:`arxwatch.estimators.native`), ``math.sqrt`` is
correctly rounded like ``numpy.sqrt``, division follows numpy's rules
(``error_model="numpy"``: a zero divisor gives inf or nan, not an
exception), and the clamps spell out numpy's ``minimum``/``maximum``, which
pass nan through.
"""

from __future__ import annotations

import hashlib
import importlib
import importlib.util
import inspect
import math
import os
import sys
import types
from functools import lru_cache
from pathlib import Path
from typing import Any, NamedTuple

import numpy as np
from numpy.typing import NDArray

from arxwatch.estimators.rls import RlsConfig, StateLayout, kernel_constants, kernel_source

__all__ = [
    "FLOAT_OUT",
    "INT_OUT",
    "TOTALS",
    "GroupKernels",
    "compiled_helpers",
    "group_kernels",
]

#: Rows of the kernel's float output, by name.
FLOAT_OUT = (
    "prediction",
    "z",  # the normalised residual before winsorising
    "c_high",
    "c_low",
    "cusum_statistic",
    "cusum_noise_scale",  # what the CUSUM divided its input by
    "variance_s",
    "variance_statistic",
    "variance_threshold",
)
#: Entries of the kernel's totals over the rows of a call: how many rows had each flag.
TOTALS = ("ready", "judged", "fit", "cusum_busy", "variance_busy", "block_ended")
#: Rows of the kernel's integer output, by name.
INT_OUT = (
    "fit",  # the prewhitening reference is complete: fit the filter now
    "n_high",
    "n_low",
    "cusum_alarm",
    "cusum_busy",  # the CUSUM evaluation touches its tracker episode
    "variance_alarm",
    "variance_busy",
    "block_ended",  # the whiteness block is complete: test it now
)


def _add_value(
    sums: Any, head: Any, past: Any, c: int, count: int, x: float, lags: int
) -> None:  # pragma: no cover - compiled
    """``_Group._add_values`` for one channel (``add_value`` of detect._sums).

    ``lags`` is ``len(past)``, an argument so that generated kernels can make it a constant.
    """
    sums[0, c] += x
    sums[1, c] += x * x
    for lag in range(1, lags + 1):
        if count >= lag:
            sums[lag + 1, c] += x * past[lag - 1, c]
    if count < lags:
        head[count, c] = x
    for q in range(lags - 1, 0, -1):
        past[q, c] = past[q - 1, c]
    if lags:
        past[0, c] = x


def _regressor(
    phi: Any, hist_y: Any, hist_u: Any, c: int, u: Any, i: int, nb: Any, nk: Any, constant: int
) -> None:  # pragma: no cover - compiled
    """``_Group._regressor`` for channel ``c`` and row ``i``, into ``phi``."""
    j = 0
    for a in range(hist_y.shape[0]):
        phi[j] = -hist_y[a, c]
        j += 1
    for q in range(nb.shape[0]):
        for lag in range(nk[q], nk[q] + nb[q]):
            phi[j] = u[i, q] if lag == 0 else hist_u[q, lag - 1, c]
            j += 1
    if constant:
        phi[j] = 1.0


def _push(
    hist_y: Any, hist_u: Any, count: Any, c: int, y: float, u: Any, i: int, depth: int
) -> None:  # pragma: no cover - compiled
    """``_Group._push`` for channel ``c``: y and row ``i`` of ``u`` into the histories."""
    na, m, depth_u = hist_y.shape[0], hist_u.shape[0], hist_u.shape[1]
    for a in range(na - 1, 0, -1):
        hist_y[a, c] = hist_y[a - 1, c]
    if na:
        hist_y[0, c] = y
    if depth_u:
        for q in range(m):
            for a in range(depth_u - 1, 0, -1):
                hist_u[q, a, c] = hist_u[q, a - 1, c]
            hist_u[q, 0, c] = u[i, q]
    count[c] = min(count[c] + 1, depth)


def _innovate(
    ch: Any,
    y: Any,
    u: Any,
    structure: Any,
    nb: Any,
    nk: Any,
    base_y: Any,
    base_u: Any,
    base_count: Any,
    theta0: Any,
    cov0: Any,
    sigma2: Any,
    pw_count: Any,
    sums: Any,
    pw_head: Any,
    pw_past: Any,
    pw_scale: Any,
    c_high: Any,
    c_low: Any,
    n_high: Any,
    n_low: Any,
    cu_previous: Any,
    cu_noise: Any,
    var_s: Any,
    wh_count: Any,
    wh_head: Any,
    wh_past: Any,
    raised: Any,
    alarms: Any,
    settings: Any,
    out_f: Any,
    out_i: Any,
    totals: Any,
) -> None:  # pragma: no cover - compiled
    """Run the innovation path for rows ``ch`` (see the module notes); fill the outputs.

    ``out_f`` and ``out_i`` get a column per row (prediction, z, c_high and
    c_low nan where not computed, as a trace shows them); ``totals`` counts
    the rows of each flag of :data:`TOTALS`.

    ``structure`` holds (na, constant, depth, reference_samples, window,
    cusum restart, variance lower); ``settings`` (clip, cusum k, cusum h,
    variance lambda, 1 / lower limit, upper limit, cusum noise lambda). The state arrays are
    updated in place, channel on the last axis; ``sums`` holds the
    prewhitening reference's running sums until the filter is fitted (in
    Python, which then clears them), the whiteness block's after.
    """
    constant, depth = structure[1], structure[2]
    reference, window = structure[3], structure[4]
    restart, lower = structure[5], structure[6]
    clip, k_ref, h = settings[0], settings[1], settings[2]
    lam, low_threshold, upper = settings[3], settings[4], settings[5]
    keep = 1.0 - lam
    noise_lam = settings[6]
    noise_keep = 1.0 - noise_lam
    n, p, lags = theta0.shape[0], pw_past.shape[0], wh_past.shape[0]
    phi = np.empty(n)
    for i in range(ch.shape[0]):
        c = ch[i]
        yi = y[i]
        y_past = yi
        out_f[0, i] = out_f[1, i] = out_f[2, i] = out_f[3, i] = np.nan
        if base_count[c] >= depth:
            # 1. the baseline model's normalised residual (_Group.step)
            _regressor(phi, base_y, base_u, c, u, i, nb, nk, constant)
            prediction = 0.0
            spread = 0.0
            for j in range(n):  # phi' C phi from the upper triangle (Baseline.residual)
                prediction += phi[j] * theta0[j, c]
                off = 0.0
                row = j * n - j * (j - 1) // 2 - j  # C[j, a] at row + a of cov0 (upper triangle)
                for a in range(j + 1, n):
                    off += cov0[row + a, c] * phi[a]
                spread += phi[j] * (cov0[row + j, c] * phi[j] + (off + off))
            e = yi - prediction
            z = e / math.sqrt(sigma2[c] + spread)
            totals[0] += 1
            out_f[0, i] = prediction
            out_f[1, i] = z  # before winsorising, as the numpy path taps it
            if abs(z) > clip:
                y_past = yi - e + e * clip / abs(z)
                z = math.copysign(clip, z)
            # 2. prewhitening (_Group._innovations)
            count = pw_count[c]
            if count < reference:
                _add_value(sums, pw_head, pw_past, c, count, z, p)
                pw_count[c] = count + 1
                if count + 1 >= reference:
                    out_i[0, i] = 1
                    totals[2] += 1
            else:
                predicted = 0.0
                for q in range(p):
                    predicted += pw_head[q, c] * pw_past[q, c]
                for q in range(p - 1, 0, -1):
                    pw_past[q, c] = pw_past[q - 1, c]
                if p:
                    pw_past[0, c] = z
                eps = (z - predicted) / pw_scale[c]
                # np.maximum(-clip, np.minimum(clip, eps)): nan stays nan
                if eps > clip:
                    eps = clip
                if eps < -clip:
                    eps = -clip
                totals[1] += 1
                # 3. CUSUM (_Group._cusum), its input scaled by the noise level
                previous = cu_previous[c]
                noise = cu_noise[c]
                if previous == previous:
                    d = eps - previous
                    noise = noise_keep * noise + noise_lam * (0.5 * (d * d))
                cu_previous[c], cu_noise[c] = eps, noise
                scale = math.sqrt(noise) if noise > 1.0 else 1.0
                out_f[5, i] = scale
                x = eps / scale
                hi = c_high[c] + x - k_ref
                nh = n_high[c] + 1 if hi > 0.0 else 0
                if not hi > 0.0:
                    hi = 0.0
                lo = c_low[c] - x - k_ref
                nl = n_low[c] + 1 if lo > 0.0 else 0
                if not lo > 0.0:
                    lo = 0.0
                statistic = hi if hi >= lo else lo
                alarm = statistic >= h
                out_f[2, i], out_f[3, i], out_f[4, i] = hi, lo, statistic
                out_i[1, i], out_i[2, i], out_i[3, i] = nh, nl, alarm
                if alarm or raised[c, 0] or alarms[c, 0] != 0:
                    out_i[4, i] = 1
                    totals[3] += 1
                if restart and alarm:
                    hi, lo, nh, nl = 0.0, 0.0, 0, 0
                c_high[c], c_low[c], n_high[c], n_low[c] = hi, lo, nh, nl
                # 4. moving variance (_Group._variance)
                s = keep * var_s[c] + lam * eps * eps
                var_s[c] = s
                statistic, threshold = s, upper
                if lower and s < 1.0:
                    statistic = 1.0 / s if s > 0.0 else np.inf
                    threshold = low_threshold
                alarm = statistic >= threshold
                out_f[6, i], out_f[7, i], out_f[8, i] = s, statistic, threshold
                out_i[5, i] = alarm
                if alarm or raised[c, 1] or alarms[c, 1] != 0:
                    out_i[6, i] = 1
                    totals[4] += 1
                # 5. whiteness sums (_Group._whiteness)
                count = wh_count[c]
                _add_value(sums, wh_head, wh_past, c, count, eps, lags)
                wh_count[c] = count + 1
                if count + 1 >= window:
                    out_i[7, i] = 1
                    totals[5] += 1
        # 6. the baseline histories (_Group._push)
        _push(base_y, base_u, base_count, c, y_past, u, i, depth)


_GROUP_MODULE = '''"""The fleet's compiled kernels for one model structure and detector settings.

Generated by arxwatch.daemon.fleetnative.group_kernels; numba caches what it
compiles from this file beside it. Helpers called from fleetnative: {helpers}
(numba's cache of this file does not see their changes; their digest names
another file).
"""

from __future__ import annotations

import math

import numba
import numpy as np

from arxwatch.daemon import fleetnative
from arxwatch.estimators.native import NON_FINITE as _NonFinite

_sqrt, _isfinite, _inf = math.sqrt, math.isfinite, math.inf
_add_value, _regressor, _push = fleetnative.compiled_helpers()


@numba.njit(fastmath=False, error_model="python", cache={cache})
{native}


@numba.njit(fastmath=False, error_model="numpy", cache={cache})
{innovate}


@numba.njit(fastmath=False, error_model="numpy", cache={cache})
def live(ch, y, u, structure, nb, nk, rls_y, rls_u, rls_count, rls, samples, constants, out):
    constant, depth = structure[1], structure[2]
    size = rls.shape[0]
    s = np.empty(size)
    phi = np.empty({n})
    for i in range(ch.shape[0]):
        c = ch[i]
        y_hist = y[i]
        if rls_count[c] >= depth:
            _regressor(phi, rls_y, rls_u, c, u, i, nb, nk, constant)
            for q in range(size):
                s[q] = rls[q, c]
            prediction, e, _, w, _, _ = native(s, constants, {arguments})
            for q in range(size):
                rls[q, c] = s[q]
            y_hist = prediction + w * e
            samples[c] += 1
            out[i] = 1
        _push(rls_y, rls_u, rls_count, c, y_hist, u, i, depth)


@numba.njit(fastmath=False, error_model="numpy", cache={cache})
def wave({innovate_parameters}, rls_y, rls_u, rls_count, rls, samples, constants, out):
    innovate({innovate_parameters})
    live(ch, y, u, structure, nb, nk, rls_y, rls_u, rls_count, rls, samples, constants, out)
'''


@lru_cache(maxsize=1)
def _helpers() -> dict[str, Any]:
    """Compile the helpers the kernels call; return numba's options for the kernels."""
    try:
        numba = importlib.import_module("numba")
    except ImportError as error:
        raise ImportError(
            "the compiled fleet back end needs numba: pip install 'arxwatch[fast]'"
        ) from error
    options: dict[str, Any] = {"fastmath": False, "error_model": "numpy", "cache": True}
    try:
        numba.njit(**options)(_add_value)
    except RuntimeError:  # no writable place for numba's cache (a read-only install)
        options["cache"] = False
    # Compiled code calls only compiled functions: the kernels find the
    # compiled helpers under the helpers' own names, in this module's globals.
    # Inlined (numba's IR level): a call per row and helper costs more than its work.
    for helper in (_add_value, _regressor, _push):
        globals()[helper.__name__] = numba.njit(inline="always", **options)(helper)
    return options


def _generated_folder() -> Path:
    """Return where :func:`group_kernels` writes its modules: the package's ``__pycache__``.

    In ``__pycache__`` itself, so that no source folder appears (numba then
    caches in ``__pycache__/__pycache__``).
    """
    return Path(__file__).resolve().parent / "__pycache__"


def compiled_helpers() -> tuple[Any, Any, Any]:
    """Return the compiled ``_add_value``, ``_regressor`` and ``_push`` (for generated modules)."""
    _helpers()
    return globals()["_add_value"], globals()["_regressor"], globals()["_push"]


class GroupKernels(NamedTuple):
    """The compiled kernels of one group (:func:`group_kernels`)."""

    #: ``wave(<the innovation kernel's arguments>, rls_y, rls_u, rls_count,
    #: rls, samples, constants, out)``: the innovation path of every row,
    #: then the live estimate of every row, in one call.
    wave: Any
    #: ``live(ch, y, u, structure, nb, nk, rls_y, rls_u, rls_count, rls,
    #: samples, constants, out)``: the live estimate alone.
    live: Any
    #: The RLS kernel's settings (``constants`` above).
    constants: NDArray[np.float64]


#: The line of ``_innovate`` that the generated kernels replace with constants.
_SIZES = "    n, p, lags = theta0.shape[0], pw_past.shape[0], wh_past.shape[0]\n"


@lru_cache(maxsize=64)
def group_kernels(layout: StateLayout, config: RlsConfig, ar_order: int, lags: int) -> GroupKernels:
    """Return the compiled kernels of a group: one model structure and detector settings.

    ``live`` does step 2 of ``_Group.step`` a row at a time: the regressor
    from the live histories, the per-asset RLS kernel
    (:func:`~arxwatch.estimators.rls.kernel_source`, target ``"native"``,
    compiled as :mod:`arxwatch.estimators.native` compiles it: the same bits
    as the batched numpy kernel of the numpy path), the filter-cleaned
    output into the histories, and the sample count; ``out`` marks the rows
    whose estimate was updated. ``wave`` runs
    :func:`_innovate` over the rows, then ``live``: one call per wave.

    The code is generated for the model structure, the prewhitening order
    and the whiteness lags (so that the compiler unrolls the loops over
    them) and written as a module under the package's ``__pycache__``
    folder, so that numba can cache what it compiles: a few seconds the
    first time, a fraction of a second in later processes. Where that folder
    is not writable, it is compiled in memory in each process.

    Raises
    ------
    ImportError
        If numba is not installed.
    """
    _helpers()
    importlib.import_module("numba")
    native_source = kernel_source(layout, config, "native")
    native_source = native_source[: native_source.index("\n\n\ndef step(")]
    arguments = [
        *(f"phi[{j}]" for j in range(layout.n_params)),
        "y[i]",
        *(f"u[i, {q}]" for q in range(layout.n_inputs)),
    ]
    innovate = inspect.getsource(_innovate).replace("def _innovate(", "def innovate(", 1)
    assert _SIZES in innovate, "_SIZES must be a line of _innovate"
    innovate = innovate.replace(_SIZES, f"    n, p, lags = {layout.n_params}, {ar_order}, {lags}\n")
    constants = np.array(list(kernel_constants(layout, config).values()))
    plain = [getattr(f, "py_func", f) for f in compiled_helpers()]  # the Python source
    helpers = hashlib.sha256("".join(map(inspect.getsource, plain)).encode()).hexdigest()[:16]
    fields = {
        "native": native_source,
        "innovate": innovate,
        "innovate_parameters": ", ".join(inspect.signature(_innovate).parameters),
        "n": layout.n_params,
        "arguments": ", ".join(arguments),
        "helpers": helpers,
    }
    source = _GROUP_MODULE.format(cache=True, **fields)
    name = "arxwatch_fleet_group_" + hashlib.sha256(source.encode()).hexdigest()[:16]
    folder = _generated_folder()
    path = folder / f"{name}.py"
    try:
        if not path.exists() or path.read_text(encoding="utf-8") != source:
            folder.mkdir(parents=True, exist_ok=True)
            partial = folder / f"{name}.{os.getpid()}.tmp"
            partial.write_text(source, encoding="utf-8")
            os.replace(partial, path)
        spec = importlib.util.spec_from_file_location(name, path)
        if spec is None or spec.loader is None:
            raise OSError(f"cannot load {path}")
        module = importlib.util.module_from_spec(spec)
        sys.modules[name] = module  # numba's cache finds the functions' module by name
        spec.loader.exec_module(module)
    except (OSError, RuntimeError):  # not writable, or no place for numba's cache
        module = types.ModuleType(name)
        uncached = _GROUP_MODULE.format(cache=False, **fields)
        exec(compile(uncached, f"<{name}>", "exec"), module.__dict__)
    return GroupKernels(module.wave, module.live, constants)

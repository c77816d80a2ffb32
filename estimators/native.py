"""The per-asset RLS kernel compiled to machine code with numba (optional).

The pure-Python kernel of :mod:`arxwatch.estimators.rls` spends most of its
~3 us per update interpreting about 200 float operations. This module
compiles the *same* generated statements (:func:`~arxwatch.estimators.rls.
kernel_source` with target ``"native"``) with numba, so an update costs one
call into machine code. numba is an optional dependency (the ``fast``
extra); it is imported on the first build, never when the package loads, and
no other module of :mod:`arxwatch.estimators` imports it (the fleet monitor's
compiled path, :mod:`arxwatch.daemon.fleetnative`, imports it the same way).

Same bits as the pure kernel
----------------------------
The compiled kernel performs the same IEEE-754 double operations in the same
order as the pure one, so every result and every state entry agree to the
last bit (checked in ``tests/unit/test_native.py`` over long random runs that
exercise every guard). That holds because numba is used without
``fastmath``: LLVM may then neither reassociate nor contract ``a * b + c``
into a fused multiply-add (its default ``fp-contract`` fuses only under the
``contract`` fast-math flag, which numba sets only with ``fastmath``), and
``math.sqrt`` maps to the correctly rounded square root in both. Division
keeps Python's semantics (``error_model="python"``: a zero divisor raises
``ZeroDivisionError`` rather than giving inf, as in the pure kernel).

Compile once per structure
--------------------------
The settings are read at run time from a small array (see
:func:`~arxwatch.estimators.rls.kernel_constants`) rather than written into
the code, so one compiled kernel serves every configuration with the same
model size, Huber weighting on or off and excitation gate on or off
(:func:`~arxwatch.estimators.rls.kernel_structure`). Compiled kernels are
cached for the life of the process. Measured on the 2-core reference
machine: the first compilation in a process takes about 3 s (numba sets
itself up), each further structure 0.5 s (n = 3) to 1.4 s (n = 6).

References
----------
S. K. Lam, A. Pitrou and S. Seibert, "Numba: a LLVM-based Python JIT
compiler", *Proc. 2nd Workshop on the LLVM Compiler Infrastructure in HPC*,
ACM, 2015.
IEEE Std 754-2019, *IEEE Standard for Floating-Point Arithmetic*, clause 5.4
(basic operations, square root, and fusedMultiplyAdd as a distinct
operation).
"""

from __future__ import annotations

import importlib
import math
from functools import lru_cache
from types import ModuleType
from typing import Any

import numpy as np

from arxwatch.estimators.errors import DimensionError
from arxwatch.estimators.rls import (
    Kernel,
    RlsConfig,
    StateLayout,
    kernel_constants,
    kernel_source,
)


class _NonFinite(Exception):
    """Raised by compiled code for a non-finite sample; ``step`` words the message."""


def available() -> bool:
    """Return whether numba can be imported (and so the compiled back end built)."""
    return _numba() is not None


@lru_cache(maxsize=1)
def _numba() -> ModuleType | None:
    try:
        return importlib.import_module("numba")
    except ImportError:
        return None


@lru_cache(maxsize=64)
def build_native_kernel(layout: StateLayout, config: RlsConfig) -> Kernel:
    """Return the compiled step function for ``layout`` and ``config`` (cached).

    Parameters
    ----------
    layout : StateLayout
        Model size: parameters and tracked inputs.
    config : RlsConfig
        Settings, passed to the compiled code as an array of constants.

    Returns
    -------
    callable
        ``step(s, phi, y, u) -> (prediction, e, eps, w, updated,
        excitation)``, updating ``s``, a C-contiguous float64 array of
        ``layout.size`` entries, in place. Same results, bit for bit, and
        same errors as the ``"floats"`` kernel of
        :func:`arxwatch.estimators.rls.build_kernel`.

    Raises
    ------
    ImportError
        If numba is not installed.

    """
    source = kernel_source(layout, config, "native")
    namespace: dict[str, Any] = {
        "_native": _compile(layout, source),
        "_constants": np.array(list(kernel_constants(layout, config).values())),
        "_DimensionError": DimensionError,
        "_NonFinite": _NonFinite,
    }
    # Defines `step` (the Python wrapper) and again the plain-Python `native`,
    # which the wrapper does not use: it calls the compiled `_native`.
    exec(compile(source, f"<arxwatch native rls wrapper n={layout.n_params}>", "exec"), namespace)
    kernel: Kernel = namespace["step"]
    return kernel


#: The exception class compiled kernels raise for a non-finite sample.
NON_FINITE: type[Exception] = _NonFinite


@lru_cache(maxsize=64)
def _compile(layout: StateLayout, source: str) -> Any:
    """Compile ``native`` from ``source`` once per distinct source text.

    The source depends on the configuration only through its structure, so
    the cache key is the structure in effect.
    """
    numba = _numba()
    if numba is None:
        raise ImportError("the compiled RLS back end needs numba: pip install 'arxwatch[fast]'")
    namespace: dict[str, Any] = {
        "_sqrt": math.sqrt,
        "_isfinite": math.isfinite,
        "_inf": math.inf,
        "_NonFinite": _NonFinite,
    }
    exec(compile(source, f"<arxwatch native rls kernel n={layout.n_params}>", "exec"), namespace)
    f8 = numba.float64
    result = numba.types.Tuple((f8, f8, f8, f8, numba.boolean, f8))
    arguments = (
        f8[::1],  # s: the state, updated in place
        f8[::1],  # c: the settings
        *[f8] * layout.n_params,  # phi
        f8,  # y
        *[f8] * layout.n_inputs,  # inputs
    )
    # An explicit signature compiles now, and only this one: an int or a
    # float32 argument is converted to float64 rather than compiling another
    # version. No fastmath, Python's division semantics: see the module notes.
    return numba.njit(result(*arguments), fastmath=False, error_model="python", cache=False)(
        namespace["native"]
    )

"""Simulated HVAC loops with scheduled faults, for the demo and the tests.

A loop is a first- or second-order lag with dead time from one actuator
signal (valve or damper %, fan speed %) to one measured output, sampled with
a zero-order hold:

    x1(k) = a1 x1(k-1) + (1 - a1) (offset + K * u_eff(k - d))
    x2(k) = a2 x2(k-1) + (1 - a2) x1(k)        (second order only)
    y(k)  = x_last(k) + bias(k) + noise(k)

with ``a = exp(-Ts / tau)``. Faults act on the physics (gain, time
constant, actuator, offset, transport delay ``d``) or on the sensor (bias,
noise), each from its own start time, abruptly or over a ramp. Everything
here is invented test and demo data, not a model of any real plant.

:meth:`Loop.simulate` and :func:`daily_operation` work on whole arrays.
:class:`LoopRun` and :class:`OperationRun` are the same loop and the same
daily actuator profile stepped one sample at a time, for a simulation that
runs along a clock (the demo's building publishing over MQTT): same
recursion, same faults, and without noise the same numbers.

References
----------
K. J. Åström and B. Wittenmark, *Computer-Controlled Systems*, 3rd ed.,
Prentice Hall, 1997, section 2.3 (zero-order-hold sampling of a first-order
system: a = exp(-h / T)).
"""

from __future__ import annotations

import math
from collections import deque
from dataclasses import dataclass
from typing import Literal, TypeVar

import numpy as np
from numpy.typing import NDArray
from scipy.signal import lfilter

FaultKind = Literal[
    "gain_loss",  # actuator delivers less effect (fouled coil, weak pump), fraction lost
    "stuck_actuator",  # actuator stays where it was at the start, whatever the command
    "offset",  # steady extra load or leak, in output units
    "sensor_bias",  # measured value drifts from the true one, in output units
    "noise_increase",  # sensor noise multiplied by (1 + magnitude)
    "slow_response",  # time constant multiplied by (1 + magnitude)
    "longer_delay",  # transport delay longer by magnitude seconds (whole samples)
]
FAULT_KINDS: tuple[FaultKind, ...] = (
    "gain_loss",
    "stuck_actuator",
    "offset",
    "sensor_bias",
    "noise_increase",
    "slow_response",
    "longer_delay",
)


@dataclass(frozen=True)
class Fault:
    """A fault from ``start_s``, reaching ``magnitude`` after ``ramp_s``.

    Parameters
    ----------
    kind : str
        One of :data:`FAULT_KINDS`.
    start_s : float
        Seconds from the start of the simulation.
    magnitude : float
        Size at full development; its unit depends on the kind (see
        :data:`FaultKind`). Ignored for ``stuck_actuator``.
    ramp_s : float
        0 for an abrupt fault; otherwise the time to full size.

    Raises
    ------
    ValueError
        If the kind is unknown or a number is out of range.
    """

    kind: FaultKind
    start_s: float
    magnitude: float = 0.0
    ramp_s: float = 0.0

    def __post_init__(self) -> None:
        if self.kind not in FAULT_KINDS:
            raise ValueError(f"fault kind must be one of {FAULT_KINDS}, got {self.kind!r}")
        for name in ("start_s", "magnitude", "ramp_s"):
            value = getattr(self, name)
            if not isinstance(value, (int, float)) or not math.isfinite(value):
                raise ValueError(f"fault {name} must be a finite number, got {value!r}")
        if self.start_s < 0 or self.ramp_s < 0:
            raise ValueError("fault start_s and ramp_s must be >= 0")
        if self.kind == "gain_loss" and not 0.0 <= self.magnitude <= 1.0:
            raise ValueError(f"gain_loss magnitude is a fraction in [0, 1], got {self.magnitude}")
        if self.kind == "longer_delay" and self.magnitude < 0.0:
            raise ValueError(f"longer_delay magnitude is seconds >= 0, got {self.magnitude}")

    def profile(self, t_s: NDArray[np.float64]) -> NDArray[np.float64]:
        """Development of the fault over time: 0 before, 1 when fully developed."""
        if self.ramp_s == 0.0:
            return (t_s >= self.start_s).astype(np.float64)
        return np.clip((t_s - self.start_s) / self.ramp_s, 0.0, 1.0)

    def level(self, t_s: float) -> float:
        """:meth:`profile` at one time: 0 before, 1 when fully developed."""
        if self.ramp_s == 0.0:
            return 1.0 if t_s >= self.start_s else 0.0
        return min(max((t_s - self.start_s) / self.ramp_s, 0.0), 1.0)

    def extra_delay(self, level: float, sample_period_s: float) -> int:
        """Whole samples a ``longer_delay`` fault adds at ``level`` (0..1)."""
        return round(self.magnitude * level / sample_period_s)


_Plant = TypeVar("_Plant", float, NDArray[np.float64])


def _effect(
    fault: Fault, level: _Plant, plant: tuple[_Plant, _Plant, _Plant, _Plant, _Plant]
) -> tuple[_Plant, _Plant, _Plant, _Plant, _Plant]:
    """Apply a fault other than a stuck actuator at ``level`` (0..1, one time or many).

    ``plant`` is (gain, time constant, load, sensor bias, noise std); the same
    operations serve :meth:`Loop.simulate` (arrays) and :class:`LoopRun` (floats).
    """
    gain, tau, load, bias, noise = plant
    m = fault.magnitude
    if fault.kind == "gain_loss":
        gain = gain * (1.0 - m * level)
    elif fault.kind == "slow_response":
        tau = tau * (1.0 + m * level)
    elif fault.kind == "offset":
        load = load + m * level
    elif fault.kind == "sensor_bias":
        bias = bias + m * level
    elif fault.kind == "noise_increase":
        noise = noise * (1.0 + m * level)
    else:
        raise ValueError(f"{fault.kind!r} is not a change of the plant's parameters")
    return gain, tau, load, bias, noise


@dataclass(frozen=True)
class Loop:
    """One simulated control loop (actuator -> measured output).

    Parameters
    ----------
    gain : float
        Static gain, output units per actuator unit.
    time_constant_s : float
        Dominant time constant.
    dead_time_s : float
        Transport delay, a whole number of sample periods.
    sample_period_s : float
        Sampling period Ts.
    offset : float
        Output at zero actuator signal (e.g. mixed-air temperature).
    noise_std : float
        Standard deviation of the white sensor noise.
    second_time_constant_s : float
        Second lag in series for a second-order loop; 0 for first order.
    """

    gain: float
    time_constant_s: float
    dead_time_s: float
    sample_period_s: float
    offset: float = 0.0
    noise_std: float = 0.02
    second_time_constant_s: float = 0.0

    def __post_init__(self) -> None:
        if self.sample_period_s <= 0 or self.time_constant_s <= 0:
            raise ValueError("sample_period_s and time_constant_s must be > 0")
        delay = self.dead_time_s / self.sample_period_s
        if self.dead_time_s < 0 or abs(delay - round(delay)) > 1e-9:
            raise ValueError(
                f"dead_time_s must be a non-negative multiple of sample_period_s, "
                f"got {self.dead_time_s} at Ts = {self.sample_period_s}"
            )

    @property
    def delay_samples(self) -> int:
        """Dead time in samples."""
        return round(self.dead_time_s / self.sample_period_s)

    def simulate(
        self, u: NDArray[np.float64], faults: tuple[Fault, ...] = (), seed: int = 0
    ) -> NDArray[np.float64]:
        """Measured output for the actuator command ``u``, shape (N,).

        The commanded ``u`` is what a controller publishes; a stuck
        actuator makes the plant see its frozen position instead.
        """
        u = np.asarray(u, dtype=np.float64)
        n = u.shape[0]
        ts = self.sample_period_s
        t = np.arange(n, dtype=np.float64) * ts
        gain = np.full(n, self.gain)
        tau = np.full(n, self.time_constant_s)
        load = np.full(n, self.offset)
        bias = np.zeros(n)
        noise = np.full(n, self.noise_std)
        u_eff = u.copy()
        delay = np.full(n, self.delay_samples)
        for fault in faults:
            if fault.kind == "stuck_actuator":
                start = min(int(math.ceil(fault.start_s / ts)), n - 1)
                u_eff[start:] = u[start]
            elif fault.kind == "longer_delay":
                delay = delay + np.array([fault.extra_delay(v, ts) for v in fault.profile(t)])
            else:
                gain, tau, load, bias, noise = _effect(
                    fault, fault.profile(t), (gain, tau, load, bias, noise)
                )
        a1 = np.exp(-ts / tau)
        a2 = math.exp(-ts / self.second_time_constant_s) if self.second_time_constant_s else 0.0
        x1 = x2 = load[0] + gain[0] * u_eff[0]
        y = np.empty(n)
        for k in range(n):
            drive = load[k] + gain[k] * u_eff[max(k - int(delay[k]), 0)]
            x1 = a1[k] * x1 + (1.0 - a1[k]) * drive
            x2 = a2 * x2 + (1.0 - a2) * x1 if self.second_time_constant_s else x1
            y[k] = x2
        rng = np.random.default_rng(seed)
        out: NDArray[np.float64] = y + bias + noise * rng.normal(size=n)
        return out


class LoopRun:
    """One :class:`Loop` stepped a sample at a time, with its faults and sensor noise.

    The recursion, the fault effects and the start from steady state are
    those of :meth:`Loop.simulate`: without noise, stepping ``u[k]`` at
    ``t = k * Ts`` gives the same outputs. Noise comes from the run's own
    generator, one draw per step, so a run is repeatable from its seed.

    Parameters
    ----------
    loop : Loop
        The plant.
    faults : tuple of Fault
        Faults; their ``start_s`` is on the time axis passed to :meth:`step`.
    seed : int
        Seed of the sensor noise.

    Examples
    --------
    >>> run = LoopRun(Loop(gain=-0.1, time_constant_s=300.0, dead_time_s=60.0,
    ...                    sample_period_s=60.0, offset=24.0, noise_std=0.0))
    >>> [round(run.step(k * 60.0, 50.0), 3) for k in range(3)]
    [19.0, 19.0, 19.0]
    """

    def __init__(self, loop: Loop, faults: tuple[Fault, ...] = (), seed: int = 0) -> None:
        self.loop = loop
        self.faults = faults
        self._rng = np.random.default_rng(seed)
        self._a2 = (
            math.exp(-loop.sample_period_s / loop.second_time_constant_s)
            if loop.second_time_constant_s
            else 0.0
        )
        longest = loop.delay_samples + sum(
            f.extra_delay(1.0, loop.sample_period_s) for f in faults if f.kind == "longer_delay"
        )
        self._past: deque[float] = deque(maxlen=longest + 1)
        self._x1 = self._x2 = math.nan
        self._stuck: float | None = None

    def step(self, t_s: float, u: float) -> float:
        """Advance one sample period with actuator command ``u`` at time ``t_s``; return y."""
        loop = self.loop
        gain, tau, load = loop.gain, loop.time_constant_s, loop.offset
        bias, noise = 0.0, loop.noise_std
        stuck, delay = False, loop.delay_samples
        for fault in self.faults:
            if fault.kind == "stuck_actuator":  # frozen where it was commanded when it stuck
                stuck = stuck or t_s >= fault.start_s
            elif fault.kind == "longer_delay":
                delay += fault.extra_delay(fault.level(t_s), loop.sample_period_s)
            else:
                gain, tau, load, bias, noise = _effect(
                    fault, fault.level(t_s), (gain, tau, load, bias, noise)
                )
        if stuck and self._stuck is None:
            self._stuck = u
        u_eff = self._stuck if stuck and self._stuck is not None else u
        if not self._past:  # start from steady state, as Loop.simulate does
            self._past.extend([u_eff] * (self._past.maxlen or 1))
            self._x1 = self._x2 = load + gain * u_eff
        else:
            self._past.append(u_eff)
        a1 = math.exp(-loop.sample_period_s / tau)
        drive = load + gain * self._past[-1 - delay]
        self._x1 = a1 * self._x1 + (1.0 - a1) * drive
        if loop.second_time_constant_s:
            self._x2 = self._a2 * self._x2 + (1.0 - self._a2) * self._x1
        else:
            self._x2 = self._x1
        return self._x2 + bias + noise * float(self._rng.normal())


@dataclass(frozen=True)
class DailyLoad:
    """An actuator's daily pattern: a sine over the day plus controller moves.

    The command is ``mean + swing * sin(2 pi (hour - peak_hour + 6) / 24)``
    plus a stationary AR(1) wander ``w(k) = memory * w(k-1) + N(0, step_std)``,
    clipped to 0..100 %. The defaults are :func:`daily_operation`'s (peak
    mid-afternoon, wander about 6 %).

    Parameters
    ----------
    mean, swing : float
        Daily mean and amplitude, %.
    peak_hour : float
        Hour of the day (UTC) of the highest command.
    step_std : float
        Standard deviation of the wander's steps, %.
    memory : float
        AR(1) coefficient of the wander, in [0, 1).
    """

    mean: float = 45.0
    swing: float = 25.0
    peak_hour: float = 15.0
    step_std: float = 1.5
    memory: float = 0.97

    def __post_init__(self) -> None:
        if not 0.0 <= self.memory < 1.0:
            raise ValueError(f"memory must be in [0, 1), got {self.memory}")
        if self.step_std < 0.0:
            raise ValueError(f"step_std must be >= 0, got {self.step_std}")


class OperationRun:
    """A :class:`DailyLoad` stepped a sample at a time, along absolute time.

    Parameters
    ----------
    load : DailyLoad
        The pattern.
    seed : int
        Seed of the controller moves.
    """

    def __init__(self, load: DailyLoad, seed: int) -> None:
        self.load = load
        self._rng = np.random.default_rng(seed)
        self._wander = 0.0

    def step(self, t_s: float) -> float:
        """Return the actuator command (%) at ``t_s`` (epoch seconds: the hour matters)."""
        load = self.load
        hour = (t_s % 86400.0) / 3600.0
        self._wander = float(self._rng.normal(scale=load.step_std)) + load.memory * self._wander
        level = load.mean + load.swing * math.sin(
            2.0 * math.pi * (hour - load.peak_hour + 6.0) / 24.0
        )
        return min(max(level + self._wander, 0.0), 100.0)


def bump_tests(
    n: int, seed: int, low: float = 10.0, high: float = 90.0, hold: tuple[int, int] = (20, 41)
) -> NDArray[np.float64]:
    """Actuator held at random positions for a random number of samples each."""
    rng = np.random.default_rng(seed)
    u = np.empty(n)
    k = 0
    while k < n:
        span = int(rng.integers(*hold))
        u[k : k + span] = rng.uniform(low, high)
        k += span
    return u


def daily_operation(n: int, sample_period_s: float, seed: int) -> NDArray[np.float64]:
    """Actuator following a daily load (peak mid-afternoon) with controller moves."""
    rng = np.random.default_rng(seed)
    t_h = np.arange(n) * sample_period_s / 3600.0
    load = 45.0 + 25.0 * np.sin(2 * np.pi * (t_h - 9.0) / 24.0)
    # Controller moves: a stationary AR(1) wander around the load (std ~6 %).
    moves = lfilter([1.0], [1.0, -0.97], rng.normal(scale=1.5, size=n))
    u: NDArray[np.float64] = np.clip(load + moves, 0.0, 100.0)
    return u


#: Invented reference loops, cooling valve % -> supply-air temperature degC at
#: 60 s, shared by the detection tests and the monitor benchmark so that
#: their figures describe the same plants.
REFERENCE_LOOPS: dict[str, Loop] = {
    "first-order+dead-time": Loop(
        gain=-0.11,
        time_constant_s=600.0,
        dead_time_s=120.0,
        sample_period_s=60.0,
        offset=24.0,
        noise_std=0.03,
    ),
    "second-order": Loop(
        gain=-0.11,
        time_constant_s=600.0,
        dead_time_s=60.0,
        sample_period_s=60.0,
        offset=24.0,
        noise_std=0.03,
        second_time_constant_s=180.0,
    ),
}

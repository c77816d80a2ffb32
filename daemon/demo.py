"""Built-in demonstration: one simulated air handler at an invented site.

Site "Larkspur Yard, Block C" is fictional. Its air handler AHU-C2 cools the
supply air with a chilled-water coil; the simulated loop is a first-order lag
with dead time from valve position (%) to supply-air temperature (degC),
sampled every 30 s. The demo

1. records an 8-hour commissioning window of valve bump tests,
2. picks the ARX order by BIC and fits the baseline by least squares,
3. runs the live recursive estimator over four days of ordinary operation
   with a spike from a glitching sensor and, from day three, a fouling coil
   whose gain falls to 60 % of the commissioned value,
4. prints the live physical read-out against the baseline.

Everything here is invented demo data; it is not a model of a real plant.
"""

from __future__ import annotations

import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from numpy.typing import NDArray

from arxwatch.estimators.estimator import ArxEstimator
from arxwatch.estimators.identify import fit_arx
from arxwatch.estimators.order import select_order
from arxwatch.estimators.readout import read_out
from arxwatch.estimators.rls import RlsConfig

SAMPLE_PERIOD_S = 30.0
CAUTION = (
    "Advisory maintenance information only. arxwatch is not a life-safety system; "
    "verify on site and follow local codes, the manufacturer's instructions and "
    "licensed practice before any work on equipment."
)


@dataclass(frozen=True)
class CoilLoop:
    """Valve-to-supply-air-temperature loop of the fictional AHU-C2."""

    gain_c_per_pct: float = -0.11  # 100 % valve cools 24 degC air by 11 K
    time_constant_s: float = 300.0
    delay_samples: int = 2  # transport plus hold: 60 s at 30 s sampling
    mixed_air_c: float = 24.0
    noise_c: float = 0.03

    def simulate(
        self, valve_pct: NDArray[np.float64], gain_scale: NDArray[np.float64], seed: int
    ) -> NDArray[np.float64]:
        """Supply-air temperature for a valve trajectory (ZOH-sampled lag)."""
        rng = np.random.default_rng(seed)
        a = math.exp(-SAMPLE_PERIOD_S / self.time_constant_s)
        y = np.empty_like(valve_pct)
        y[: self.delay_samples] = self.mixed_air_c
        for k in range(self.delay_samples, len(valve_pct)):
            u = valve_pct[k - self.delay_samples]
            steady = self.mixed_air_c + self.gain_c_per_pct * gain_scale[k] * u
            y[k] = a * y[k - 1] + (1.0 - a) * steady
        return y + self.noise_c * rng.normal(size=len(y))


def bump_tests(hours: float, seed: int) -> NDArray[np.float64]:
    """Valve held at random positions for 10 to 20 minutes each."""
    rng = np.random.default_rng(seed)
    n = int(hours * 3600 / SAMPLE_PERIOD_S)
    valve = np.empty(n)
    k = 0
    while k < n:
        hold = int(rng.integers(20, 41))
        valve[k : k + hold] = rng.uniform(10.0, 90.0)
        k += hold
    return valve


def daily_operation(days: float, seed: int) -> NDArray[np.float64]:
    """Valve following a daily cooling load with controller activity."""
    rng = np.random.default_rng(seed)
    n = int(days * 86400 / SAMPLE_PERIOD_S)
    t_h = np.arange(n) * SAMPLE_PERIOD_S / 3600.0
    load = 45.0 + 25.0 * np.sin(2 * np.pi * (t_h - 9.0) / 24.0)
    moves = np.cumsum(rng.normal(scale=1.5, size=n))
    moves -= np.convolve(moves, np.ones(61) / 61, mode="same")  # keep it near the load
    valve: NDArray[np.float64] = np.clip(load + moves, 0.0, 100.0)
    return valve


def run_demo(write: Callable[[str], None], days: float = 4.0, seed: int = 7) -> int:
    """Run the demonstration, writing lines through ``write``; returns 0."""
    loop = CoilLoop()
    write("arxwatch demo - Larkspur Yard, Block C, AHU-C2 (fictional site, simulated data)")
    write("loop: chilled-water valve [%] -> supply-air temperature [degC], sampled every 30 s")
    write("")

    # 1-2. Commissioning window and baseline.
    valve0 = bump_tests(8.0, seed)
    temp0 = loop.simulate(valve0, np.ones_like(valve0), seed + 1)
    search = select_order(temp0, valve0[:, None], range(1, 3), range(1, 3), range(1, 5))
    order = search.best.order
    baseline = fit_arx(order, temp0, valve0[:, None])
    base = read_out(order, baseline.fit.theta, SAMPLE_PERIOD_S)
    write("baseline from an 8 h commissioning window of valve bump tests")
    write(f"  order chosen by BIC : na={order.na} nb={order.nb[0]} nk={order.nk[0]}"
          f" ({len(search.candidates)} candidates)")
    write(f"  fit on held-back data: {baseline.fit_percent_validation:.1f} %")
    write(f"  static gain          : {base.gains[0]:+.4f} degC per % valve")
    write(f"  time constant        : {base.time_constant_s:.0f} s")
    write(f"  dead time            : {base.dead_times_s[0]:.0f} s")
    write(f"  innovation sigma     : {math.sqrt(baseline.fit.sigma2):.3f} degC")
    write("")

    # 3. Live operation with a sensor glitch and a fouling coil.
    valve = daily_operation(days, seed + 2)
    n = len(valve)
    per_hour = int(3600 / SAMPLE_PERIOD_S)
    scale = np.ones(n)
    start, ramp = 2 * 24 * per_hour, 12 * per_hour
    scale[start : start + ramp] = np.linspace(1.0, 0.6, ramp)
    scale[start + ramp :] = 0.6
    temp = loop.simulate(valve, scale, seed + 3)
    temp[30 * per_hour] += 8.0  # one glitching sample from the sensor

    estimator = ArxEstimator(order, RlsConfig(forgetting=0.998))
    write("live estimate (forgetting 0.998, memory about 4 h) against the baseline")
    write("   time        gain [degC/%]  |gain| change  tau [s]  change   coil (simulated truth)")
    for k in range(n):
        estimator.update(float(temp[k]), [float(valve[k])])
        if k % (6 * per_hour) == 0 and k >= 6 * per_hour:
            live = read_out(order, estimator.theta, SAMPLE_PERIOD_S)
            # Change of the gain's magnitude: a fouled coil cools less per % valve.
            dg = 100.0 * (abs(live.gains[0]) - abs(base.gains[0])) / abs(base.gains[0])
            dt = 100.0 * (live.time_constant_s - base.time_constant_s) / base.time_constant_s
            day, hour = divmod(k // per_hour, 24)
            write(f"  day {day + 1} {hour:02d}:00   {live.gains[0]:+.4f}        {dg:+6.1f} %"
                  f"   {live.time_constant_s:7.0f}  {dt:+6.1f} %"
                  f"   {100 * scale[k]:.0f} % of commissioned")
    write("")
    write("The fouling coil shows as a falling static gain while the time constant holds.")
    write("Change detectors and alerts come with the drift monitor.")
    write(CAUTION)
    return 0

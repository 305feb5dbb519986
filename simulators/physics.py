"""The bench as physics: motors excite the modal frame, the gyro measures it (vectorised per block).

:class:`BenchPhysics` advances in blocks of output samples at constant commanded throttle and
returns gyro counts and the motors' mechanical RPM at each output sample. It runs internally at
``decimation`` x the gyro output data rate, at least 32 kHz. Deterministic for a given seed.
"""

from __future__ import annotations

import math

import numpy as np
from scipy import signal

from .airframe import ModalFrame
from .gyro import GyroSensor
from .motors import MotorBank
from .scenario import Scenario

MIN_INTERNAL_HZ = 32_000.0


class BenchPhysics:
    def __init__(self, scenario: Scenario, seed: int = 0, min_internal_hz: float = MIN_INTERNAL_HZ):
        self.scenario = scenario
        self.rng = np.random.default_rng(seed)
        odr = scenario.gyro.rate_hz
        self.decimation = max(1, math.ceil(min_internal_hz / odr))
        self.fs_internal = odr * self.decimation
        self.dt = 1.0 / self.fs_internal
        self.frame = ModalFrame(scenario.modes, self.fs_internal)
        self.motors = MotorBank(scenario.motors, scenario.props, self.rng)
        self.gyro = GyroSensor(scenario.gyro, self.fs_internal, self.decimation, self.rng)
        r = scenario.rigid
        self.rigid_ba = signal.butter(2, r.bandwidth_hz, fs=odr)
        self.rigid_zi = np.zeros((2, 3))
        imp = np.zeros(int(odr * 5))
        imp[0] = 1.0
        gain = float(np.sqrt(np.sum(signal.lfilter(*self.rigid_ba, imp) ** 2)))  # rms of filtered unit noise
        self.rigid_gain = r.amplitude_dps / max(1e-12, gain)
        self.samples_done = 0  # output samples since start
        self._taps: list[tuple[int, int, float]] = []  # (internal sample index, target, strength 1e-4 N s)

    @property
    def time_s(self) -> float:
        return self.samples_done / self.scenario.gyro.rate_hz

    def tap(self, target: int = 0, strength: float = 200.0, at_s: float | None = None) -> None:
        """Strike the frame: ``target`` 0 the stack, k the arm tip of motor k; impulse in 1e-4 N s."""
        t = self.time_s if at_s is None else at_s
        self._taps.append((int(round(t * self.fs_internal)), int(target), float(strength)))

    def _tap_forces(self, start: int, n: int) -> np.ndarray | None:
        # a tap asked for "now" may fall just before this block's first internal sample (the gyro's
        # output count and the internal clock differ by the decimation): it strikes at the block start
        hits = [(max(tp[0], start), tp[1], tp[2]) for tp in self._taps if tp[0] < start + n]
        if not hits:
            return None
        self._taps = [tp for tp in self._taps if tp[0] >= start + n]
        f = self.frame
        extra = np.zeros((len(f.modes), n))
        for idx, target, strength in hits:
            impulse = strength * 1e-4  # N s
            gains = f.stack if target == 0 else f.coupling[:, min(target, f.coupling.shape[1]) - 1]
            extra[:, idx - start] += gains * impulse / self.dt  # one hold interval carries the impulse
        return extra

    def step(self, n_out: int, throttle: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """Advance ``n_out`` gyro samples at ``throttle`` 0..1: (n_motors,) for the whole block, or
        (n_motors, n_segments) for equal segments of it.

        Returns (counts int16 (n_out, 3), mechanical RPM (n_motors, n_out)).
        """
        k = self.decimation
        n_in = n_out * k
        start = self.samples_done * k
        force, rpm = self.motors.step(throttle, n_in, self.dt)
        rates = self.frame.step(force, self._tap_forces(start, n_in))
        white = self.rng.standard_normal((n_out, 3))
        slow, self.rigid_zi = signal.lfilter(*self.rigid_ba, white, axis=0, zi=self.rigid_zi)
        level = 0.3 + float(np.mean(throttle))  # the restrained frame wobbles more at throttle
        counts = self.gyro.sample(rates, slow * (self.rigid_gain * level))
        self.samples_done += n_out
        return counts, rpm[:, k - 1 :: k]

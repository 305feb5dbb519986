"""Motors and props as exciters: speed from throttle with a lag, jitter, and the forces they make.

Per motor, at mechanical rotation frequency f = RPM / 60 and phase phi (integrated from f):

- order 1 (imbalance): F = U w^2 with U the residual imbalance in kg m (g mm x 1e-6), w = 2 pi f
  (the centrifugal force of a point imbalance; ISO 21940-11 defines U);
- order 2 (misalignment): ``misalignment`` x the order-1 amplitude;
- blade-pass (``blades`` x f) and its second harmonic, growing with thrust, i.e. with RPM^2, only
  with props on (general vibration-analysis practice: blade-pass = blades x RPM / 60);
- broadband force, Gaussian, in proportion to throttle.

Every order of a motor shares the motor's phase, so the orders are coherent, as in a real rotor.
"""

from __future__ import annotations

import numpy as np

from .scenario import MotorSpec


class MotorBank:
    def __init__(self, spec: MotorSpec, props: bool, rng: np.random.Generator):
        self.spec = spec
        self.props = props
        self.rng = rng
        n = spec.count
        self.rpm = np.zeros(n)
        self.phase = rng.uniform(0, 2 * np.pi, n)
        self.order_phase = rng.uniform(0, 2 * np.pi, (n, 4))
        self.jitter = np.zeros(n)
        self.imbalance_kgm = np.array(spec.imbalance_gmm, dtype=float) * 1e-6
        self.throttle = np.zeros(n)

    def target_rpm(self, throttle: np.ndarray) -> np.ndarray:
        """Steady mechanical RPM at throttle 0..1 (0 means stopped)."""
        s = self.spec
        t = np.clip(throttle, 0.0, 1.0)
        return np.where(t > 0, s.rpm_min + (s.rpm_max - s.rpm_min) * t**s.curve_exponent, 0.0)

    def step(self, throttle: np.ndarray, n: int, dt: float) -> tuple[np.ndarray, np.ndarray]:
        """Advance ``n`` samples of ``dt`` s.

        ``throttle`` is the commanded throttle 0..1, either (n_motors,) for the whole block or
        (n_motors, n_segments) for equal segments of it (the device's control periods).
        Returns (force N (n_motors, n), rpm (n_motors, n)).
        """
        s = self.spec
        thr = np.asarray(throttle, dtype=float)
        if thr.ndim == 1:
            thr = thr[:, None]
        n_seg = thr.shape[1]
        seg = n // n_seg
        self.throttle = thr[:, -1].copy()
        target = self.target_rpm(thr)  # (n_motors, n_seg)
        # first-order lag, exact for a target held over each segment
        decay = self._decay(seg, dt)
        starts = np.empty_like(target)
        r = self.rpm
        for j in range(n_seg):
            starts[:, j] = r
            r = target[:, j] + (r - target[:, j]) * decay[-1]
        tgt = np.repeat(target, seg, axis=1)
        rpm = tgt + (np.repeat(starts, seg, axis=1) - tgt) * np.tile(decay, n_seg)[None, :]
        self.rpm = r
        # slow multiplicative jitter: an AR(1) walk updated once per block, ramped across it
        old = self.jitter.copy()
        c = np.exp(-n * dt / 0.05)
        self.jitter = c * self.jitter + np.sqrt(1 - c * c) * s.jitter * self.rng.standard_normal(s.count)
        ramp = np.linspace(0.0, 1.0, n, endpoint=False)[None, :]
        rpm = np.maximum(rpm * (1.0 + old[:, None] + (self.jitter - old)[:, None] * ramp), 0.0)
        phase = self.phase[:, None] + np.cumsum(rpm, axis=1) * (2 * np.pi * dt / 60.0)
        self.phase = np.mod(phase[:, -1], 2 * np.pi)
        # phases stay below a few hundred radians within a block: float32 cosines are exact to ~1e-5
        ph = (phase - self.phase_wrap_base(phase)).astype(np.float32)
        w2 = (rpm * (2 * np.pi / 60.0)) ** 2
        a1 = self.imbalance_kgm[:, None] * w2
        op = self.order_phase.astype(np.float32)
        force = a1 * (np.cos(ph + op[:, 0:1]) + s.misalignment * np.cos(2 * ph + op[:, 1:2]))
        if self.props:
            abp = s.blade_pass_n * (rpm / s.rpm_max) ** 2
            bp = s.blades * ph
            force += abp * (np.cos(bp + op[:, 2:3]) + 0.4 * np.cos(2 * bp + op[:, 3:4]))
        if s.noise_n > 0 and np.any(self.throttle > 0):
            # broadband force drawn at 1/4 of the internal rate and held: white far past the modes
            hold = 4 if n % 4 == 0 else 1
            noise = self.rng.standard_normal((s.count, n // hold))
            force += np.repeat(np.repeat(s.noise_n * thr, seg // hold, axis=1) * noise, hold, axis=1)
        return force, rpm

    @staticmethod
    def phase_wrap_base(phase: np.ndarray) -> np.ndarray:
        """Whole turns to subtract from each motor's block of phases (keeps float32 accurate)."""
        return (2 * np.pi) * np.floor(phase[:, :1] / (2 * np.pi))

    def _decay(self, seg: int, dt: float) -> np.ndarray:
        key = (seg, dt)
        if getattr(self, "_decay_key", None) != key:
            self._decay_key = key
            self._decay_arr = np.exp(-np.arange(1, seg + 1) * dt / self.spec.lag_s)
        return self._decay_arr

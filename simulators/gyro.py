"""The gyro as a sensor: anti-alias low-pass, decimation to the output data rate, white noise,
quantisation at the declared sensitivity and clipping at full scale.

White noise of density N (deg/s/sqrt(Hz), one-sided) sampled at fs has standard deviation
N sqrt(fs / 2) (its one-sided PSD level 2 s^2 / fs equals N^2). Default values, common practice
for MEMS rate gyros (recalled, not from a source): 0.005 deg/s/sqrt(Hz); a 16-bit output over
+-2000 deg/s, 2^15 / 2000 = 16.384 counts per deg/s, commonly rounded to 16.4.
"""

from __future__ import annotations

import numpy as np
from scipy import signal

from .scenario import GyroSpec


class GyroSensor:
    def __init__(self, spec: GyroSpec, fs_internal: float, decimation: int, rng: np.random.Generator):
        self.spec = spec
        self.decimation = decimation
        self.rng = rng
        # one biquad (2nd-order Butterworth): lfilter carries less call overhead than sosfilt
        self.b, self.a = signal.butter(2, spec.antialias_hz, fs=fs_internal)
        self.zi = np.zeros((2, 3))
        self.sigma = spec.noise_density_dps * np.sqrt(spec.rate_hz / 2.0)
        cpd = spec.sens_num / spec.sens_den
        self.counts_per_dps = cpd
        self.clip = min(32767, int(np.floor(spec.full_scale_dps * cpd)))

    def sample(self, rate_internal: np.ndarray, slow: np.ndarray | None = None) -> np.ndarray:
        """Counts (n_out, 3) int16 from body rates at the internal rate (n_in, 3), deg/s.

        ``slow`` (n_out, 3) deg/s is added at the output rate (rigid-body motion below 20 Hz).
        """
        y, self.zi = signal.lfilter(self.b, self.a, rate_internal, axis=0, zi=self.zi)
        k = self.decimation
        kept = y[k - 1 :: k]
        if slow is not None:
            kept = kept + slow
        kept = kept + self.sigma * self.rng.standard_normal(kept.shape)
        counts = np.rint(kept * self.counts_per_dps)
        return np.clip(counts, -self.clip - (1 if self.clip == 32767 else 0), self.clip).astype(np.int16)

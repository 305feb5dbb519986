"""Motor speed from the spectrum, for devices that send no motor telemetry.

A harmonic-sum search (Noll, "Pitch determination of human speech by the harmonic product
spectrum, the harmonic sum spectrum, and a maximum likelihood estimate", 1969; Schroeder, JASA
43(4), 1968): for each candidate shaft frequency f0 the score is the sum of the whitened log
spectrum at the motor orders (1, 2, blades, 2 x blades) x f0; the best f0 is refined from the
strongest order's interpolated peak. The result is flagged as an estimate everywhere it is shown.
"""

from __future__ import annotations

import numpy as np
from scipy import ndimage

from .orders import order_multipliers
from .peaks import interpolate_bin

ORDER_EVIDENCE_DB = 6.0  #: a motor shows at two of its orders at least, each this far over the floor


class RpmEstimator:
    def __init__(self, freqs: np.ndarray, blades: int, rpm_min: float = 1500.0, rpm_max: float = 45000.0,
                 window: str = "hann"):
        self.freqs = freqs
        self.bin_hz = float(freqs[1] - freqs[0])
        self.mult = order_multipliers(blades)
        nyq = float(freqs[-1])
        # a candidate needs its 1x and 2x below Nyquist; its higher orders may lie above (they
        # score nothing there): limiting candidates by the highest order would cut off the true
        # speed of a many-bladed prop at a low gyro rate and leave only its subharmonics
        f_hi = min(rpm_max / 60.0, nyq / 2.0)
        step = self.bin_hz / 4
        self.f0 = np.arange(rpm_min / 60.0, max(f_hi, rpm_min / 60.0 + step), step)
        self.window = window
        self.weights = np.array([1.0, 1.0, 0.8, 0.6])

    def estimate(self, psd_sum: np.ndarray) -> float:
        """Mechanical RPM estimated from one spectrum summed over axes (bins,); NaN if nothing stands out."""
        db = 10 * np.log10(np.maximum(psd_sum, 1e-30))
        white = db - ndimage.median_filter(db, size=31, mode="nearest")
        white = np.maximum(white, 0.0)
        # best bin within +-1 of each harmonic of each candidate
        pos = self.f0[:, None] * self.mult[None, :] / self.bin_hz  # (C, K)
        k = np.rint(pos).astype(np.int64)
        n = white.shape[0]
        best = np.maximum.reduce([white[np.clip(k + o, 0, n - 1)] for o in (-1, 0, 1)])
        best = np.where(k < n - 1, best, 0.0)
        score = best @ self.weights
        i = int(np.argmax(score))
        if score[i] < 12.0:  # less than about 12 dB of harmonic evidence: no estimate
            return float("nan")
        if np.count_nonzero(best[i] >= ORDER_EVIDENCE_DB) < 2:
            return float("nan")  # one line alone (or noise peaks) is not a motor's series of orders
        # refine on the strongest single order of the winner
        amps = np.sqrt(np.maximum(psd_sum, 0.0))
        h = int(np.argmax(best[i] * self.weights))
        kk = int(k[i, h])
        lo, hi = max(kk - 2, 1), min(kk + 3, n - 1)
        kk = lo + int(np.argmax(amps[lo:hi]))
        f_peak = (kk + float(interpolate_bin(amps, kk, self.window))) * self.bin_hz
        return 60.0 * f_peak / self.mult[h]

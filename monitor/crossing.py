"""The crossing watch: for every mode x motor x order, is a motor harmonic near a frame mode?

States (our own words): ``clear``, ``nearing``, ``crossing``.

- nearing: the order frequency is inside the mode's margin and closing in. The margin is the
  wider of 10 % of the mode frequency and three half-bandwidths (3 zeta f_n).
- crossing: the order is inside the half-power band f_n (1 -+ zeta), or inside the margin while
  the level at the mode is at least 6 dB over its running floor.
- a rise (clear to nearing, or to crossing) must hold for two frames running, so a spin-up that
  flashes through a mode in one frame raises nothing;
- back to clear: the order leaves the band (or the margin) by a hysteresis factor and the level
  falls 2 dB below the crossing threshold, so a steady throttle at a boundary does not chatter.

Every transition is an event with the time, motor, order, mode, RPM, order frequency, the level
at the mode in dB (re 1 (deg/s)^2/Hz) and the predicted band 60 f (1 -+ zeta) / k in RPM.
Vectorised over all channels and, for everything that does not depend on the state, over all frames
of a batch; the state machine steps frame by frame only where some state can move.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .orders import order_label, order_multipliers
from .profile import Profile

CLEAR, NEARING, CROSSING = 0, 1, 2
STATE_NAMES = ("clear", "nearing", "crossing")

MARGIN_FRACTION = 0.10
MARGIN_HALF_BANDWIDTHS = 3.0
LEVEL_OVER_FLOOR_DB = 6.0
RELEASE_DB = 2.0
PERSIST_FRAMES = 2  #: a rise to nearing or crossing must be proposed in this many frames running
EXIT_MARGIN = 1.15  #: nearing -> clear when the distance exceeds this times the margin
EXIT_BAND = 1.5  #: crossing -> clear when the distance exceeds this times the half band
FLOOR_TAU_S = 3.0
LEVEL_TAU_S = 0.15  #: the level at a mode is smoothed: one frame's PSD bin has chi-squared (2 dof) scatter


@dataclass(frozen=True)
class CrossingEvent:
    t_s: float
    state: str
    mode: str
    mode_hz: float
    motor: int  #: 1-based
    order: float  #: multiple of the shaft frequency
    order_name: str
    rpm: float
    order_hz: float
    level_db: float
    floor_db: float
    band_rpm: tuple[float, float]

    def as_dict(self) -> dict:
        return {
            "kind": self.state,
            "t_s": round(self.t_s, 4),
            "mode": self.mode,
            "mode_hz": round(self.mode_hz, 2),
            "motor": self.motor,
            "order": self.order,
            "order_name": self.order_name,
            "rpm": round(self.rpm, 1),
            "order_hz": round(self.order_hz, 2),
            "level_db": round(self.level_db, 2),
            "floor_db": round(self.floor_db, 2),
            "band_rpm": [round(self.band_rpm[0], 1), round(self.band_rpm[1], 1)],
        }

    def text(self) -> str:
        return (
            f"{self.t_s:8.2f} s  {self.state.upper():8s} motor {self.motor} {self.order_name} at "
            f"{self.order_hz:6.1f} Hz ({self.rpm:6.0f} RPM) -> {self.mode} {self.mode_hz:.1f} Hz; "
            f"band {self.band_rpm[0]:.0f}-{self.band_rpm[1]:.0f} RPM; level {self.level_db:+.1f} dB "
            f"({self.level_db - self.floor_db:+.1f} over floor)"
        )


@dataclass
class Band:
    """An RPM range in which one order kept one mode in the crossing state."""

    mode: str
    mode_hz: float
    order: float
    order_name: str
    motor: int
    rpm_low: float
    rpm_high: float
    peak_db: float

    def as_dict(self) -> dict:
        return {
            "mode": self.mode,
            "mode_hz": round(self.mode_hz, 2),
            "order": self.order,
            "order_name": self.order_name,
            "motor": self.motor,
            "rpm_low": round(self.rpm_low, 1),
            "rpm_high": round(self.rpm_high, 1),
            "peak_db": round(self.peak_db, 2),
        }


def _transition_table() -> np.ndarray:
    """new state = table[state, condition bits]: bit 0 inside the margin and closing in, bit 1
    inside the band or hot (level over the floor inside the margin), bit 2 past the nearing exit,
    bit 3 past the crossing exit (far from the band and cooled, or out of the margin)."""
    t = np.zeros((3, 16), dtype=np.int8)
    for c in range(16):
        approach, hit, gone, left = c & 1, c & 2, c & 4, c & 8
        t[CLEAR, c] = CROSSING if hit else NEARING if approach else CLEAR
        t[NEARING, c] = CROSSING if hit else CLEAR if gone else NEARING
        t[CROSSING, c] = CLEAR if left else CROSSING
    return t


_TRANSITIONS = _transition_table()


class CrossingWatch:
    def __init__(self, profile: Profile, motors: int, freqs: np.ndarray, hop_s: float):
        self.profile = profile
        self.motors = motors
        modes = profile.modes
        self.mult = order_multipliers(profile.blades)
        self._mult60 = (self.mult / 60.0)[None, None, None, :]
        self.f_mode = np.array([m.freq_hz for m in modes])[:, None, None]  # (N, 1, 1)
        self.zeta = np.array([m.damping_ratio for m in modes])[:, None, None]
        self.half_band = self.f_mode * self.zeta
        self.margin = np.maximum(MARGIN_FRACTION * self.f_mode, MARGIN_HALF_BANDWIDTHS * self.half_band)
        self._exit_margin = EXIT_MARGIN * self.margin
        self._exit_band = EXIT_BAND * self.half_band
        shape = (len(modes), motors, len(self.mult))
        self.state = np.zeros(shape, dtype=np.int8)
        self._proposed = np.zeros(shape, dtype=np.int8)
        self._runs = np.zeros(shape, dtype=np.int16)
        self.floor_db = np.full(len(modes), np.nan)
        self.level_db = np.full(len(modes), np.nan)
        self.alpha = 1.0 - np.exp(-hop_s / FLOOR_TAU_S)
        self.level_alpha = 1.0 - np.exp(-hop_s / LEVEL_TAU_S)
        nb = freqs.shape[0]
        df = freqs[1] - freqs[0]
        band_idx, floor_w = [], np.zeros((nb, len(modes)))
        for j, m in enumerate(modes):
            lo, hi = m.band_hz
            bb = np.flatnonzero((freqs >= lo - df / 2) & (freqs <= hi + df / 2))
            if bb.size == 0:
                bb = np.array([int(np.argmin(np.abs(freqs - m.freq_hz)))])
            fb = np.flatnonzero((freqs >= 0.6 * m.freq_hz) & (freqs <= 1.4 * m.freq_hz) & ((freqs < lo) | (freqs > hi)))
            fb = fb if fb.size else bb
            band_idx.append(bb)
            floor_w[fb, j] = 1.0 / fb.size
        width = max(len(b) for b in band_idx) if band_idx else 1
        #: (modes, width) bin indices of each half-power band, padded by repeating its first bin
        padded = [np.pad(b, (0, width - len(b)), mode="edge") for b in band_idx]
        band = np.array(padded, dtype=np.int64).reshape(len(modes), -1)
        #: the bins any mode reads (bands and floors): only these are converted to dB
        self._cols = np.union1d(band.ravel(), np.flatnonzero(floor_w.any(axis=1))).astype(np.int64)
        #: (modes, width) positions of each band's bins within ``_cols``
        self._band_idx = np.searchsorted(self._cols, band)
        #: (cols, modes): the floor is the mean level in dB over 0.6..1.4 f_n outside the band
        self._floor_w = floor_w[self._cols]
        self._runs_any = False
        self._quiet = True  #: every channel clear with no rise pending (the common case: nothing to do)
        # open bands, per channel: RPM low/high and peak level while in the crossing state
        self._b_open = np.zeros(shape, dtype=bool)
        self._b_lo = np.full(shape, np.inf)
        self._b_hi = np.full(shape, -np.inf)
        self._b_peak = np.full(shape, -np.inf)
        self._any_open = False
        self._any_state = False  #: some channel is not clear
        self.bands: list[Band] = []

    def levels(self, psd_sum: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """(level, local floor) at each mode in dB for frames' PSD summed over axes (F, bins)."""
        db = 10 * np.log10(np.maximum(psd_sum[:, self._cols], 1e-30))
        level = db[:, self._band_idx].max(axis=2)
        return level, db @ self._floor_w

    def _smoothed(self, levels: np.ndarray, floors: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """The running level and floor (F, modes) after each frame (first-order smoothing, in dB)."""
        f = levels.shape[0]
        lv = np.empty_like(levels)
        fl = np.empty_like(floors)
        cur_l, cur_f = self.level_db, self.floor_db
        a, al = self.alpha, self.level_alpha
        for i in range(f):
            if np.isnan(cur_f[0]):
                cur_l, cur_f = levels[i].copy(), floors[i].copy()
            else:
                cur_f = cur_f + a * (floors[i] - cur_f)
                cur_l = cur_l + al * (levels[i] - cur_l)
            lv[i], fl[i] = cur_l, cur_f
        self.level_db, self.floor_db = cur_l, cur_f
        return lv, fl

    def update(self, t_s: np.ndarray, psd_sum: np.ndarray, rpm_latest: np.ndarray, rpm_mean: np.ndarray) -> list:
        """Advance over F frames. ``psd_sum`` (F, bins); RPM arrays (F, motors). Returns events.

        Everything that does not depend on the state (geometry, smoothed levels, condition bits)
        is computed for all frames at once; only the state machine steps frame by frame.
        """
        events = []
        modes = self.profile.modes
        if not modes:
            return events
        lv_seq, fl_seq = self._smoothed(*self.levels(psd_sum))
        # geometry of every frame at once: order frequencies against the modes, (F, N, M, K)
        if not np.isfinite(rpm_mean).all():  # no mean over the window: the latest reading stands in
            rpm_mean = np.where(np.isfinite(rpm_mean), rpm_mean, rpm_latest)
        f_now = rpm_latest[:, None, :, None] * self._mult60
        d_now = np.abs(f_now - self.f_mode)
        closing = d_now < np.abs(rpm_mean[:, None, :, None] * self._mult60 - self.f_mode) - 1e-6
        in_margin = d_now <= self.margin
        over = (lv_seq - fl_seq)[:, :, None, None]  # (F, N, 1, 1)
        approach = in_margin & closing
        hit = (d_now <= self.half_band) | (in_margin & (over >= LEVEL_OVER_FLOOR_DB))
        gone = d_now > self._exit_margin
        left = (d_now > self._exit_band) & ((over < LEVEL_OVER_FLOOR_DB - RELEASE_DB) | ~in_margin)
        # the condition bits of the transition table, from the booleans viewed as 0/1 bytes
        cond = approach.view(np.uint8) | (hit.view(np.uint8) << 1)
        cond |= gone.view(np.uint8) << 2
        cond |= left.view(np.uint8) << 3
        fin = np.isfinite(rpm_latest).all(axis=1)
        rising = (approach | hit).reshape(cond.shape[0], -1).any(axis=1)  # any approach or hit
        nf = len(t_s)
        i = 0
        while i < nf:
            if not self._runs_any:
                # the frames from i on in which no state would move with the states held skip as a
                # block (from all-clear only an approach or a hit can move one): bands extend over them
                if self._quiet:
                    moving = rising[i:] & fin[i:]
                else:
                    moving = (_TRANSITIONS[self.state, cond[i:]] != self.state).reshape(nf - i, -1).any(axis=1)
                    moving &= fin[i:]
                j = i + int(np.argmax(moving)) if moving.any() else nf
                if j > i:
                    if self._any_open:
                        keep = fin[i:j]
                        self._extend_bands(rpm_latest[i:j][keep], lv_seq[i:j][keep])
                    i = j
                    if i >= nf:
                        break
            if not fin[i]:
                i += 1
                continue
            s = self.state
            new = _TRANSITIONS[s, cond[i]]
            # rises need PERSIST_FRAMES consecutive proposals (a spin-up flashing past is no crossing)
            rise = new > s
            if self._runs_any or rise.any():
                self._runs = np.where(rise & (new == self._proposed), self._runs + 1, rise.astype(np.int16))
                self._proposed = np.where(rise, new, 0).astype(np.int8)
                new = np.where(rise & (self._runs < PERSIST_FRAMES), s, new).astype(np.int8)
                self._runs_any = bool(self._runs.any())
            changed = new != s
            if changed.any():
                self._open_close_bands(new)
                r_now = rpm_latest[i]
                for n, m, k in zip(*np.nonzero(changed), strict=True):
                    mode = modes[n]
                    mult = float(self.mult[k])
                    events.append(
                        CrossingEvent(
                            float(t_s[i]), STATE_NAMES[new[n, m, k]], mode.name, mode.freq_hz, int(m) + 1, mult,
                            order_label(mult, self.profile.blades), float(r_now[m]), float(f_now[i, 0, m, k]),
                            float(lv_seq[i, n]), float(fl_seq[i, n]), mode.rpm_band(mult),
                        )
                    )
                self.state = new
            self._quiet = not (self._runs_any or self._any_state)
            if self._any_open:  # extend the open bands (channels in the crossing state) by this frame
                self._extend_bands(rpm_latest[i : i + 1], lv_seq[i : i + 1])
            i += 1
        return events

    def _band(self, n: int, m: int, k: int) -> Band:
        mode = self.profile.modes[n]
        mult = float(self.mult[k])
        return Band(mode.name, mode.freq_hz, mult, order_label(mult, self.profile.blades), int(m) + 1,
                    float(self._b_lo[n, m, k]), float(self._b_hi[n, m, k]), float(self._b_peak[n, m, k]))

    def _extend_bands(self, rpm_rows: np.ndarray, level_rows: np.ndarray) -> None:
        """Widen the open bands to the RPM (frames, motors) and levels (frames, modes) of some frames."""
        if rpm_rows.shape[0] == 0:
            return
        crossing = self._b_open
        if rpm_rows.shape[0] == 1:
            r_lo = r_hi = rpm_rows[0]
            lv = level_rows[0]
        else:
            r_lo, r_hi, lv = rpm_rows.min(axis=0), rpm_rows.max(axis=0), level_rows.max(axis=0)
        np.minimum(self._b_lo, r_lo[None, :, None], out=self._b_lo, where=crossing)
        np.maximum(self._b_hi, r_hi[None, :, None], out=self._b_hi, where=crossing)
        np.maximum(self._b_peak, lv[:, None, None], out=self._b_peak, where=crossing)

    def _open_close_bands(self, new: np.ndarray) -> None:
        """After a state change: close the bands of channels that left the crossing state and open
        those that entered it (not-open channels hold +inf / -inf, so extending opens them)."""
        crossing = new == CROSSING
        closing = self._b_open & ~crossing
        if closing.any():
            self.bands.extend(self._band(n, m, k) for n, m, k in zip(*np.nonzero(closing), strict=True))
            self._b_lo[closing], self._b_hi[closing], self._b_peak[closing] = np.inf, -np.inf, -np.inf
        self._b_open = crossing
        self._any_open = bool(crossing.any())
        self._any_state = bool(new.any())

    def all_bands(self) -> list[Band]:
        """Closed bands and the ones still open, merged per (mode, order) over all motors."""
        merged: dict[tuple[str, float], Band] = {}
        still = [self._band(n, m, k) for n, m, k in zip(*np.nonzero(self._b_open), strict=True)]
        for b in [*self.bands, *still]:
            key = (b.mode, b.order)
            m = merged.get(key)
            if m is None:
                merged[key] = Band(b.mode, b.mode_hz, b.order, b.order_name, 0, b.rpm_low, b.rpm_high, b.peak_db)
            else:
                m.rpm_low = min(m.rpm_low, b.rpm_low)
                m.rpm_high = max(m.rpm_high, b.rpm_high)
                m.peak_db = max(m.peak_db, b.peak_db)
        return sorted(merged.values(), key=lambda b: (b.mode_hz, b.order))

    def mode_states(self) -> list[dict]:
        """Per mode: the worst state over motors and orders, and which motor/order is nearest."""
        out = []
        for n, mode in enumerate(self.profile.modes):
            s = self.state[n]
            worst = int(s.max()) if s.size else 0
            out.append({"mode": mode.name, "freq_hz": mode.freq_hz, "state": STATE_NAMES[worst],
                        "level_db": float(self.level_db[n]) if np.isfinite(self.level_db[n]) else None})
        return out

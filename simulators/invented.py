"""Airframes nobody has tuned the analysis on: a scenario drawn at random from a seed.

The bundled scenarios are what the analysis was developed against; a promise that holds only on
them is no promise. :func:`random_scenario` invents an airframe of a random size class: its own
gyro (output data rate, noise), motors (speed range, blades, imbalance, broadband force) and
three to six frame modes (log-uniform over 70..600 Hz, at least 5 % apart, damping ratios 1.2 to
6 %, random axis shares and motor couplings), with a slow sweep script up to 75 % throttle and
back, the bench run the sweep analysis is made for. Ranges are common practice for 3- to
10-inch multirotors (see the shared references), nothing measured on a real frame.
"""

from __future__ import annotations

import numpy as np

from .scenario import GyroSpec, ModeSpec, MotorSpec, RigidSpec, Scenario

#: size classes: (name, rpm_min range, rpm_max range, blade counts)
SIZES = (
    ("3-inch", (3500, 5000), (26000, 31000), (3, 4, 5)),
    ("5-inch", (3800, 5200), (22000, 29000), (2, 3)),
    ("7-inch", (1000, 1800), (13000, 18000), (2, 3)),
    ("10-inch", (700, 1200), (8000, 11000), (2,)),
)
SWEEP = ((0.0, 0.0), (1.0, 0.0), (2.0, 0.1), (4.0, 0.1), (5.0, 0.2), (7.0, 0.2), (32.0, 0.75), (34.0, 0.75),
         (54.0, 0.2), (56.0, 0.4), (60.0, 0.4), (62.0, 0.0), (64.0, 0.0))


def random_modes(rng: np.random.Generator, count: int, motors: int) -> tuple[ModeSpec, ...]:
    """``count`` modes at least 5 % apart (a few tries at most), strongest coupling 300..1600."""
    freqs: list[float] = []
    while len(freqs) < count:
        f = float(np.exp(rng.uniform(np.log(70.0), np.log(600.0))))
        if all(abs(f / g - 1) >= 0.05 for g in freqs):
            freqs.append(round(f, 1))
    out = []
    for i, f in enumerate(sorted(freqs)):
        axes = rng.dirichlet([0.6, 0.6, 0.6])
        axes = np.round(axes / axes.max(), 2)
        coupling = np.round(rng.uniform(300, 1600) * rng.uniform(0.2, 1.0, motors) * rng.choice([-1, 1], motors))
        out.append(ModeSpec(f"mode {i + 1}", f, round(float(rng.uniform(0.012, 0.06)), 4),
                            tuple(float(a) for a in axes), tuple(float(c) for c in coupling),
                            float(round(rng.uniform(100, 1200)))))
    return tuple(out)


def random_scenario(seed: int) -> Scenario:
    """An invented airframe, the same for the same ``seed``."""
    rng = np.random.default_rng(seed)
    size, lo, hi, blade_choices = SIZES[int(rng.integers(len(SIZES)))]
    rate = float(rng.choice([3200.0, 4000.0, 6400.0, 8000.0]))
    gyro = GyroSpec(rate_hz=rate, sens_num=32768, sens_den=2000, full_scale_dps=2000, antialias_hz=rate / 4,
                    noise_density_dps=round(float(rng.uniform(0.003, 0.008)), 4), block=16)
    motors = MotorSpec(count=4, pole_pairs=int(rng.choice([6, 7])), blades=int(rng.choice(blade_choices)),
                       rpm_min=float(rng.integers(*lo)), rpm_max=float(rng.integers(*hi)),
                       curve_exponent=round(float(rng.uniform(0.7, 0.9)), 2), lag_s=0.03, jitter=0.002,
                       imbalance_gmm=tuple(round(float(v), 2) for v in rng.uniform(0.15, 0.35, 4)),
                       misalignment=round(float(rng.uniform(0.08, 0.2)), 2),
                       blade_pass_n=round(float(rng.uniform(1.0, 2.0)), 2),
                       noise_n=round(float(rng.uniform(0.3, 0.6)), 2))
    modes = random_modes(rng, int(rng.integers(3, 7)), motors.count)
    return Scenario(f"invented{seed}", f"Invented {size} #{seed}", f"a random {size} airframe (seed {seed})",
                    "bungee", True, modes, motors, gyro, rigid=RigidSpec(2.5, 7.0), script=SWEEP,
                    script_motors=(1.0,) * motors.count)

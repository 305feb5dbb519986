"""Faults a bench cable and a device can have, injected on purpose.

Each fault has a command-line form (``--fault NAME=VALUE``, also ``sim://...?fault=NAME=VALUE``):

=================  ===================================================================
``corrupt=R``      flip one random bit in each byte with probability R
``drop=R``         drop each byte with probability R
``garbage=H:N``    H bursts per second, each of N random bytes
``stall=T:D``      at T seconds the device sends nothing for D seconds, then the backlog
``disconnect=T:D`` at T seconds the link goes away for D seconds (TCP: the client is closed
                   and connections refused; ``sim://``: reads fail), then comes back
``reboot=T``       the device reboots at T seconds (sequence numbers and clock reset)
``drift=PPM``      the device clock runs fast by PPM parts per million
=================  ===================================================================

Times are seconds of simulated time since power-on. Byte faults apply in numpy batches.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

NAMES = ("corrupt", "drop", "garbage", "stall", "disconnect", "reboot", "drift")


class FaultError(ValueError):
    """A fault specification that cannot be used; names the fault and what is wrong."""


@dataclass
class FaultPlan:
    corrupt: float = 0.0
    drop: float = 0.0
    garbage_per_s: float = 0.0
    garbage_len: int = 0
    stalls: list[tuple[float, float]] = field(default_factory=list)
    disconnects: list[tuple[float, float]] = field(default_factory=list)
    reboots: list[float] = field(default_factory=list)
    drift_ppm: float = 0.0

    @classmethod
    def parse(cls, specs: list[str] | tuple[str, ...]) -> FaultPlan:
        plan = cls()
        for spec in specs:
            plan.add(spec)
        return plan

    def add(self, spec: str) -> None:
        name, sep, value = spec.partition("=")
        name = name.strip()
        if not sep or name not in NAMES:
            raise FaultError(f"fault {spec!r}: expected NAME=VALUE with NAME one of {', '.join(NAMES)}")
        parts = value.split(":")
        try:
            nums = [float(p) for p in parts]
        except ValueError:
            raise FaultError(f"fault {spec!r}: {value!r} is not a number (or numbers joined by ':')") from None
        if any(not np.isfinite(x) or x < 0 for x in nums) and name != "drift":
            raise FaultError(f"fault {spec!r}: values must be finite and not negative")
        want = {"corrupt": 1, "drop": 1, "garbage": 2, "stall": 2, "disconnect": 2, "reboot": 1, "drift": 1}[name]
        if len(nums) != want:
            form = {1: "VALUE", 2: "A:B"}[want]
            raise FaultError(f"fault {spec!r}: {name} takes {form}")
        if name in ("corrupt", "drop"):
            if nums[0] > 1:
                raise FaultError(f"fault {spec!r}: a rate is between 0 and 1")
            setattr(self, name, nums[0])
        elif name == "garbage":
            self.garbage_per_s, self.garbage_len = nums[0], int(nums[1])
        elif name == "stall":
            self.stalls.append((nums[0], nums[1]))
        elif name == "disconnect":
            self.disconnects.append((nums[0], nums[1]))
        elif name == "reboot":
            self.reboots.append(nums[0])
        else:
            if abs(nums[0]) > 10000:
                raise FaultError(f"fault {spec!r}: drift above 10000 ppm")
            self.drift_ppm = nums[0]

    def in_window(self, windows: list[tuple[float, float]], t: float) -> bool:
        return any(start <= t < start + dur for start, dur in windows)

    def stalled(self, t: float) -> bool:
        return self.in_window(self.stalls, t)

    def disconnected(self, t: float) -> bool:
        return self.in_window(self.disconnects, t)

    @property
    def byte_faults(self) -> bool:
        return bool(self.corrupt or self.drop or self.garbage_per_s)


class ByteMangler:
    """Applies the byte faults of a plan to a stream, chunk by chunk, and counts what it did."""

    def __init__(self, plan: FaultPlan, seed: int = 0):
        self.plan = plan
        self.rng = np.random.default_rng(seed + 77)
        self.flipped = 0
        self.dropped = 0
        self.garbage_bytes = 0

    def apply(self, data: bytes, dt_s: float) -> bytes:
        p = self.plan
        if not p.byte_faults or not data:
            return data
        arr = np.frombuffer(data, dtype=np.uint8).copy()
        if p.corrupt:
            hit = np.flatnonzero(self.rng.random(arr.size) < p.corrupt)
            arr[hit] ^= (1 << self.rng.integers(0, 8, hit.size)).astype(np.uint8)
            self.flipped += hit.size
        if p.drop:
            keep = self.rng.random(arr.size) >= p.drop
            self.dropped += int(arr.size - keep.sum())
            arr = arr[keep]
        if p.garbage_per_s and p.garbage_len:
            bursts = self.rng.poisson(p.garbage_per_s * dt_s)
            for _ in range(bursts):
                at = int(self.rng.integers(0, arr.size + 1))
                junk = self.rng.integers(0, 256, p.garbage_len).astype(np.uint8)
                arr = np.concatenate([arr[:at], junk, arr[at:]])
                self.garbage_bytes += p.garbage_len
        return arr.tobytes()

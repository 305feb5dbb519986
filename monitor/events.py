"""Events that are not crossings or stray peaks: the link, gaps, the device. All events share
``t_s`` (session seconds), ``as_dict()`` (one JSON object) and ``text()`` (one readable line)."""

from __future__ import annotations

import json
from dataclasses import dataclass, field


@dataclass(frozen=True)
class Notice:
    kind: str  #: "device", "gap", "reboot", "reconnect", "link", "capture", "log"
    t_s: float
    message: str
    data: dict = field(default_factory=dict)

    def as_dict(self) -> dict:
        return {"kind": self.kind, "t_s": round(self.t_s, 4), "message": self.message, **self.data}

    def text(self) -> str:
        return f"{self.t_s:8.2f} s  {self.kind.upper():8s} {self.message}"


def to_json_line(event) -> str:
    return json.dumps(event.as_dict(), separators=(",", ":"), sort_keys=True)

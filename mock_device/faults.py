"""Fault injection for the mock: link faults (applied between transport and firmware by the
runner) and device faults (stuck sensor, stand lock; applied inside the firmware).

Scenario ``[faults]`` keys and ``tetherloop mock`` options:

=============  ================  ==========================================================
key            option            meaning
=============  ================  ==========================================================
loss           --loss P          each byte (both directions) is lost with probability P
flip           --flip P          each byte gets one random bit flipped with probability P
latency_s      --latency-ms MS   every byte is delivered MS later (wall time), both ways
drop_at_s      --drop-at S       from device time S on, the link carries nothing (both ways)
stuck          --stuck AXIS@S    that axis's sensor readings freeze at device time S
block          --block AXIS      the stand lock holds that axis from the start
=============  ================  ==========================================================

The random choices come from a generator seeded with the runner's seed, so a run is repeatable.
"""

from __future__ import annotations

import math
from collections import deque
from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class FaultConfig:
    loss: float = 0.0
    flip: float = 0.0
    latency_s: float = 0.0
    drop_at_s: float = math.inf
    stuck: tuple[str, ...] = ()
    block: tuple[str, ...] = ()

    def __post_init__(self):
        for name in ("loss", "flip"):
            v = getattr(self, name)
            if not 0.0 <= v <= 1.0:
                raise ValueError(f"fault {name} must be a probability in [0, 1], got {v}")
        if self.latency_s < 0:
            raise ValueError(f"fault latency must be >= 0, got {self.latency_s}")

    @property
    def link_faults(self) -> bool:
        return bool(self.loss or self.flip or self.latency_s or math.isfinite(self.drop_at_s))

    @classmethod
    def from_mapping(cls, d: dict | None) -> "FaultConfig":
        d = dict(d or {})
        known = {"loss", "flip", "latency_s", "drop_at_s", "stuck", "block"}
        bad = set(d) - known
        if bad:
            raise ValueError(f"unknown fault key(s) {', '.join(sorted(bad))}; known: "
                             f"{', '.join(sorted(known))}")

        def tup(v):
            if v is None:
                return ()
            return tuple(v) if isinstance(v, (list, tuple)) else (str(v),)
        try:
            return cls(loss=float(d.get("loss", 0.0)), flip=float(d.get("flip", 0.0)),
                       latency_s=float(d.get("latency_s", 0.0)),
                       drop_at_s=float(d.get("drop_at_s", math.inf)),
                       stuck=tup(d.get("stuck")), block=tup(d.get("block")))
        except (TypeError, ValueError) as exc:
            raise ValueError(f"bad fault setting: {exc}") from None

    def merged(self, other: "FaultConfig") -> "FaultConfig":
        """``other``'s non-default values override this one's."""
        base = FaultConfig()
        vals = {}
        for f in ("loss", "flip", "latency_s", "drop_at_s"):
            ov = getattr(other, f)
            vals[f] = ov if ov != getattr(base, f) else getattr(self, f)
        vals["stuck"] = self.stuck + other.stuck
        vals["block"] = self.block + other.block
        return FaultConfig(**vals)


def parse_stuck(spec: str) -> tuple[str, float]:
    """'roll@2.5' or 'roll.rate@2.5' -> ('roll', 2.5)."""
    try:
        where, at = str(spec).split("@")
        return where.split(".")[0], float(at)
    except ValueError:
        raise ValueError(f"stuck sensor spec {spec!r} not understood; expected AXIS@SECONDS, "
                         f"e.g. roll@2.5") from None


class FaultyLink:
    """Applies loss, bit flips, latency and a link drop to both directions of a link; the runner
    passes every byte through :meth:`incoming` / :meth:`outgoing` exactly once."""

    def __init__(self, link, cfg: FaultConfig, seed: int = 0):
        self.link = link
        self.port = link.port
        self.cfg = cfg
        self._rng = np.random.default_rng(seed + 7919)
        self._in_q: deque = deque()
        self._out_q: deque = deque()
        self.lost = 0
        self.flipped = 0

    def _mangle(self, data: bytes) -> bytes:
        cfg = self.cfg
        if not data or not (cfg.loss or cfg.flip):
            return data
        arr = np.frombuffer(data, dtype=np.uint8).copy()
        if cfg.flip:
            hit = self._rng.random(arr.size) < cfg.flip
            n = int(hit.sum())
            if n:
                arr[hit] ^= (1 << self._rng.integers(0, 8, n)).astype(np.uint8)
                self.flipped += n
        if cfg.loss:
            keep = self._rng.random(arr.size) >= cfg.loss
            self.lost += int(arr.size - keep.sum())
            arr = arr[keep]
        return arr.tobytes()

    def incoming(self, data: bytes, wall_s: float, device_s: float) -> bytes:
        """Bytes read from the link -> bytes the firmware gets now."""
        return self._pass(self._in_q, data, wall_s, device_s)

    def outgoing(self, data: bytes, wall_s: float, device_s: float) -> bytes:
        """Bytes from the firmware -> bytes to put on the link now (each byte mangled once)."""
        return self._pass(self._out_q, data, wall_s, device_s)

    def _pass(self, queue, data: bytes, wall_s: float, device_s: float) -> bytes:
        """One direction: cut after the drop time, mangle, then hold for the added latency."""
        if device_s >= self.cfg.drop_at_s:
            return b""
        data = self._mangle(data)
        if not self.cfg.latency_s:
            return data
        if data:
            queue.append((wall_s + self.cfg.latency_s, data))
        out = bytearray()
        while queue and queue[0][0] <= wall_s:
            out += queue.popleft()[1]
        return bytes(out)

    def close(self) -> None:
        self.link.close()

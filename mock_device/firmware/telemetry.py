"""Telemetry: which axes and level the board reports, at what rate, and the samples it builds.

The rate is kept by an accumulator on device ticks, so exactly ``rate_hz`` samples go out per
second of device time, at most one per tick, the first at the tick after configuring. Each
sample reports, per configured axis: the running experiment's level (with its relay state) on
the experiment axis, else the configured level, or the axis's outer level when it lacks that one
(protocol/SPEC.md 13.2). Samples are queued on the board's :class:`~.outbox.Outbox`, which never
waits for the link.
"""

from __future__ import annotations

from protocol import messages as M
from protocol.messages import ExperimentKind, Loop

from .axes import LOOP_NAME, AxisController
from .outbox import f32


class TelemetryStream:
    """The board's telemetry configuration and sample counter."""

    def __init__(self, loop_rate_hz: int):
        self.loop_rate_hz = loop_rate_hz
        self.rate_hz = 0  # 0 = off
        self._acc = 0
        self._axes: list[AxisController] = []
        self._loop = Loop.RATE
        self._counter = 0
        self.counter_skip = False  # test-only quirk "telemetry-counter-skip"

    def configure(self, rate_hz: int, axes: list[AxisController], loop: int) -> None:
        """Report ``axes`` (in axis-id order) at ``rate_hz`` (capped at the loop rate)."""
        self.rate_hz = min(int(rate_hz), self.loop_rate_hz)
        self._acc = self.loop_rate_hz if rate_hz else 0  # first sample at the next tick
        self._axes = sorted(axes, key=lambda a: a.axis_id)
        self._loop = int(loop)

    def due(self) -> bool:
        """Advance the accumulator by one tick; True when a sample is due (rate_hz > 0)."""
        self._acc += self.rate_hz
        if self._acc >= self.loop_rate_hz:
            self._acc -= self.loop_rate_hz
            return True
        return False

    def sample(self, time_us: int, state: int, exp) -> M.Telemetry:
        """The next sample (its counter advances by one)."""
        samples = []
        want = LOOP_NAME.get(self._loop)
        for a in self._axes:
            if exp is not None and a.name == exp.axis:
                lv = a.levels[exp.loop]
                relay = exp.relay_state if exp.kind == ExperimentKind.RELAY else 0
            else:
                lv = a.levels.get(want) or (a.outer or a.inner)
                relay = 0
            samples.append(M.AxisSample(a.axis_id, lv.loop_id, f32(lv.r), f32(lv.y),
                                        f32(lv.u), relay))
        self._counter = (self._counter + 1) & 0xFFFFFFFF
        if self.counter_skip and self._counter % 50 == 0:
            self._counter += 1
        return M.Telemetry(time_us=time_us, counter=self._counter, state=int(state),
                           tag=exp.tag if exp is not None else 0, axes=tuple(samples))

"""The simulated flight board: device state and the fixed-rate tick.

Tick k (device time t_k = k/loop_rate_hz) does, in this order:

1. handle the frames received since the last tick (requests are answered in this tick, see
   ``server.py``), and the board's kill button;
2. sample the sensors (measurements of the state at t_k through the sensor delay, with noise);
3. safety: keepalive watchdog, kill thresholds and saturation time (ARMED and RUNNING: the
   ``kill.*`` settings, or the running experiment's thresholds where they are tighter; the
   table is :data:`~.axes.THRESHOLDS`) and a stuck noisy sensor (every state);
4. control: in ARMED every axis holds its setpoint with its loops closed (angle 0 rad, the height
   at arming, 0 for a generic plant); in RUNNING the experiment's loop level runs the experiment
   (relay, step or hold, ``experiment.py``) with the inner level closed on its current gains,
   while the other axes keep holding; in DISARMED and KILLED every output is 0;
5. the plant advances over [t_k, t_k+1) with the outputs latched at the previous tick (the board
   writes its outputs once per tick, so a command computed at tick k acts from t_k+1: together
   with the zero-order hold that is the sampling delay of protocol/timing.py). A kill zeroes the
   latched outputs before this step, so the outputs go to zero in the same tick;
6. telemetry at the configured rate (``telemetry.py``), stamped with t_k: the sample holds the
   measurements, setpoints and outputs of tick k (its events carry the same time).

Watchdog: it runs on LINK time, the ``link_time_s`` passed to :meth:`Firmware.tick`. The runner
passes wall-clock time in every speed mode (the host lives in wall time, so an accelerated device
must not expire the watchdog faster than the host can send keepalives); in-process tests that drive
``tick()`` directly may pass device time (``None`` means device time). Any valid frame from the
host refreshes the watchdog; arming additionally needs the host frame before the ArmConfirm to
have arrived within ``watchdog_s`` (protocol/SPEC.md 12.3).

Kill: a Kill request, the kill button, a threshold crossing, the watchdog or a stuck sensor put the
board in KILLED from any state, zero every output in the same tick, end a running experiment
(EXPERIMENT_FINISHED reason KILLED) and send KILL_TRIPPED with reason, offending value and limit.
The kill stays latched until KillClear (KILLED -> DISARMED).
"""

from __future__ import annotations

from collections import deque
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from protocol import messages as M
from protocol.messages import DeviceState, EventKind, FinishReason, KillReason, Loop

from ..pid import Pid
from ..plant import Gauss
from ..scenarios import Scenario, load_scenario
from ..settings import SettingsTable
from ..faults import parse_stuck
from .axes import AXIS_ID, NO_AXIS, SATURATION, AxisController, build_axes, kill_limits
from .experiment import Experiment, check_request, experiment_command
from .outbox import Outbox, f32
from .quirks import check_quirks
from .server import ProtocolServer
from .telemetry import TelemetryStream

_LIVE = frozenset((DeviceState.ARMED, DeviceState.RUNNING))


@dataclass(frozen=True)
class DeviceEvent:
    """An event as the device emitted it (also sent on the wire as an Event message)."""

    time_us: int
    kind: EventKind
    state: DeviceState
    reason: int
    axis: int
    value: float
    threshold: float
    tag: int
    text: str


class Firmware:
    """The simulated board. Not thread-safe: one thread calls receive/tick/take_output (the
    runner); :meth:`press_kill_button` only sets a flag and may be called from any thread."""

    def __init__(self, scenario: Scenario | str, seed: int = 0, quirks=frozenset()):
        sc = load_scenario(scenario) if not isinstance(scenario, Scenario) else scenario
        self.scenario = sc
        self.loop_rate_hz = sc.loop_rate_hz
        self.ts = 1.0 / sc.loop_rate_hz
        self._rng = np.random.default_rng(seed)  # plant noise, then arming tokens
        self.settings = SettingsTable(sc)
        self.controllers: list[AxisController] = build_axes(sc, self.ts, Gauss(self._rng))
        self._by_name = {a.name: a for a in self.controllers}
        self.axis_by_id = {a.axis_id: a for a in self.controllers}
        # coupling torque of axis i = sum over the other rotation axes j of M[i][j] * torque_j
        coupled = [a for a in self.controllers if a.coupled] if sc.coupling else []
        self._cpl_plants = [a.plant for a in coupled]
        self._cpl_terms = [
            (a.plant, [(jj, sc.coupling[a.axis_id][b.axis_id])
                       for jj, b in enumerate(coupled)
                       if b is not a and sc.coupling[a.axis_id][b.axis_id] != 0.0])
            for a in coupled]
        for a in self.controllers:
            for lv in a.levels.values():
                lv.load_gains(self.settings.values)
            a.read()
        # state
        self.state = DeviceState.DISARMED
        self.tick_count = 0
        self.exp: Experiment | None = None
        self._kill_button = False
        self.link_time = 0.0  # of the tick being run (watchdog, arming token)
        self._limits = kill_limits(self.settings.values)  # in the order of axes.THRESHOLDS
        self._wd = self.settings.values["watchdog_s"]
        self.stats = {"frames_in": 0, "requests": 0, "replies_from_cache": 0, "refused": 0,
                      "telemetry_sent": 0, "events_sent": 0, "output_dropped": 0}
        self.events: deque[DeviceEvent] = deque(maxlen=1000)
        self.outbox = Outbox(self.stats)
        self.server = ProtocolServer(self, self._rng)
        self._telemetry = TelemetryStream(self.loop_rate_hz)
        self.quirks = quirks  # test-only deviations from the spec (quirks.py)
        self.persisted: dict[str, float] | None = None
        # called with the settings on SettingsPersist (the runner's store file); an OSError
        # there refuses the request
        self.on_persist: Callable[[dict[str, float]], None] | None = None
        # faults handled on the device (the link faults live in the runner)
        self._stuck_at_s: dict[str, float] = {}
        for spec in _as_list(sc.faults.get("stuck")):
            self.schedule_stuck_sensor(*parse_stuck(spec))
        for axis in _as_list(sc.faults.get("block")):
            if axis not in self._by_name:
                raise ValueError(f"scenario {sc.name!r}: [faults] block = {axis!r}: no such axis")
            self.set_blocked(axis, True)

    # ------------------------------------------------------------------ public API

    @property
    def quirks(self) -> frozenset[str]:
        """Test-only deviations from protocol/SPEC.md (see ``quirks.py``); empty normally."""
        return self._quirks

    @quirks.setter
    def quirks(self, value) -> None:
        self._quirks = check_quirks(value)
        self._telemetry.counter_skip = "telemetry-counter-skip" in self._quirks
        self.outbox.ack_trailing_byte = "ack-trailing-byte" in self._quirks

    @property
    def time_us(self) -> int:
        return self.tick_count * 1_000_000 // self.loop_rate_hz

    @property
    def device_time_s(self) -> float:
        return self.tick_count * self.ts

    @property
    def outputs(self) -> dict[str, float]:
        """Actuator commands currently applied (latched), per axis name."""
        return {a.name: a.latched for a in self.controllers}

    @property
    def axes(self) -> dict[str, tuple[str, ...]]:
        return self.scenario.axes

    def plant(self, axis: str):
        """The plant object of an axis (tests and demos read its true state)."""
        return self._by_name[axis].plant

    def level_signals(self, axis: str, loop: str) -> tuple[float, float, float]:
        """(setpoint, measurement, output) of a loop level at the last tick."""
        lv = self._by_name[axis].levels[loop]
        return lv.r, lv.y, lv.u

    def pid(self, axis: str, loop: str) -> Pid:
        """The PID object of a loop level (tests read its integrator)."""
        return self._by_name[axis].levels[loop].pid

    def receive(self, data: bytes) -> None:
        """Bytes from the host; frames are handled at the next tick."""
        self.server.receive(data)

    def take_output(self) -> bytes:
        """Bytes for the host produced since the last call."""
        return self.outbox.take()

    def press_kill_button(self) -> None:
        """The board's own kill input: acts at the start of the next tick, in every state."""
        self._kill_button = True

    def set_blocked(self, axis: str, blocked: bool = True) -> None:
        """Engage or release the stand lock of an axis (the controller keeps pushing)."""
        self._by_name[axis].plant.blocked = bool(blocked)

    def schedule_stuck_sensor(self, axis: str, at_s: float) -> None:
        """Freeze an axis's sensor readings from device time ``at_s`` on (fault injection)."""
        if axis not in self._by_name:
            raise ValueError(f"stuck sensor: no axis {axis!r}; axes: {', '.join(self._by_name)}")
        self._stuck_at_s[axis] = float(at_s)

    def set_setting(self, name: str, value: float) -> None:
        """Python-API write (same bounds as the protocol); raises ValueError."""
        self.settings.set(name, value)
        self._apply_setting(name)

    def configure_telemetry(self, rate_hz: int, axes: tuple[str, ...] | None = None,
                            loop: int = Loop.RATE) -> None:
        """Python-API telemetry setup (same effect as a TelemetryConfig request)."""
        self._telemetry.configure(rate_hz, [a for a in self.controllers
                                            if axes is None or a.name in axes], loop)

    def tick(self, link_time_s: float | None = None) -> None:
        """Advance one control tick. ``link_time_s`` is the link clock for the watchdog (wall
        time in the runner); None uses device time."""
        self.link_time = self.device_time_s if link_time_s is None else link_time_s
        server = self.server
        if server.pending:
            server.handle_pending()
        if self._kill_button:
            self._kill_button = False
            self._kill(KillReason.KILL_BUTTON, 0.0, 0.0, NO_AXIS, "kill button pressed")
        if self._stuck_at_s:
            self._check_stuck_schedule()
        axes = self.controllers
        for a in axes:
            a.read()
            if a.noisy and a.sensor_stuck() and self.state != DeviceState.KILLED:
                self._kill(KillReason.SENSOR_FAULT, a.inner.y, 0.0, a.axis_id,
                           f"{a.name} sensor reading stuck")
        if self.state in _LIVE:
            quiet = self.link_time - server.last_rx_link
            wd = self._wd
            if quiet > (2 * wd if "watchdog-late" in self.quirks else wd):
                self._emit(EventKind.WATCHDOG_EXPIRED, 0, NO_AXIS, quiet, wd,
                           "no frame from the host within watchdog_s",
                           tag=self.exp.tag if self.exp is not None else 0)
                self._kill(KillReason.WATCHDOG, quiet, wd, NO_AXIS, "keepalive watchdog expired")
            else:
                self._control()
        if self._cpl_terms:
            self._apply_coupling()
        for a in axes:
            a.plant.step(a.latched)
            a.latched = a.cmd
        now_us = self.time_us  # a sample is stamped with the tick its values are from
        self.tick_count += 1
        tel = self._telemetry
        if tel.rate_hz and tel.due():
            self.stats["telemetry_sent"] += 1
            self.outbox.send(tel.sample(now_us, self.state, self.exp))

    # ------------------------------------------------------------------ Python-level commands
    # (the protocol server calls these; tests and demos may call them directly)

    def arm_now(self) -> None:
        """Arm without the token exchange (Python API for tests and demos). The state rules
        still apply; raises RuntimeError otherwise. The watchdog starts from now."""
        if self.state != DeviceState.DISARMED:
            raise RuntimeError(f"cannot arm in state {self.state.name}")
        self.server.last_rx_link = self.link_time
        self._arm()

    def start_experiment(self, req: M.ExperimentStart) -> None:
        """Start an experiment (Python API); raises ValueError with the refusal text."""
        if self.state != DeviceState.ARMED:
            raise ValueError(f"experiments start only when ARMED (state {self.state.name})")
        refusal = check_request(req, self.axis_by_id)
        if refusal is not None:
            raise ValueError(refusal.text)
        self._begin_experiment(req)

    def disarm(self) -> None:
        if self.state in _LIVE:
            self._zero_outputs()
            self.state = DeviceState.DISARMED
            if self.exp is not None:
                self._finish(FinishReason.DISARMED, set_state=False)
            self._emit(EventKind.STATE_CHANGED, 0, NO_AXIS, 0.0, 0.0, "disarmed")

    def clear_kill(self) -> None:
        if self.state == DeviceState.KILLED:
            self.state = DeviceState.DISARMED
            self._emit(EventKind.KILL_CLEARED, 0, NO_AXIS, 0.0, 0.0, "kill cleared")
            self._emit(EventKind.STATE_CHANGED, 0, NO_AXIS, 0.0, 0.0, "kill cleared")

    # ------------------------------------------------------------------ control

    def _apply_setting(self, name: str) -> None:
        parts = name.split(".")
        if len(parts) == 3 and parts[0] in self._by_name:
            lv = self._by_name[parts[0]].levels.get(parts[1])
            if lv is not None:
                lv.load_gains(self.settings.values)
        elif name.startswith("kill."):
            self._limits = kill_limits(self.settings.values, self.exp)
        elif name == "watchdog_s":
            self._wd = self.settings.values["watchdog_s"]

    def _apply_coupling(self) -> None:
        torques = [p.motor_torque_nm for p in self._cpl_plants]
        for p, terms in self._cpl_terms:
            c = 0.0
            for j, coef in terms:
                c += coef * torques[j]
            p.coupling_nm = c

    def _check_stuck_schedule(self) -> None:
        t = self.device_time_s
        for axis, at in list(self._stuck_at_s.items()):
            if t >= at:
                self._by_name[axis].freeze_sensors()
                del self._stuck_at_s[axis]

    def _control(self) -> None:
        """ARMED / RUNNING: trips on what the board measures, then the loops."""
        e = self.exp
        ts = self.ts
        if e is not None:
            t = (self.tick_count - e.start_tick) * ts
            if t >= e.duration_s:
                self._finish(FinishReason.DURATION_LIMIT)
                e = None
        limits = self._limits
        for a in self.controllers:
            trip = a.tripped(limits)
            if trip is not None:
                th, y, lim = trip
                return self._kill(th.reason, y, lim, a.axis_id, th.text.format(axis=a.name))
        lim_sat = limits[SATURATION.index]
        for a in self.controllers:
            if e is not None and a.name == e.axis:
                a.actuate(experiment_command(a, e, t), ts)
            else:
                a.actuate(a.hold_command(), ts)
            if a.sat_s > lim_sat:
                return self._kill(SATURATION.reason, a.sat_s, lim_sat, a.axis_id,
                                  SATURATION.text.format(axis=a.name))

    # ------------------------------------------------------------------ state changes

    def _set_state(self, new: DeviceState, text: str) -> None:
        if new != self.state:
            self.state = new
            self._emit(EventKind.STATE_CHANGED, 0, NO_AXIS, 0.0, 0.0, text)

    def _zero_outputs(self) -> None:
        for a in self.controllers:
            a.zero()

    def _arm(self) -> None:
        for a in self.controllers:
            for lv in a.levels.values():
                lv.pid.reset()
            a.sat_s = 0.0
            a.hold_setpoints()
        self.exp = None
        self._limits = kill_limits(self.settings.values)
        self._set_state(DeviceState.ARMED, "armed")

    def _begin_experiment(self, msg: M.ExperimentStart) -> None:
        """Start a checked experiment (see :func:`~.experiment.check_request`)."""
        a = self.axis_by_id[msg.axis]
        e = Experiment.from_request(msg, a, self.tick_count)
        lv = a.levels[e.loop]
        # bumpless: the experiment level keeps its integrator, loses only its derivative state
        lv.pid.reset(integral=lv.pid.i)
        a.sat_s = 0.0
        a.mark_start_height()
        self.exp = e
        self._limits = kill_limits(self.settings.values, e)
        self.state = DeviceState.RUNNING
        self._emit(EventKind.EXPERIMENT_STARTED, int(e.kind), a.axis_id, 0.0, 0.0,
                   f"{e.kind.name.lower()} on {a.name}.{e.loop}", tag=e.tag)
        # STATE_CHANGED carries the tag running after the change (protocol/SPEC.md 13.5)
        self._emit(EventKind.STATE_CHANGED, 0, NO_AXIS, 0.0, 0.0, f"experiment {e.tag} running",
                   tag=0 if "state-changed-tag-zero" in self.quirks else e.tag)

    def _kill(self, reason: KillReason, value: float, threshold: float, axis: int,
              text: str) -> None:
        """Outputs to zero now (before this tick's plant step), latch KILLED, send events in the
        order of protocol/SPEC.md 11.2."""
        self._zero_outputs()
        e = self.exp
        was = self.state
        self.state = DeviceState.KILLED
        self.server.token = None
        self._emit(EventKind.KILL_TRIPPED, int(reason), axis, value, threshold, text,
                   tag=e.tag if e is not None else 0)
        if e is not None:
            self._finish(FinishReason.KILLED, set_state=False)
        if was != DeviceState.KILLED:
            self._emit(EventKind.STATE_CHANGED, 0, NO_AXIS, 0.0, 0.0, "killed")

    def _finish(self, reason: FinishReason, set_state: bool = True) -> None:
        e = self.exp
        self.exp = None
        a = self._by_name[e.axis]
        for lv in a.levels.values():
            lv.r = lv.u = 0.0
        self._limits = kill_limits(self.settings.values)
        if self.state == DeviceState.RUNNING and set_state:
            self.state = DeviceState.ARMED
        self._emit(EventKind.EXPERIMENT_FINISHED, int(reason), AXIS_ID[e.axis], 0.0, 0.0,
                   f"experiment {e.tag} finished: {reason.name.lower()}", tag=e.tag)
        if set_state and self.state == DeviceState.ARMED:
            a.resume_hold()  # level attitude, the height where the body is now
            self._emit(EventKind.STATE_CHANGED, 0, NO_AXIS, 0.0, 0.0, "experiment finished")

    def _emit(self, kind: EventKind, reason: int, axis: int, value: float, threshold: float,
              text: str, tag: int = 0) -> None:
        st = self.state
        ev = DeviceEvent(self.time_us, kind, st, reason, axis, float(value), float(threshold),
                         tag, text[:64])
        self.events.append(ev)
        self.stats["events_sent"] += 1
        self.outbox.send(M.Event(time_us=ev.time_us, kind=int(kind), state=int(st),
                                 reason=int(reason), axis=axis, value=f32(value),
                                 threshold=f32(threshold), tag=tag, text=ev.text))


# ------------------------------------------------------------------------- helpers


def _as_list(v) -> list:
    if v is None:
        return []
    return list(v) if isinstance(v, (list, tuple)) else [v]

"""Firmware of the simulated flight board: a fixed-rate tick with the PID cascade, on-board
experiments, safety and the protocol v1 server.

Tick k (device time t_k = k/loop_rate_hz) does, in this order:

1. handle the frames received since the last tick (requests are answered in this tick), and the
   board's kill button;
2. sample the sensors (measurements of the state at t_k through the sensor delay, with noise);
3. safety: keepalive watchdog, kill thresholds and saturation time (ARMED and RUNNING: the
   experiment's thresholds, or the ``kill.*`` settings where it gives 0 or none runs) and a stuck
   noisy sensor (every state);
4. control: in ARMED every axis holds its setpoint with its loops closed (angle 0 rad, the height
   at arming, 0 for a generic plant); in RUNNING the experiment's loop level runs the experiment
   (relay, step or hold) with the inner level closed on its current gains, while the other axes
   keep holding; in DISARMED and KILLED every output is 0;
5. the plant advances over [t_k, t_k+1) with the outputs latched at the previous tick (the board
   writes its outputs once per tick, so a command computed at tick k acts from t_k+1: together
   with the zero-order hold that is the 1.5-tick sampling delay of
   :attr:`Scenario.sampling_delay_s`). A kill zeroes the latched outputs before this step, so
   the outputs go to zero in the same tick;
6. telemetry at the configured rate (an accumulator on device ticks, so exactly ``rate_hz``
   samples per second of device time, at most one per tick).

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

Relay output (protocol/SPEC.md 13.1): ``bias + s*amplitude`` (s = +1/-1) replaces the level's PID
output, so on a loaded loop (heave rate: gravity) the host centres the relay on the trim with
``bias``. The relay switches to +1 when the error (setpoint - measurement) rises above
``hysteresis`` and to -1 when it falls below ``-hysteresis``; a negative hysteresis switches
early. It starts at +1 if the error is >= 0. An outer level's relay output is the inner level's
setpoint; an inner level's relay output is clipped to the actuator range.
"""

from __future__ import annotations

import math
from collections import OrderedDict, deque
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from protocol import codec
from protocol import messages as M
from protocol.messages import (Axis, DeviceState, EventKind, ExperimentKind, FinishReason,
                               KillReason, Loop, RefuseCode)

from .pid import Pid
from .plant import Gauss, HeaveAxis, RotationAxis, TransferFunctionPlant
from .scenarios import Scenario, load_scenario
from .settings import SettingsTable

FIRMWARE_VERSION = "tetherloop-mock 0.1.0"
ARM_TOKEN_VALID_MS = 3000
REPLY_CACHE_SIZE = 16  # protocol/SPEC.md section 9
OUTPUT_BUFFER_LIMIT = 1 << 20  # bytes kept for a host that does not read (older bytes dropped)
STUCK_TICKS = 100  # identical readings of a noisy gyro for this many ticks = stuck sensor
NO_AXIS = 255

_AXIS_ID = {"roll": Axis.ROLL, "pitch": Axis.PITCH, "yaw": Axis.YAW, "heave": Axis.HEAVE}
_LOOP_ID = {"rate": Loop.RATE, "angle": Loop.ANGLE, "heave": Loop.HEAVE}
_LOOP_NAME = {v: k for k, v in _LOOP_ID.items()}
_AXIS_NAME = {v: k for k, v in _AXIS_ID.items()}
_LIVE = frozenset((DeviceState.ARMED, DeviceState.RUNNING))


class _Level:
    """One loop level of one axis: its PID and last signals."""

    __slots__ = ("name", "loop_id", "pid", "r", "y", "u", "prefix")

    def __init__(self, name: str, pid: Pid, prefix: str):
        self.name = name
        self.loop_id = _LOOP_ID[name]
        self.pid = pid
        self.prefix = prefix
        self.r = 0.0
        self.y = 0.0
        self.u = 0.0


class _AxisCtl:
    """An axis of the board: plant, levels (inner first), actuator range and latched output."""

    __slots__ = ("name", "axis_id", "plant", "kind", "inner", "outer", "levels", "act_lo",
                 "act_hi", "cmd", "latched", "sat_s", "stuck_n", "prev_y", "noisy", "tf_loop",
                 "hold_ref", "hold_ref_height", "rate_lv", "angle_lv", "heave_lv")

    def __init__(self, name, plant, kind, levels, act_lo, act_hi, noisy, tf_loop=None):
        self.name = name
        self.axis_id = _AXIS_ID[name]
        self.plant = plant
        self.kind = kind  # "rot" | "heave" | "tf"
        self.levels = {lv.name: lv for lv in levels}
        self.inner = levels[0]
        self.outer = levels[1] if len(levels) > 1 else None
        self.act_lo = act_lo
        self.act_hi = act_hi
        self.cmd = 0.0
        self.latched = 0.0
        self.sat_s = 0.0
        self.stuck_n = 0
        self.prev_y = math.nan
        self.noisy = noisy
        self.tf_loop = tf_loop
        self.hold_ref = 0.0
        self.hold_ref_height = 0.0
        # the levels whose measurements the rate / angle / height kill thresholds watch
        self.rate_lv = self.angle_lv = self.heave_lv = None
        if kind == "rot":
            self.rate_lv, self.angle_lv = self.inner, self.outer
        elif kind == "heave":
            self.heave_lv = self.outer
        elif tf_loop == "rate":
            self.rate_lv = self.inner
        elif tf_loop == "angle":
            self.angle_lv = self.inner
        else:
            self.heave_lv = self.inner

    def read(self) -> None:
        p = self.plant
        p.sample()
        if self.kind == "rot":
            self.inner.y = p.y_rate
            self.outer.y = p.y_angle
        elif self.kind == "heave":
            self.inner.y = p.y_rate
            self.outer.y = p.y_height
        else:
            self.inner.y = p.y


@dataclass
class Experiment:
    """A running on-board experiment (device side)."""

    tag: int
    kind: ExperimentKind
    axis: str
    loop: str
    amplitude: float
    hysteresis: float
    bias: float
    setpoint: float
    step_at_s: float
    duration_s: float
    kill_angle_rad: float
    kill_rate_rad_s: float
    kill_heave_m: float
    kill_saturation_s: float
    start_tick: int = 0
    relay_state: int = 0
    start_height: float = 0.0


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

    def __init__(self, scenario: Scenario | str, seed: int = 0):
        sc = load_scenario(scenario) if not isinstance(scenario, Scenario) else scenario
        self.scenario = sc
        self.loop_rate_hz = sc.loop_rate_hz
        self.ts = 1.0 / sc.loop_rate_hz
        self.seed = seed
        rng = np.random.default_rng(seed)
        self._rng = rng
        gauss = Gauss(rng)
        self.settings = SettingsTable(sc)
        ts = self.ts
        self._axes: list[_AxisCtl] = []
        for name in ("roll", "pitch", "yaw"):
            if name in sc.rotation:
                p = sc.rotation[name]
                plant = RotationAxis(p, ts, gauss)
                lim = p.output_limit
                inner = _Level("rate", Pid(ts, -lim, lim), f"{name}.rate.")
                outer = _Level("angle", Pid(ts), f"{name}.angle.")
                self._axes.append(_AxisCtl(name, plant, "rot", [inner, outer], -lim, lim,
                                           p.gyro_noise_std > 0))
        if sc.heave is not None:
            p = sc.heave
            plant = HeaveAxis(p, ts, gauss)
            inner = _Level("rate", Pid(ts, 0.0, 1.0), "heave.rate.")
            outer = _Level("heave", Pid(ts), "heave.heave.")
            self._axes.append(_AxisCtl("heave", plant, "heave", [inner, outer], 0.0, 1.0,
                                       p.climb_noise_std > 0))
        if sc.tf_plant is not None:
            name, loop, p = sc.tf_plant
            plant = TransferFunctionPlant(p, ts, gauss)
            lim = p.output_limit
            lvl = _Level(loop, Pid(ts, -lim, lim), f"{name}.{loop}.")
            self._axes.append(_AxisCtl(name, plant, "tf", [lvl], -lim, lim, p.noise_std > 0,
                                       tf_loop=loop))
        self._by_name = {a.name: a for a in self._axes}
        self._by_id = {a.axis_id: a for a in self._axes}
        self._coupled = [a for a in self._axes if a.kind == "rot"] if sc.coupling else []
        self._coupling = sc.coupling
        # coupling torque of axis i = sum over the other rotation axes j of M[i][j] * torque_j
        self._cpl_plants = [a.plant for a in self._coupled]
        self._cpl_terms = [
            (a.plant, [(jj, sc.coupling[a.axis_id][b.axis_id])
                       for jj, b in enumerate(self._coupled)
                       if b is not a and sc.coupling[a.axis_id][b.axis_id] != 0.0])
            for a in self._coupled]
        for a in self._axes:
            for lv in a.levels.values():
                self._load_pid(lv)
            a.read()
        # state
        self.state = DeviceState.DISARMED
        self.tick_count = 0
        self.exp: Experiment | None = None
        self._kill_button = False
        self._link_time = 0.0
        self._last_rx_link = -math.inf
        self._prev_rx_link = -math.inf
        self._token: int | None = None
        self._token_expiry = 0.0
        self._limits = (0.0, 0.0, 0.0, 0.0)  # angle, rate, heave, saturation thresholds in use
        self._wd = self.settings.values["watchdog_s"]
        # protocol
        self._decoder = codec.StreamDecoder()
        self._rx_frames: list = []
        self._out = bytearray()
        self._seq = 0
        self._reply_cache: OrderedDict[int, tuple[int, bytes]] = OrderedDict()
        self._last_reply = b""
        self._deferred: list[bytes] | None = None
        self.persisted: dict[str, float] | None = None
        # called with the settings on SettingsPersist (the runner's store file); an OSError
        # there refuses the request
        self.on_persist: Callable[[dict[str, float]], None] | None = None
        self.events: deque[DeviceEvent] = deque(maxlen=1000)
        self.stats = {"frames_in": 0, "requests": 0, "replies_from_cache": 0, "refused": 0,
                      "telemetry_sent": 0, "events_sent": 0, "output_dropped": 0}
        # telemetry
        self._tel_rate = 0
        self._tel_acc = 0
        self._tel_axes: list[_AxisCtl] = []
        self._tel_loop = Loop.RATE
        self._tel_counter = 0
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
    def time_us(self) -> int:
        return self.tick_count * 1_000_000 // self.loop_rate_hz

    @property
    def device_time_s(self) -> float:
        return self.tick_count * self.ts

    @property
    def outputs(self) -> dict[str, float]:
        """Actuator commands currently applied (latched), per axis name."""
        return {a.name: a.latched for a in self._axes}

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
        if data:
            self._rx_frames.extend(self._decoder.feed(data))

    def take_output(self) -> bytes:
        """Bytes for the host produced since the last call."""
        if not self._out:
            return b""
        out = bytes(self._out)
        self._out.clear()
        return out

    def press_kill_button(self) -> None:
        """The board's own kill input: acts at the start of the next tick, in every state."""
        self._kill_button = True

    def set_link_time(self, link_time_s: float) -> None:
        self._link_time = link_time_s

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

    def tick(self, link_time_s: float | None = None) -> None:
        """Advance one control tick. ``link_time_s`` is the link clock for the watchdog (wall
        time in the runner); None uses device time."""
        self._link_time = self.device_time_s if link_time_s is None else link_time_s
        if self._rx_frames:
            frames, self._rx_frames = self._rx_frames, []
            for f in frames:
                self._handle_frame(f)
        if self._kill_button:
            self._kill_button = False
            self._kill(KillReason.KILL_BUTTON, 0.0, 0.0, NO_AXIS, "kill button pressed")
        if self._stuck_at_s:
            self._check_stuck_schedule()
        axes = self._axes
        for a in axes:
            a.read()
            if a.noisy:
                y = a.inner.y
                if y == a.prev_y:
                    a.stuck_n += 1
                    if a.stuck_n >= STUCK_TICKS and self.state != DeviceState.KILLED:
                        self._kill(KillReason.SENSOR_FAULT, y, 0.0, a.axis_id,
                                   f"{a.name} sensor reading stuck")
                else:
                    a.stuck_n = 0
                a.prev_y = y
        if self.state in _LIVE:
            quiet = self._link_time - self._last_rx_link
            if quiet > self._wd:
                wd = self._wd
                self._emit(EventKind.WATCHDOG_EXPIRED, 0, NO_AXIS, quiet, wd,
                           "no frame from the host within watchdog_s")
                self._kill(KillReason.WATCHDOG, quiet, wd, NO_AXIS, "keepalive watchdog expired")
            else:
                self._control()
        if self._coupled:
            self._apply_coupling()
        for a in axes:
            a.plant.step(a.latched)
            a.latched = a.cmd
        self.tick_count += 1
        if self._tel_rate:
            self._tel_acc += self._tel_rate
            if self._tel_acc >= self.loop_rate_hz:
                self._tel_acc -= self.loop_rate_hz
                self._send_telemetry()

    # ------------------------------------------------------------------ Python-level commands
    # (the protocol server calls these; tests and demos may call them directly)

    def arm_now(self) -> None:
        """Arm without the token exchange (Python API for tests and demos). The state rules
        still apply; raises RuntimeError otherwise. The watchdog starts from now."""
        if self.state != DeviceState.DISARMED:
            raise RuntimeError(f"cannot arm in state {self.state.name}")
        self._last_rx_link = self._link_time
        self._do_arm()

    def start_experiment(self, req: M.ExperimentStart) -> None:
        """Start an experiment (Python API); raises ValueError with the refusal text."""
        if self.state != DeviceState.ARMED:
            raise ValueError(f"experiments start only when ARMED (state {self.state.name})")
        code, text = self._check_experiment(req)
        if code is not None:
            raise ValueError(text)
        self._do_experiment_start(req)

    def stop_experiment(self) -> None:
        if self.exp is not None:
            self._finish(FinishReason.STOPPED)

    def disarm(self) -> None:
        if self.state in _LIVE:
            self._zero_outputs()
            self.state = DeviceState.DISARMED
            if self.exp is not None:
                self._finish(FinishReason.DISARMED, set_state=False)
            self._emit(EventKind.STATE_CHANGED, 0, NO_AXIS, 0.0, 0.0, "disarmed")

    def kill(self, reason: KillReason = KillReason.HOST_OPERATOR, value: float = 0.0) -> None:
        self._kill(reason, value, 0.0, NO_AXIS, "kill requested")

    def clear_kill(self) -> None:
        if self.state == DeviceState.KILLED:
            self.state = DeviceState.DISARMED
            self._emit(EventKind.KILL_CLEARED, 0, NO_AXIS, 0.0, 0.0, "kill cleared")
            self._emit(EventKind.STATE_CHANGED, 0, NO_AXIS, 0.0, 0.0, "kill cleared")

    # ------------------------------------------------------------------ control

    def _load_pid(self, lv: _Level) -> None:
        v = self.settings.values
        pid = lv.pid
        pre = lv.prefix
        # bumpless parameter change: the integrator absorbs the jump of the feed-forward and
        # proportional terms (with setpoint weight b = 0 on a height loop, kp * y alone is a
        # large offset), so writing gains to a running loop does not kick the output
        # (Astrom & Hagglund 1995, PID Controllers, bumpless parameter changes; value from
        # memory)
        before = pid.ff + pid.kp * (pid.b * lv.r - lv.y)
        pid.kp = v[pre + "kp"]
        pid.ki = v[pre + "ki"]
        pid.kd = v[pre + "kd"]
        pid.tf = v[pre + "tf"]
        pid.b = v[pre + "b"]
        pid.out_limit = v[pre + "out_limit"]
        pid.i_limit = v[pre + "i_limit"]
        pid.aw_mode = int(v[pre + "aw_mode"])
        pid.aw_tt = v[pre + "aw_tt"]
        pid.ff = v[pre + "ff"]
        pid.configure()
        if pid.running:  # the loop has run: keep its output continuous
            i = pid.i + before - (pid.ff + pid.kp * (pid.b * lv.r - lv.y))
            il = pid.i_limit
            pid.i = min(max(i, -il), il) if il > 0 else i

    def _apply_setting(self, name: str) -> None:
        parts = name.split(".")
        if len(parts) == 3 and parts[0] in self._by_name:
            lv = self._by_name[parts[0]].levels.get(parts[1])
            if lv is not None:
                self._load_pid(lv)
        elif name.startswith("kill."):
            self._update_limits()
        elif name == "watchdog_s":
            self._wd = self.settings.values["watchdog_s"]

    def _update_limits(self) -> None:
        v = self.settings.values
        e = self.exp
        if e is None:
            self._limits = (v["kill.angle_rad"], v["kill.rate_rad_s"], v["kill.heave_m"],
                            v["kill.saturation_s"])
        else:
            self._limits = (e.kill_angle_rad or v["kill.angle_rad"],
                            e.kill_rate_rad_s or v["kill.rate_rad_s"],
                            e.kill_heave_m or v["kill.heave_m"],
                            e.kill_saturation_s or v["kill.saturation_s"])

    def _apply_coupling(self) -> None:
        plants = self._cpl_plants
        torques = [p.motor_torque_nm for p in plants]
        for p, terms in self._cpl_terms:
            c = 0.0
            for j, coef in terms:
                c += coef * torques[j]
            p.coupling_nm = c

    def _check_stuck_schedule(self) -> None:
        t = self.device_time_s
        for axis, at in list(self._stuck_at_s.items()):
            if t >= at:
                a = self._by_name[axis]
                p = a.plant
                if a.kind == "rot":
                    p.stuck_at = (p.y_rate, p.y_angle)
                elif a.kind == "heave":
                    p.stuck_at = (p.y_rate, p.y_height)
                else:
                    p.stuck_at = p.y
                del self._stuck_at_s[axis]

    def _set_hold_refs(self) -> None:
        """Setpoints the axes hold while ARMED (and while another axis runs an experiment)."""
        for a in self._axes:
            if a.kind == "heave":
                a.hold_ref = a.hold_ref_height = a.outer.y
            elif a.kind == "tf" and a.tf_loop == "heave":
                a.hold_ref = 0.0
                a.hold_ref_height = a.inner.y
            else:
                a.hold_ref = 0.0

    def _control(self) -> None:
        """ARMED / RUNNING: trips on what the board measures, then the loops."""
        e = self.exp
        ts = self.ts
        lim_angle, lim_rate, lim_heave, lim_sat = self._limits
        if e is not None:
            t = (self.tick_count - e.start_tick) * ts
            if t >= e.duration_s:
                self._finish(FinishReason.DURATION_LIMIT)
                e = None
                lim_angle, lim_rate, lim_heave, lim_sat = self._limits
        for a in self._axes:
            lv = a.rate_lv
            if lv is not None:
                y = lv.y
                if y > lim_rate or y < -lim_rate:
                    return self._kill(KillReason.RATE_LIMIT, y, lim_rate, a.axis_id,
                                      f"{a.name} rate beyond the kill threshold")
            lv = a.angle_lv
            if lv is not None:
                y = lv.y
                if y > lim_angle or y < -lim_angle:
                    return self._kill(KillReason.ANGLE_LIMIT, y, lim_angle, a.axis_id,
                                      f"{a.name} angle beyond the kill threshold")
            lv = a.heave_lv
            if lv is not None:
                y = lv.y - a.hold_ref_height
                if y > lim_heave or y < -lim_heave:
                    return self._kill(KillReason.HEAVE_LIMIT, y, lim_heave, a.axis_id,
                                      f"{a.name} height excursion beyond the kill threshold")
        for a in self._axes:
            if e is not None and a.name == e.axis:
                cmd = self._control_experiment(a, e, t)
            elif a.outer is not None:
                o = a.outer
                o.r = a.hold_ref
                o.u = o.pid.update(o.r, o.y)
                i = a.inner
                i.r = o.u
                cmd = i.u = i.pid.update(i.r, i.y)
            else:
                i = a.inner
                i.r = a.hold_ref
                cmd = i.u = i.pid.update(i.r, i.y)
            if cmd >= a.act_hi:
                cmd = a.act_hi
                a.sat_s += ts
            elif cmd <= a.act_lo:
                cmd = a.act_lo
                a.sat_s += ts
            else:
                a.sat_s = 0.0
            a.cmd = cmd
            if a.sat_s > lim_sat:
                return self._kill(KillReason.SATURATION_TIME, a.sat_s, lim_sat, a.axis_id,
                                  f"{a.name} actuator saturated too long")

    def _control_experiment(self, a: _AxisCtl, e: Experiment, t: float) -> float:
        lv = a.levels[e.loop]
        r = e.setpoint
        if e.kind == ExperimentKind.RELAY:
            err = r - lv.y
            s = e.relay_state
            if s > 0:
                if err < -e.hysteresis:
                    s = -1
            elif err > e.hysteresis:
                s = 1
            e.relay_state = s
            out = e.bias + s * e.amplitude
            lv.u = out
        else:
            if e.kind == ExperimentKind.STEP and t >= e.step_at_s:
                r += e.amplitude
            out = lv.u = lv.pid.update(r, lv.y)
        lv.r = r
        if lv is a.outer:
            i = a.inner
            i.r = out
            out = i.u = i.pid.update(out, i.y)
        return out

    # ------------------------------------------------------------------ state changes

    def _set_state(self, new: DeviceState, text: str) -> None:
        if new != self.state:
            self.state = new
            self._emit(EventKind.STATE_CHANGED, 0, NO_AXIS, 0.0, 0.0, text)

    def _zero_outputs(self) -> None:
        for a in self._axes:
            a.cmd = 0.0
            a.latched = 0.0
            a.sat_s = 0.0
            for lv in a.levels.values():
                lv.u = 0.0
                lv.r = 0.0

    def _do_arm(self) -> None:
        for a in self._axes:
            for lv in a.levels.values():
                lv.pid.reset()
            a.sat_s = 0.0
        self._set_hold_refs()
        self.exp = None
        self._update_limits()
        self._set_state(DeviceState.ARMED, "armed")

    def _kill(self, reason: KillReason, value: float, threshold: float, axis: int,
              text: str) -> None:
        """Outputs to zero now (before this tick's plant step), latch KILLED, send events in the
        order of protocol/SPEC.md 11.2."""
        self._zero_outputs()
        e = self.exp
        was = self.state
        self.state = DeviceState.KILLED
        self._token = None
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
        self._update_limits()
        if self.state == DeviceState.RUNNING and set_state:
            self.state = DeviceState.ARMED
        self._emit(EventKind.EXPERIMENT_FINISHED, int(reason), _AXIS_ID[e.axis], 0.0, 0.0,
                   f"experiment {e.tag} finished: {reason.name.lower()}", tag=e.tag)
        if set_state and self.state == DeviceState.ARMED:
            # back to holding: level attitude, the height where the body is now
            if a.kind == "heave":
                a.hold_ref = a.hold_ref_height = a.outer.y
            self._emit(EventKind.STATE_CHANGED, 0, NO_AXIS, 0.0, 0.0, "experiment finished")

    def _emit(self, kind: EventKind, reason: int, axis: int, value: float, threshold: float,
              text: str, tag: int = 0) -> None:
        st = self.state
        ev = DeviceEvent(self.time_us, kind, st, reason, axis, float(value), float(threshold),
                         tag, text[:64])
        self.events.append(ev)
        self.stats["events_sent"] += 1
        self._send(M.Event(time_us=ev.time_us, kind=int(kind), state=int(st), reason=int(reason),
                           axis=axis, value=_f32(value), threshold=_f32(threshold), tag=tag,
                           text=ev.text))

    # ------------------------------------------------------------------ protocol server

    def _send(self, msg, seq: int | None = None, reply: bool = False) -> bytes:
        if seq is None:
            seq = self._seq
            self._seq = (self._seq + 1) & 0xFFFF
        data = codec.encode(msg, seq, M.FLAG_REPLY if reply else 0)
        if reply:
            self._last_reply = data
            self._queue(data)
        elif self._deferred is not None:
            self._deferred.append(data)  # events a request causes follow its reply
        else:
            self._queue(data)
        return data

    def _queue(self, data: bytes) -> None:
        self._out += data
        over = len(self._out) - OUTPUT_BUFFER_LIMIT
        if over > 0:
            del self._out[:over]
            self.stats["output_dropped"] += over

    def _refuse(self, frame, code: RefuseCode, text: str, detail: int = 0) -> bytes:
        self.stats["refused"] += 1
        return self._send(M.Refuse(refused_type=frame.type_id & 0xFF, code=int(code),
                                   detail=detail & 0xFFFFFFFF, text=text[:64]),
                          frame.seq, reply=True)

    def _ack(self, frame) -> bytes:
        return self._send(M.Ack(acked_type=frame.type_id, state=int(self.state)), frame.seq,
                          reply=True)

    def _handle_frame(self, frame) -> None:
        """protocol/SPEC.md 11.1, steps 1-9."""
        self.stats["frames_in"] += 1
        self._last_reply = b""
        self._deferred = []
        try:
            self._process(frame)
        finally:
            deferred, self._deferred = self._deferred, None
        if self._last_reply:
            self._reply_cache[frame.seq] = (frame.type_id, self._last_reply)
            self._reply_cache.move_to_end(frame.seq)
            while len(self._reply_cache) > REPLY_CACHE_SIZE:
                self._reply_cache.popitem(last=False)
        for data in deferred:
            self._queue(data)

    def _process(self, frame) -> None:
        if frame.major != M.PROTOCOL_MAJOR:
            self._refuse(frame, RefuseCode.VERSION,
                         f"protocol major {frame.major} not supported; device speaks "
                         f"{M.PROTOCOL_MAJOR}.{M.PROTOCOL_MINOR}", frame.version)
            return
        self._prev_rx_link = self._last_rx_link
        self._last_rx_link = self._link_time  # any intact frame refreshes the watchdog
        if frame.flags & M.FLAG_RETRY:
            hit = self._reply_cache.get(frame.seq)
            if hit is not None:
                self.stats["replies_from_cache"] += 1
                self._queue(hit[1])
                return
        spec = M.MESSAGES.get(frame.type_id)
        if spec is None:
            self._refuse(frame, RefuseCode.UNKNOWN_TYPE,
                         f"unknown message type 0x{frame.type_id:02x}", frame.type_id)
            return
        if spec.sender != "host":
            self._refuse(frame, RefuseCode.NOT_A_REQUEST,
                         f"{spec.name} is sent by a device, not accepted by one", frame.type_id)
            return
        msg = frame.msg
        if msg is None:
            if spec.cls is M.Kill:  # never refused: missing fields count as 0
                msg = M.Kill(reason=0, value=0.0)
            else:
                self._refuse(frame, RefuseCode.MALFORMED, frame.error or "malformed payload")
                return
        if isinstance(msg, M.Keepalive):
            return
        self.stats["requests"] += 1
        st = self.state
        if st not in spec.legal_in:
            if st == DeviceState.KILLED:
                code, text = RefuseCode.KILL_LATCHED, "a kill is latched: send kill_clear first"
            elif st == DeviceState.RUNNING and spec.cls in (M.SettingWrite, M.ExperimentStart):
                code, text = RefuseCode.BUSY, "an experiment is running: stop it first"
            else:
                code, text = RefuseCode.WRONG_STATE, f"{spec.name} not legal in state {st.name}"
            self._refuse(frame, code, text, int(st))
            return
        getattr(self, "_on_" + spec.name)(frame, msg)

    # -- handlers, one per host message of the table

    def _on_hello(self, frame, msg) -> None:
        self._reply_cache.clear()
        caps = (M.Capability.RELAY | M.Capability.STEP | M.Capability.HOLD
                | M.Capability.PERSIST | M.Capability.KILL_BUTTON
                | M.Capability.BACK_CALCULATION | M.Capability.RELAY_ADJUST)
        axes = tuple(M.AxisInfo(a.axis_id, sum(1 << _LOOP_ID[lv] for lv in a.levels))
                     for a in sorted(self._axes, key=lambda x: x.axis_id))
        self._send(M.HelloReply(device_id=self.scenario.device_id[:64],
                                firmware_version=FIRMWARE_VERSION,
                                protocol_major=M.PROTOCOL_MAJOR, protocol_minor=M.PROTOCOL_MINOR,
                                loop_rate_hz=self.loop_rate_hz, capabilities=int(caps),
                                setting_count=len(self.settings), axes=axes),
                   frame.seq, reply=True)

    def _on_kill(self, frame, msg) -> None:
        reason = msg.reason
        name = KillReason(reason).name.lower() if reason in KillReason._value2member_map_ \
            else f"reason {reason}"
        self._kill(reason, msg.value, 0.0, NO_AXIS, f"host kill: {name}")
        self._ack(frame)

    def _on_setting_describe(self, frame, msg) -> None:
        defs = self.settings.defs
        if not 0 <= msg.index < len(defs):
            self._refuse(frame, RefuseCode.UNKNOWN_SETTING,
                         f"no setting at index {msg.index}; indexes 0..{len(defs) - 1}",
                         msg.index)
            return
        d = defs[msg.index]
        self._send(M.SettingInfo(index=d.index, setting_id=d.setting_id, name=d.name,
                                 type=int(d.type), unit=d.unit, minimum=d.minimum,
                                 maximum=d.maximum, default=d.default, flags=d.flags),
                   frame.seq, reply=True)

    def _on_setting_read(self, frame, msg) -> None:
        d = self.settings.by_id.get(msg.setting_id)
        if d is None:
            self._refuse(frame, RefuseCode.UNKNOWN_SETTING, f"no setting with id {msg.setting_id}",
                         msg.setting_id)
            return
        self._send(M.SettingValue(setting_id=d.setting_id, value=self.settings.values[d.name]),
                   frame.seq, reply=True)

    def _on_setting_write(self, frame, msg) -> None:
        d = self.settings.by_id.get(msg.setting_id)
        if d is None:
            self._refuse(frame, RefuseCode.UNKNOWN_SETTING, f"no setting with id {msg.setting_id}",
                         msg.setting_id)
            return
        if d.flags & M.SettingFlags.READ_ONLY:
            self._refuse(frame, RefuseCode.READ_ONLY, f"{d.name} is read-only", d.setting_id)
            return
        if d.flags & M.SettingFlags.DISARMED_ONLY and self.state != DeviceState.DISARMED:
            self._refuse(frame, RefuseCode.WRONG_STATE, f"{d.name} may only be written while "
                         f"disarmed", d.setting_id)
            return
        err = self.settings.check(d, msg.value)
        if err:
            self._refuse(frame, RefuseCode.OUT_OF_BOUNDS, err, d.setting_id)
            return
        self.settings.values[d.name] = float(msg.value)
        self._apply_setting(d.name)
        self._send(M.SettingValue(setting_id=d.setting_id, value=self.settings.values[d.name]),
                   frame.seq, reply=True)

    def _on_settings_persist(self, frame, msg) -> None:
        values = dict(self.settings.values)
        if self.on_persist is not None:
            try:
                self.on_persist(values)  # the store file (see mock_device.store)
            except OSError as exc:
                self._refuse(frame, RefuseCode.STORAGE, f"persist failed: {exc}")
                return
        self.persisted = values  # the mock's non-volatile copy
        self._ack(frame)

    def _on_arm_request(self, frame, msg) -> None:
        self._token = int(self._rng.integers(1, 0xFFFFFFFF))
        self._token_expiry = self._link_time + ARM_TOKEN_VALID_MS / 1000.0
        self._send(M.ArmChallenge(token=self._token, valid_ms=ARM_TOKEN_VALID_MS), frame.seq,
                   reply=True)

    def _on_arm_confirm(self, frame, msg) -> None:
        token, self._token = self._token, None  # one confirm per token, accepted or refused
        if token is None:
            self._refuse(frame, RefuseCode.INTERLOCK, "no arming challenge: send arm_request")
            return
        if self._link_time > self._token_expiry:
            self._refuse(frame, RefuseCode.INTERLOCK, "arming token expired: request a new one")
            return
        if msg.response != (token ^ 0xFFFFFFFF):
            self._refuse(frame, RefuseCode.INTERLOCK, "wrong response to the arming token")
            return
        if msg.operator_confirmed != 1:
            self._refuse(frame, RefuseCode.INTERLOCK, "operator did not confirm the cautions")
            return
        if self._link_time - self._prev_rx_link > self.settings.values["watchdog_s"]:
            self._refuse(frame, RefuseCode.NO_KEEPALIVE,
                         "no host frame within watchdog_s before arming: send keepalives")
            return
        self._ack_state_after(frame, DeviceState.ARMED)
        self._do_arm()

    def _ack_state_after(self, frame, state: DeviceState) -> None:
        """Ack carrying the state the request leads to (the reply precedes its events)."""
        self._send(M.Ack(acked_type=frame.type_id, state=int(state)), frame.seq, reply=True)

    def _on_disarm(self, frame, msg) -> None:
        after = self.state if self.state in (DeviceState.DISARMED, DeviceState.KILLED) \
            else DeviceState.DISARMED
        self._ack_state_after(frame, after)
        self.disarm()

    def _check_experiment(self, msg) -> tuple[RefuseCode | None, str]:
        try:
            kind = ExperimentKind(msg.kind)
        except ValueError:
            return RefuseCode.UNSUPPORTED, f"unknown experiment kind {msg.kind}"
        a = self._by_id.get(msg.axis)
        if a is None:
            return RefuseCode.UNSUPPORTED, (f"axis {msg.axis} not on this board; axes: "
                                            f"{', '.join(x.name for x in self._axes)}")
        loop = _LOOP_NAME.get(msg.loop)
        if loop not in a.levels:
            return RefuseCode.UNSUPPORTED, (f"{a.name} has no loop level {msg.loop}; levels: "
                                            f"{', '.join(a.levels)}")
        if msg.tag == 0:
            return RefuseCode.BAD_PARAMETER, "tag must be non-zero"
        vals = (msg.amplitude, msg.hysteresis, msg.bias, msg.setpoint, msg.step_at_s,
                msg.duration_s, msg.kill_angle_rad, msg.kill_rate_rad_s, msg.kill_heave_m,
                msg.kill_saturation_s)
        if not all(math.isfinite(v) for v in vals):
            return RefuseCode.BAD_PARAMETER, "experiment parameters must be finite numbers"
        if msg.duration_s <= 0:
            return RefuseCode.BAD_PARAMETER, "duration_s must be > 0"
        if kind == ExperimentKind.RELAY and msg.amplitude <= 0:
            return RefuseCode.BAD_PARAMETER, "relay amplitude must be > 0"
        if kind == ExperimentKind.STEP and not 0 <= msg.step_at_s < msg.duration_s:
            return RefuseCode.BAD_PARAMETER, "step_at_s must be in [0, duration_s)"
        if min(msg.kill_angle_rad, msg.kill_rate_rad_s, msg.kill_heave_m,
               msg.kill_saturation_s) < 0:
            return RefuseCode.BAD_PARAMETER, "kill thresholds must be >= 0"
        return None, ""

    def _do_experiment_start(self, msg) -> None:
        kind = ExperimentKind(msg.kind)
        a = self._by_id[msg.axis]
        loop = _LOOP_NAME[msg.loop]
        e = Experiment(
            tag=msg.tag, kind=kind, axis=a.name, loop=loop, amplitude=msg.amplitude,
            hysteresis=msg.hysteresis, bias=msg.bias, setpoint=msg.setpoint,
            step_at_s=msg.step_at_s, duration_s=msg.duration_s,
            kill_angle_rad=msg.kill_angle_rad, kill_rate_rad_s=msg.kill_rate_rad_s,
            kill_heave_m=msg.kill_heave_m, kill_saturation_s=msg.kill_saturation_s,
            start_tick=self.tick_count)
        lv = a.levels[loop]
        e.relay_state = 1 if (e.setpoint - lv.y) >= 0 else -1
        # bumpless: the experiment level keeps its integrator, loses only its derivative state
        lv.pid.reset(integral=lv.pid.i)
        a.sat_s = 0.0
        if a.kind == "heave":
            a.hold_ref_height = a.outer.y
        elif a.kind == "tf" and a.tf_loop == "heave":
            a.hold_ref_height = a.inner.y
        self.exp = e
        self._update_limits()
        self.state = DeviceState.RUNNING
        self._emit(EventKind.EXPERIMENT_STARTED, int(kind), a.axis_id, 0.0, 0.0,
                   f"{kind.name.lower()} on {a.name}.{loop}", tag=e.tag)
        self._emit(EventKind.STATE_CHANGED, 0, NO_AXIS, 0.0, 0.0, f"experiment {e.tag} running")

    def _on_experiment_start(self, frame, msg) -> None:
        code, text = self._check_experiment(msg)
        if code is not None:
            self._refuse(frame, code, text)
            return
        self._ack_state_after(frame, DeviceState.RUNNING)
        self._do_experiment_start(msg)

    def _on_experiment_stop(self, frame, msg) -> None:
        after = DeviceState.ARMED if self.state == DeviceState.RUNNING else self.state
        self._ack_state_after(frame, after)
        if self.exp is not None:  # any tag (protocol/SPEC.md 13.1)
            self._finish(FinishReason.STOPPED)

    def _on_experiment_adjust(self, frame, msg) -> None:
        e = self.exp
        if e is None or msg.tag != e.tag:
            self._refuse(frame, RefuseCode.BAD_PARAMETER,
                         f"tag {msg.tag} is not the running experiment")
            return
        if not all(math.isfinite(v) for v in (msg.amplitude, msg.hysteresis, msg.bias)) \
                or msg.amplitude <= 0:
            self._refuse(frame, RefuseCode.BAD_PARAMETER, "amplitude must be > 0, all finite")
            return
        if e.kind != ExperimentKind.RELAY:
            self._refuse(frame, RefuseCode.UNSUPPORTED, "the running experiment is not a relay")
            return
        e.amplitude, e.hysteresis, e.bias = msg.amplitude, msg.hysteresis, msg.bias
        self._ack(frame)

    def _on_kill_clear(self, frame, msg) -> None:
        after = DeviceState.DISARMED if self.state == DeviceState.KILLED else self.state
        self._ack_state_after(frame, after)
        self.clear_kill()

    def _on_telemetry_config(self, frame, msg) -> None:
        if msg.rate_hz > self.loop_rate_hz:
            self._refuse(frame, RefuseCode.BAD_PARAMETER,
                         f"rate_hz {msg.rate_hz} above the loop rate {self.loop_rate_hz}")
            return
        lacking = [i for i in range(8) if msg.axis_mask & (1 << i) and i not in self._by_id]
        if lacking:
            self._refuse(frame, RefuseCode.UNSUPPORTED,
                         f"axis_mask names axes this board lacks: {lacking}; it has "
                         f"{', '.join(a.name for a in self._axes)}", msg.axis_mask)
            return
        self.configure_telemetry(msg.rate_hz, tuple(a.name for a in self._axes
                                                    if msg.axis_mask & (1 << a.axis_id)),
                                 msg.loop)
        self._ack(frame)

    def configure_telemetry(self, rate_hz: int, axes: tuple[str, ...] | None = None,
                            loop: int = Loop.RATE) -> None:
        """Python-API telemetry setup (same effect as a TelemetryConfig request)."""
        self._tel_rate = min(int(rate_hz), self.loop_rate_hz)
        self._tel_acc = self.loop_rate_hz if rate_hz else 0  # first sample at the next tick
        self._tel_axes = sorted((a for a in self._axes if axes is None or a.name in axes),
                                key=lambda a: a.axis_id)
        self._tel_loop = int(loop)

    def _send_telemetry(self) -> None:
        e = self.exp
        samples = []
        want = _LOOP_NAME.get(self._tel_loop)
        for a in self._tel_axes:
            if e is not None and a.name == e.axis:
                lv = a.levels[e.loop]
                relay = e.relay_state if e.kind == ExperimentKind.RELAY else 0
            else:
                # an axis lacking the level reports its outer loop (protocol/SPEC.md 13.2)
                lv = a.levels.get(want) or (a.outer or a.inner)
                relay = 0
            samples.append(M.AxisSample(a.axis_id, lv.loop_id, _f32(lv.r), _f32(lv.y),
                                        _f32(lv.u), relay))
        self._tel_counter = (self._tel_counter + 1) & 0xFFFFFFFF
        self.stats["telemetry_sent"] += 1
        self._send(M.Telemetry(time_us=self.time_us, counter=self._tel_counter,
                               state=int(self.state), tag=e.tag if e is not None else 0,
                               axes=tuple(samples)))


# ------------------------------------------------------------------------- helpers


_F32_MAX = 3.4028234663852886e38


def _f32(v: float) -> float:
    """Clamp to the f32 range (NaN passes) so encoding never fails on a wild value."""
    if v > _F32_MAX:
        return _F32_MAX
    if v < -_F32_MAX:
        return -_F32_MAX
    return v


def _as_list(v) -> list:
    if v is None:
        return []
    return list(v) if isinstance(v, (list, tuple)) else [v]


def parse_stuck(spec: str) -> tuple[str, float]:
    """'roll@2.5' or 'roll.rate@2.5' -> ('roll', 2.5)."""
    try:
        where, at = str(spec).split("@")
        return where.split(".")[0], float(at)
    except ValueError:
        raise ValueError(f"stuck sensor spec {spec!r} not understood; expected AXIS@SECONDS, "
                         f"e.g. roll@2.5") from None

"""One experiment's whole lifecycle on the board, owned by one context manager.

Every step that runs something on the board (the noise hold, the heave lift-off, the relay, the
step test) goes through :class:`Experiment`, so each gets the same sequence:

1. telemetry at the loop rate for every axis, on the experiment's loop level;
2. an experiment log opened in the session log (its telemetry file fills as samples arrive);
3. the stand's buffer started; the host's safety monitor switched on (with the height reference
   on the heave loop);
4. the board's experiment started with the plan's kill thresholds;
5. polling on the board's own clock (``run_for``), with kills and the operator's stop request
   checked every poll;
6. on leaving the block, whatever happened: monitor off, the board told to stop, recording off,
   telemetry back to the idle rate; on an error the log gets the error and is closed.

A step's result goes into its log with :meth:`Experiment.finish`, which may come after the block
(the relay's log gets the analysis once it is done).

Time for experiments is the board's (telemetry ``time_us``), never the host's: the same step runs
against hardware, a real-time mock or an accelerated one.
"""

from __future__ import annotations

import threading
import time
from typing import Any

import numpy as np

from protocol.messages import Axis, ExperimentKind, Loop
from protocol.timing import sampling_delay_s

from ..errors import Cancelled, LinkError, WorkflowError
from ..plan import LoopPlan, Plan
from ..session import SessionError
from ..stand import Stand

POLL_S = 0.02
IDLE_TELEMETRY_HZ = 50
# the largest share of a hold's or step's samples that may be lost on the link before the record
# is refused (the relay's own limits are in agent.logbook.records): past it, or past a single
# gap of MAX_GAP_FRACTION of the record, a step's peak or a hold's spread is no longer measured
# but guessed (common practice, no source)
MAX_MISSING_FRACTION = 0.5
MAX_GAP_FRACTION = 0.05


def ids(lp: LoopPlan) -> tuple[int, int]:
    """The wire ids (axis, loop level) of a loop plan."""
    return int(Axis[lp.axis.upper()]), int(Loop[lp.loop.upper()])


def kill_params(plan: Plan) -> dict:
    """The board experiment's kill thresholds from the plan's limits."""
    lim = plan.limits
    return {"kill_angle_rad": lim.angle_rad, "kill_rate_rad_s": lim.rate_rad_s,
            "kill_heave_m": lim.heave_m, "kill_saturation_s": lim.saturation_s}


def wait(stand: Stand, stop: threading.Event | None, seconds: float) -> None:
    """Sleep ``seconds`` of host time in short polls; raise KillTripped on any kill and
    Cancelled when the operator's stop is set."""
    end = time.monotonic() + seconds
    while True:
        stand.check_kill()
        if stop is not None and stop.is_set():
            raise Cancelled("stopped by the operator")
        left = end - time.monotonic()
        if left <= 0:
            return
        time.sleep(min(POLL_S, left))


def device_elapsed(stand: Stand, axis_i: int) -> float:
    """Board time (s) spanned by the buffer's samples of one axis."""
    t = stand.buffer.axis(axis_i)["time_us"]
    return float((t[-1] - t[0]) * 1e-6) if len(t) > 1 else 0.0


def current_measurement(stand: Stand, axis_i: int, loop_i: int) -> float | None:
    """The latest measurement the board reported for an axis and loop level, or None."""
    for _, tel in reversed(stand.buffer.live):
        for s in tel.axes:
            if s.axis == axis_i and s.loop == loop_i:
                return float(s.measurement)
    return None


def full_rate_telemetry(stand: Stand, loop_i: int) -> None:
    """One sample per tick for every axis (the analysis assumes the loop's grid)."""
    axes = [int(Axis[a.upper()]) for a in stand.info.axes]
    stand.session.telemetry(stand.info.loop_rate_hz, axes, loop_i)


def idle_telemetry(stand: Stand, loop_i: int) -> None:
    """Between experiments a slow stream is enough for the live view; it also leaves the host
    CPU to the analysis instead of decoding telemetry nobody records. Best effort."""
    try:
        if stand.link.lost_reason is None:
            axes = [int(Axis[a.upper()]) for a in stand.info.axes]
            stand.session.telemetry(IDLE_TELEMETRY_HZ, axes, loop_i)
    except (SessionError, LinkError):
        pass


def meta(stand: Stand, lp: LoopPlan, kind: str, **extra) -> dict:
    """The experiment log's metadata (what and where), plus the step's own parameters."""
    axis_i, loop_i = ids(lp)
    rate = stand.info.loop_rate_hz
    return {"kind": kind, "axis": axis_i, "loop": loop_i, "axis_name": lp.axis,
            "loop_name": lp.loop, "sample_time_s": 1.0 / rate,
            "sampling_delay_s": sampling_delay_s(rate), **extra}


class Experiment:
    """Context manager for one experiment on the board (see the module docstring).

    Parameters
    ----------
    stand : Stand
        Connected, armed stand.
    lp : LoopPlan
        The loop the experiment runs on.
    plan : Plan
        Its kill thresholds come from ``plan.limits``.
    kind : ExperimentKind
        HOLD, RELAY or STEP.
    exp_id : str
        The experiment's id in the session log.
    log_meta : dict
        Extra metadata for the log (the step's parameters).
    reference : float, optional
        The height the host monitor measures the heave loop's excursion from.
    stop : threading.Event, optional
        The operator's gentle stop.
    """

    def __init__(self, stand: Stand, lp: LoopPlan, plan: Plan, kind: ExperimentKind,
                 exp_id: str, log_meta: dict, *, reference: float | None = None,
                 stop: threading.Event | None = None):
        self.stand, self.lp, self.plan, self.kind = stand, lp, plan, kind
        self.exp_id = exp_id
        self.axis_i, self.loop_i = ids(lp)
        self.stop = stop
        self.reference = reference
        self.tag: int | None = None
        self.started_host_s = 0.0
        self._meta = meta(stand, lp, kind.name.lower(), **log_meta)
        self._log: Any = None
        self.error_context: dict = {}  # added to the log's result when the block fails

    # ---------------------------------------------------------------- the block
    def __enter__(self) -> "Experiment":
        st = self.stand
        full_rate_telemetry(st, self.loop_i)
        if st.log is not None:
            self._log = st.log.experiment(self.exp_id, self._meta)
            st.experiment_log = self._log
        st.buffer.start()
        if st.monitor is not None:
            if self.reference is not None:
                st.monitor.set_reference(self.axis_i, self.loop_i, self.reference)
            st.monitor.active = True
        return self

    def start(self, **params: Any) -> int:
        """Start the board's experiment (kill thresholds from the plan are added)."""
        self.tag = self.stand.session.start_experiment(
            kind=self.kind, axis=self.axis_i, loop=self.loop_i, **params,
            **kill_params(self.plan))
        self.started_host_s = time.monotonic()
        return self.tag

    def __exit__(self, exc_type, exc, tb) -> None:
        st = self.stand
        if st.monitor is not None:
            st.monitor.active = False
        if self.tag is not None:
            try:
                if st.link.lost_reason is None:
                    st.session.stop_experiment(self.tag)
            except (SessionError, LinkError):
                pass
        st.stop_recording()
        idle_telemetry(st, self.loop_i)
        if exc is not None:
            self.finish({"error": str(exc) or type(exc).__name__, **self.error_context})

    # ---------------------------------------------------------------- polling
    def wait(self, seconds: float) -> None:
        """Poll for ``seconds`` of host time (kills and stop requests raise)."""
        wait(self.stand, self.stop, seconds)

    def run_for(self, seconds: float, wall_timeout_s: float | None = None) -> None:
        """Wait until the buffer holds ``seconds`` of board time for the axis.

        Raises
        ------
        WorkflowError
            When the board sent too little telemetry within ``wall_timeout_s`` of host time
            (default 30 s plus ten times the duration: a slow or stalled link).
        """
        limit = 30.0 + 10.0 * seconds if wall_timeout_s is None else wall_timeout_s
        deadline = time.monotonic() + limit
        while device_elapsed(self.stand, self.axis_i) < seconds:
            self.wait(POLL_S)
            if time.monotonic() > deadline:
                got = device_elapsed(self.stand, self.axis_i)
                raise WorkflowError(f"{self.lp.key}: the board sent too little telemetry "
                                    f"({got:.2f} s of board time in {limit:.0f} s); check "
                                    "the link")

    def missing_samples(self) -> tuple[int, int, int]:
        """(received, missing, longest gap) samples of this axis and level, from the board's
        time stamps: a step of n ticks between two samples means n - 1 were lost on the link."""
        t_us = np.sort(self.loop_columns()["time_us"])
        if t_us.size < 2:
            return int(t_us.size), 0, 0
        lost = np.clip(np.rint(np.diff(t_us) * self.stand.info.loop_rate_hz * 1e-6) - 1, 0, None)
        return int(t_us.size), int(lost.sum()), int(lost.max())

    def samples_problem(self, what: str) -> str | None:
        """Why the record cannot be judged for lost samples, or None when it can."""
        received, missing, gap = self.missing_samples()
        total = received + missing
        if missing > MAX_MISSING_FRACTION * total or gap > MAX_GAP_FRACTION * total:
            return (f"{missing} of {total} samples of the {what} were lost on the link "
                    f"(longest gap {gap} ticks; at most {MAX_MISSING_FRACTION:.0%} and gaps of "
                    f"{MAX_GAP_FRACTION:.0%} of the record can be judged); check the cable and "
                    "the link's error counts")
        return None

    def loop_columns(self) -> dict:
        """The buffer's columns of this axis and loop level."""
        cols = self.stand.buffer.axis(self.axis_i)
        sel = cols["loop"] == self.loop_i
        return {k: v[sel] for k, v in cols.items()}

    # ---------------------------------------------------------------- the record
    def finish(self, result: dict | None = None) -> None:
        """Write the step's result into its log and close it (once; later calls do nothing).
        A log that refuses the write is reported as a warning, never raised: the board's
        safety does not depend on the disk."""
        log, self._log = self._log, None
        if self.stand.experiment_log is log:
            self.stand.experiment_log = None
        if log is None:
            return
        try:
            if result is not None:
                log.result(result)
            log.close()
        except Exception as exc:  # the disk, not the board: say so; check_log stops the run
            self.stand.note_log_error(exc)

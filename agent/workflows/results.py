"""What the workflows report: progress events while they run, and their results.

``Progress`` events flow from a workflow to a shell (CLI or console) through a callback; the
results are plain records that the shells render and ``to_dict`` turns into the ``--json``
objects. Stages, loop statuses and run outcomes are enums (``StrEnum``: they print and compare as
their names, so the JSON and the logbook keep the same words).
"""

from __future__ import annotations

import enum
import math
from dataclasses import dataclass, field
from typing import Any, Callable


class Stage(enum.StrEnum):
    """Where a run is; every Progress event names one."""

    CONNECT = "connect"
    NOISE = "noise"
    RAMP = "ramp"
    RELAY = "relay"
    ANALYSIS = "analysis"
    APPLY = "apply"
    VERIFY = "verify"
    ROLLBACK = "rollback"
    INFO = "info"
    DONE = "done"


class LoopStatus(enum.StrEnum):
    """What became of one loop. ``SKIPPED``: not attempted because its inner loop failed."""

    PENDING = "pending"
    RUNNING = "running"
    TUNED = "tuned"            # identified and designed, nothing written
    APPLIED = "applied"        # written and read back, not verified
    VERIFIED = "verified"      # written and its step test passed
    ROLLED_BACK = "rolled_back"  # verification missed; the previous gains are back (read back)
    ROLLBACK_FAILED = "rollback_failed"  # the previous gains could not be confirmed on the board
    FAILED = "failed"
    KILLED = "killed"
    SKIPPED = "skipped"

    @property
    def good(self) -> bool:
        """True when the loop reached a state a run can end ``ok`` with."""
        return self in (LoopStatus.TUNED, LoopStatus.APPLIED, LoopStatus.VERIFIED)


class Outcome(enum.StrEnum):
    """How a whole run ended; each maps to one exit code (agent.errors.ExitCode)."""

    OK = "ok"
    PARTIAL = "partial"
    FAILED = "failed"
    KILLED = "killed"
    CANCELLED = "cancelled"
    ROLLBACK_FAILED = "rollback_failed"

    @property
    def exit_code(self) -> int:
        from ..errors import ExitCode
        return int({Outcome.OK: ExitCode.OK, Outcome.PARTIAL: ExitCode.PARTIAL,
                    Outcome.FAILED: ExitCode.FAILED, Outcome.KILLED: ExitCode.KILLED,
                    Outcome.CANCELLED: ExitCode.INTERRUPTED,
                    Outcome.ROLLBACK_FAILED: ExitCode.ROLLBACK_FAILED}[self])


@dataclass(frozen=True)
class Progress:
    """One progress event: the stage, a line for people, the loop ("roll.rate") when it is about
    one, the fraction of the whole run when known, and the figures behind the line."""

    stage: Stage
    message: str
    loop: str | None = None
    fraction: float | None = None
    data: dict = field(default_factory=dict)


ProgressFn = Callable[[Progress], None]


def quiet(_: Progress) -> None:
    """A progress callback that shows nothing."""


def finite(x) -> float | None:
    """``float(x)`` when it is a finite number, else None (for JSON)."""
    try:
        x = float(x)
    except (TypeError, ValueError):
        return None
    return x if math.isfinite(x) else None


@dataclass
class LoopResult:
    """Everything one loop's tuning produced. Mutable while its workflow runs; ``to_dict`` is the
    ``tune --json`` object."""

    key: str
    axis: str
    loop: str
    controller: str
    status: LoopStatus = LoopStatus.PENDING
    noise_std: float = float("nan")
    trim: float = float("nan")
    hysteresis: float = 0.0
    relay: dict = field(default_factory=dict)
    identification: Any = None  # analysis.Identification
    tuning: Any = None  # analysis.TuningResult
    chosen: Any = None  # analysis.Candidate
    previous_gains: dict = field(default_factory=dict)
    applied_gains: dict = field(default_factory=dict)  # as read back from the board
    verification: dict | None = None
    cross_coupling: dict = field(default_factory=dict)
    experiments: list = field(default_factory=list)
    message: str = ""
    bandwidth_rad_s: float = float("nan")
    first_try: dict | None = None  # the recommended gains' failed step, when a fallback ran
    operating_point: float = 0.0  # the setpoint the loop was tuned and verified at
    analysis_input: Any = None  # the AnalysisInput the design came from

    def all_candidates(self) -> list:
        """The tuning's candidates, plus the chosen one when it came from elsewhere (the robust
        fallback tried after a missed step), so that ``chosen`` always names one of them."""
        cands = list(self.tuning.candidates) if self.tuning is not None else []
        if self.chosen is not None and self.chosen.rule not in {c.rule for c in cands}:
            cands.append(self.chosen)
        return cands

    def to_dict(self, session_path: str | None = None) -> dict:
        """The loop's result as JSON-ready values (non-finite numbers become None)."""
        ident = self.identification
        d: dict[str, Any] = {"loop": self.key, "axis": self.axis, "level": self.loop,
                             "controller": self.controller, "status": str(self.status),
                             "message": self.message, "noise_std": finite(self.noise_std),
                             "trim": finite(self.trim), "hysteresis": finite(self.hysteresis),
                             "relay": self.relay, "cross_coupling": self.cross_coupling,
                             "experiments": self.experiments, "session": session_path}
        if ident is not None:
            d["ultimate_gain"] = finite(ident.best.ku)
            d["ultimate_period_s"] = finite(ident.best.tu_s)
            d["ultimate_basis"] = ident.best.basis
            d["ultimate_method"] = ident.best.method
            d["model"] = {"kind": ident.model.kind,
                          "parameters": {k: finite(v) for k, v in ident.model.params.items()},
                          "normalized_delay": finite(ident.model.normalized_delay),
                          "rmse": finite(ident.model.rmse)}
        if self.tuning is not None:
            d["candidates"] = [{"rule": c.rule, "kp": finite(c.kp), "ki": finite(c.ki),
                                "kd": finite(c.kd), "tf_s": finite(c.tf_s), "b": finite(c.b),
                                "ms": finite(c.ms), "gm": finite(c.gm),
                                "pm_deg": finite(c.pm_deg),
                                "output_noise": finite(c.output_noise)}
                               for c in self.all_candidates()]
            d["recommended"] = self.tuning.recommended
        if self.chosen is not None:
            d["chosen"] = self.chosen.rule
        d["previous_gains"] = self.previous_gains
        d["applied_gains"] = self.applied_gains
        d["verification"] = ({k: v for k, v in self.verification.items() if k != "predicted"}
                             if self.verification else None)  # the curve stays in the log
        d["bandwidth_rad_s"] = finite(self.bandwidth_rad_s)
        if self.first_try is not None:
            d["first_try"] = self.first_try
        return d


@dataclass
class StandResult:
    """A whole run: every loop's result, the cascade checks, the outcome and the kills."""

    loops: list[LoopResult]
    cascade: list[dict] = field(default_factory=list)
    outcome: Outcome = Outcome.OK
    message: str = ""
    session_path: str | None = None
    kills: list = field(default_factory=list)

    def to_dict(self) -> dict:
        """The ``autotune --json`` object."""
        return {"outcome": str(self.outcome), "message": self.message,
                "session": self.session_path,
                "loops": [lr.to_dict(self.session_path) for lr in self.loops],
                "cascade": self.cascade, "kills": self.kills}

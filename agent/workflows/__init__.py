"""The steps of a tuning run, one module per step; the CLI and the console reach them through
:mod:`agent.operations`.

results     Progress, LoopResult, StandResult and their enums (Stage, LoopStatus, Outcome)
experiment  Experiment: one experiment's whole lifecycle on the board (used by every step)
hold        noise_check (noise and trim), lift_off (heave: off the bottom stop)
relay       relay_experiment: ramp, centring, convergence; the AnalysisInput of the window
worker      the analysis process (identify and tune off the host's I/O threads)
gains       gains_of, current_gains, apply_gains, rollback: one bounds-checked write path
verify      plan_step, verify_step, judge_step
loop        tune_loop: one loop end to end (with the fallback candidate)
cascade     autotune: the whole plan in cascade order; cascade_checks

Every step takes a connected ``Stand``, reports through ``progress(Progress)`` and honours
``stop`` (a threading.Event the operator sets to end the run gently). Kills are not gentle: any
kill — board trip, host monitor, operator key, link loss — raises ``KillTripped`` out of the
running step within one poll (20 ms).
"""

from ..errors import Cancelled, WorkflowError
from .cascade import autotune, cascade_checks, outcome_of, safe_disarm
from .experiment import POLL_S, Experiment, current_measurement
from .gains import GAIN_KEYS, apply_gains, current_gains, gains_of, rollback, write_gains
from .hold import HOLD_S, lift_off, noise_check
from .loop import FALLBACK_MS, fallback_candidate, tune_loop, verify_applied
from .relay import RelayRun, relay_experiment
from .results import (LoopResult, LoopStatus, Outcome, Progress, ProgressFn, Stage,
                      StandResult, quiet)
from .verify import StepPlan, judge_step, plan_step, verify_step

__all__ = ["Cancelled", "WorkflowError", "autotune", "cascade_checks", "outcome_of",
           "safe_disarm", "POLL_S", "Experiment", "current_measurement", "GAIN_KEYS",
           "apply_gains", "current_gains", "gains_of", "rollback", "write_gains", "HOLD_S",
           "lift_off", "noise_check", "FALLBACK_MS", "fallback_candidate", "tune_loop",
           "verify_applied", "RelayRun", "relay_experiment", "LoopResult", "LoopStatus",
           "Outcome", "Progress", "ProgressFn", "Stage", "StandResult", "quiet", "StepPlan",
           "judge_step", "plan_step", "verify_step"]

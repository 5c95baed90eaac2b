"""Pure relay-autotune analysis: identification and tuning (arrays in, frozen results out).

One module per idea:

``records``    RelayRecord and RecordError (validation with reasons a person understands)
``lti``        exact zero-order-hold discretisation with dead time, frequency response
``simulate``   exact sampled relay loop simulation (for tests, benches and demos)
``cycles``     switching instants, periods, stationarity, asymmetry
``ultimate``   ultimate point by describing function, hysteresis correction, first harmonic
``models``     FOPDT / SOPDT / IPDT and third-order, zero and integrating families:
               whole-waveform fits and model choice
``identify``   the identification pipeline
``controller`` the board's PID form and its discretisation
``robustness`` gain/phase margins and maximum sensitivity
``predict``    step responses on a model, measured step metrics, loop bandwidth
``rules``      Ziegler–Nichols, Tyreus–Luyben, Åström–Hägglund, AMIGO
``design``     IAE-optimal PI/PID/PD under a maximum-sensitivity constraint
``tuning``     candidates with margins, predictions and discrete gains; the recommendation
``cascade``    inner/outer bandwidth ratio check
``supervisor`` the relay supervisor: amplitude ramp, bias centring, convergence, precision

No I/O, no threads, no clock.
"""

from .cascade import CascadeCheck, cascade_check
from .cycles import CycleStats, detect_cycles
from .identify import Identification, identify
from .models import Model
from .predict import (
    StepMetrics,
    StepPrediction,
    loop_bandwidth,
    predict_step,
    step_metrics,
)
from .records import RecordError, RelayRecord
from .simulate import simulate_relay
from .supervisor import Action, Decision, Reason, RelaySupervisor
from .tuning import Candidate, TuningResult, tune
from .ultimate import UltimatePoint

__all__ = [
    "Action",
    "Candidate",
    "CascadeCheck",
    "CycleStats",
    "Decision",
    "Identification",
    "Model",
    "Reason",
    "RecordError",
    "RelayRecord",
    "RelaySupervisor",
    "StepMetrics",
    "StepPrediction",
    "TuningResult",
    "UltimatePoint",
    "cascade_check",
    "detect_cycles",
    "identify",
    "loop_bandwidth",
    "predict_step",
    "simulate_relay",
    "step_metrics",
    "tune",
]

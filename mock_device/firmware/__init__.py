"""Firmware of the simulated flight board: a fixed-rate tick with the PID cascade, on-board
experiments, safety and the protocol v1 server.

Modules (one idea each):

* ``board``      -- :class:`Firmware`: device state and the tick order (see its docstring);
* ``axes``       -- one controller class per axis kind (rotation, heave, generic plant): reads,
                    holds, and the one table of kill thresholds with its single check;
* ``experiment`` -- ExperimentStart checks and the relay / step / hold output of a level;
* ``server``     -- the protocol server: SPEC 11.1 processing, the reply cache, a dispatch table
                    built from the message table;
* ``telemetry``  -- telemetry rate and samples;
* ``outbox``     -- the bounded output buffer that never blocks the tick on the link;
* ``quirks``     -- test-only deviations from the spec (the conformance suite's own tests).

The names other code imports are re-exported here.
"""

from ..faults import parse_stuck
from .axes import NO_AXIS, STUCK_TICKS, THRESHOLDS, Threshold
from .board import DeviceEvent, Firmware
from .experiment import Experiment
from .outbox import OUTPUT_BUFFER_LIMIT
from .quirks import QUIRKS
from .server import ARM_TOKEN_VALID_MS, FIRMWARE_VERSION, REPLY_CACHE_SIZE

__all__ = ["ARM_TOKEN_VALID_MS", "FIRMWARE_VERSION", "NO_AXIS", "OUTPUT_BUFFER_LIMIT", "QUIRKS",
           "REPLY_CACHE_SIZE", "STUCK_TICKS", "THRESHOLDS", "DeviceEvent", "Experiment",
           "Firmware", "Threshold", "parse_stuck"]

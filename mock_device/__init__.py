"""Simulated flight board on a tethered test stand (invented stands, not real hardware).

Modules: ``plant`` (pure physics), ``pid`` (pure discrete PID), ``settings`` (the settings
table), ``scenarios`` (TOML stands and their linearised ground truth), ``firmware`` (fixed-rate
tick: cascade, experiments, safety, protocol v1 server), ``transports`` (pty, TCP, in-process),
``faults`` (fault injection), ``runner`` (clock and background thread), ``cli``
(``tetherloop mock``), ``hostclient`` (a minimal synchronous client for the mock's own tests).
See mock_device/README.md.
"""

from .scenarios import Scenario, ScenarioError, list_scenarios, load_scenario  # noqa: F401


def start_mock(*args, **kwargs):
    """Shortcut for :func:`mock_device.runner.start_mock`."""
    from .runner import start_mock as _start

    return _start(*args, **kwargs)

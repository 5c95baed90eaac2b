"""Timing facts of a conforming board that both sides of the link rely on.

A board samples its sensors at the start of tick k, computes the controller output from them and
latches that output at the start of tick k+1, where it is held for one tick (a zero-order hold).
As a controller sees it, the plant is therefore delayed by one tick (the output applied on the
next tick) plus half a tick (the average delay of the zero-order hold): 1.5 ticks in all. The
host removes this delay to report the plant's ultimate point, and the simulated board adds it to
its continuous physics; both read it from here.
"""

from __future__ import annotations

SAMPLING_DELAY_TICKS = 1.5


def sampling_delay_s(loop_rate_hz: float) -> float:
    """The board's sampling delay in seconds at a given control rate.

    Parameters
    ----------
    loop_rate_hz : float
        The board's control loop rate (ticks per second), > 0.

    Returns
    -------
    float
        ``SAMPLING_DELAY_TICKS / loop_rate_hz``.

    Raises
    ------
    ValueError
        If the rate is not a positive finite number.
    """
    rate = float(loop_rate_hz)
    if not rate > 0 or rate == float("inf"):
        raise ValueError(f"loop rate must be a positive number of ticks per second, got {loop_rate_hz!r}")
    return SAMPLING_DELAY_TICKS / rate

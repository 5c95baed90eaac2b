"""Simulated flight board on a tethered test stand (invented stands, not real hardware)."""

"""Discrete PID of the simulated board: pure, scalar, allocation-free per tick.

Parallel form with setpoint weighting and derivative on measurement (Astrom & Hagglund 2006,
Advanced PID Control, ch. 3), backward-Euler discretisation at sample time ``ts``::

    P[k] = kp * (b*r[k] - y[k])
    D[k] = tf/(tf+ts) * D[k-1] + kd/(tf+ts) * (y[k] - y[k-1])     # filtered kd*dy/dt
    v[k] = ff + P[k] + I[k] - D[k]
    u[k] = clip(v[k], lo, hi)          lo, hi = ff -/+ out_limit, intersected with the actuator
    I[k+1] = clip(I[k] + ki*ts*(r[k]-y[k]) + aw, -i_limit, +i_limit)

Anti-windup ``aw``: mode 0 (clamping / conditional integration) skips the integration step while
``u`` is saturated and the error pushes further into saturation; mode 1 (back-calculation) adds
``ts/aw_tt * (u[k] - v[k])``. ``i_limit`` <= 0 means no integrator clamp. The derivative term
starts from the first measurement (no derivative kick on the first tick).
"""

from __future__ import annotations


class Pid:
    """One loop's discrete PID. Gains are plain attributes; call :meth:`configure` after a change."""

    __slots__ = ("ts", "kp", "ki", "kd", "tf", "b", "out_limit", "i_limit", "aw_mode", "aw_tt",
                 "ff", "act_lo", "act_hi", "lo", "hi", "_ad", "_bd", "_kits", "_aw_k",
                 "i", "d", "y_prev", "u", "v", "saturated", "_fresh")

    def __init__(self, ts: float, act_lo: float = float("-inf"), act_hi: float = float("inf")):
        self.ts = ts
        self.kp = self.ki = self.kd = 0.0
        self.tf = 0.0
        self.b = 1.0
        self.out_limit = float("inf")
        self.i_limit = 0.0
        self.aw_mode = 0
        self.aw_tt = 1.0
        self.ff = 0.0
        self.act_lo = act_lo
        self.act_hi = act_hi
        self.reset()
        self.configure()

    def configure(self) -> None:
        """Recompute derived coefficients after gains or limits changed (state is kept)."""
        ts = self.ts
        self._ad = self.tf / (self.tf + ts)
        self._bd = self.kd / (self.tf + ts)
        self._kits = self.ki * ts
        self._aw_k = ts / self.aw_tt if self.aw_tt > 0 else 0.0
        lo = self.ff - self.out_limit
        hi = self.ff + self.out_limit
        self.lo = max(lo, self.act_lo)
        self.hi = min(hi, self.act_hi)

    @property
    def running(self) -> bool:
        """True once the controller has run since its last reset."""
        return not self._fresh

    def reset(self, integral: float = 0.0) -> None:
        """Clear the state (bumpless start: the integrator may be preloaded)."""
        self.i = integral
        self.d = 0.0
        self.y_prev = 0.0
        self.u = 0.0
        self.v = 0.0
        self.saturated = False
        self._fresh = True

    def update(self, r: float, y: float) -> float:
        """One tick: setpoint ``r``, measurement ``y`` -> saturated output ``u``."""
        if self._fresh:
            self.y_prev = y
            self._fresh = False
        if self._bd or self.d:
            self.d = self._ad * self.d + self._bd * (y - self.y_prev)
        self.y_prev = y
        e = r - y
        v = self.ff + self.kp * (self.b * r - y) + self.i - self.d
        hi, lo = self.hi, self.lo
        if v > hi:
            u = hi
            sat = True
        elif v < lo:
            u = lo
            sat = True
        else:
            u = v
            sat = False
        if self._kits:
            di = self._kits * e
            if self.aw_mode == 1:
                i = self.i + di + self._aw_k * (u - v)
            elif sat and ((v > hi and di > 0.0) or (v < lo and di < 0.0)):
                i = self.i
            else:
                i = self.i + di
            il = self.i_limit
            if il > 0.0:
                i = il if i > il else (-il if i < -il else i)
            self.i = i
        self.u = u
        self.v = v
        self.saturated = sat
        return u

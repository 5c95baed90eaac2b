"""Physics of the invented test stands: pure, deterministic numerics (no I/O, no clock, no threads).

Three kinds of plant, each advanced one controller tick at a time with the actuator command that
was latched on the board's outputs during that tick:

* :class:`RotationAxis` -- one rotation axis (roll, pitch or yaw) of a body on a gimbal stand.
  State ``[m, w, th]``: motor state ``m`` (normalised command units, first-order lag of time
  constant ``motor_tau_s``), angular rate ``w`` (rad/s), angle ``th`` (rad)::

      m'  = (u_eff - m) / motor_tau_s
      J w' = K*m - b*w - k*th + tau_extra
      th' = w

  with ``K = torque_per_unit_nm`` and ``k = m_p*g*cg_below_m`` (pendulum stiffness of a centre of
  gravity below the pivot). The linear part is discretised exactly (zero-order hold, matrix
  exponential); ``tau_extra`` -- Coulomb friction, the pendulum's ``sin`` non-linearity, the bias
  torque of a lateral centre-of-gravity offset (``m_p*g*cg_lateral_m*cos th``), a constant
  disturbance torque, a weaker motor in one direction and cross-coupling from the other axes -- is
  evaluated at the start of each tick and held over the tick. The actuator path is: command
  clipped to +/- ``output_limit`` -> quantised to ``quant_step`` -> dead band -> motor lag.
  Measurements (gyro rate with noise and bias, attitude estimate with its own noise) pass through
  a pure transport delay of whole ticks (sensor filtering plus output update). A stand lock
  (``blocked``) holds the body while the motor keeps pushing.

* :class:`HeaveAxis` -- a frame on a vertical rail. State ``[T, v, h]``: thrust state (normalised),
  climb rate (m/s), height above the rail's bottom stop (m)::

      T' = (u_eff - T) / motor_tau_s
      m v' = F*T - c*v - m*g + wind
      h' = v

  Hard stops at 0 and ``rail_height_m``; wind is a constant force plus gusts (an Ornstein-Uhlenbeck
  process of standard deviation ``gust_std_n`` and correlation time ``gust_tau_s``).

* :class:`TransferFunctionPlant` -- any stable or integrating LTI plant ``num/den`` with an input
  delay, discretised exactly: ZOH on the tick and a delay of whole ticks plus a fraction
  (modified z-transform, e.g. Astrom & Wittenmark, Computer-Controlled Systems, sec. 2.3).

Every plant keeps its per-tick work in plain Python floats on precomputed matrix entries; noise is
drawn from a seeded ``numpy.random.Generator`` in blocks.
"""

from __future__ import annotations

import math
from collections import deque
from dataclasses import dataclass

import numpy as np

G_M_S2 = 9.80665  # standard gravity


# ------------------------------------------------------------------------------------- helpers


class Gauss:
    """Seeded standard-normal numbers drawn in blocks (cheap per call, deterministic)."""

    __slots__ = ("_rng", "_buf", "_i")

    def __init__(self, rng: np.random.Generator):
        self._rng = rng
        self._buf: list[float] = []
        self._i = 0

    def __call__(self) -> float:
        i = self._i
        if i >= len(self._buf):
            self._buf = self._rng.standard_normal(4096).tolist()
            i = 0
        self._i = i + 1
        return self._buf[i]


def zoh_matrices(a: np.ndarray, b: np.ndarray, ts: float, frac: float = 0.0):
    """Exact discretisation of ``x' = A x + B u`` with u held over each tick of length ``ts`` and
    delayed by ``frac*ts`` (0 <= frac < 1).

    Returns ``(Phi, Gamma0, Gamma1)`` with ``x[k+1] = Phi x[k] + Gamma0 u[k] + Gamma1 u[k-1]``
    (``Gamma1`` is zero when ``frac`` is 0).
    """
    from scipy.linalg import expm  # imported here: listing scenarios should not need scipy

    a = np.atleast_2d(np.asarray(a, float))
    b = np.asarray(b, float).reshape(a.shape[0], -1)
    n, m = b.shape

    def integral(t: float):
        big = np.zeros((n + m, n + m))
        big[:n, :n] = a
        big[:n, n:] = b
        e = expm(big * t)
        return e[:n, :n], e[:n, n:]  # e^{At}, int_0^t e^{As} ds B

    phi, _ = integral(ts)
    if frac <= 0.0:
        _, g0 = integral(ts)
        return phi, g0, np.zeros_like(g0)
    tau = frac * ts
    phi_a, g0 = integral(ts - tau)
    _, gi = integral(tau)
    return phi, g0, phi_a @ gi


def quantise(u: float, step: float) -> float:
    return round(u / step) * step if step > 0.0 else u


def dead_band(u: float, band: float) -> float:
    """Zero inside +/- band; outside, the command passes unchanged (a motor that does not start
    below a threshold)."""
    return 0.0 if -band < u < band else u


# ------------------------------------------------------------------------------------- rotation


@dataclass(frozen=True)
class RotationParams:
    """Physical parameters of one rotation axis of a gimbal stand (SI units)."""

    inertia_kg_m2: float
    torque_per_unit_nm: float  # torque of a full (1.0) differential command
    motor_tau_s: float
    viscous_nm_s_rad: float = 0.0
    coulomb_nm: float = 0.0
    pendulum_mass_kg: float = 0.0  # mass acting at the centre-of-gravity offset
    cg_below_m: float = 0.0  # vertical CG offset below the pivot (pendulum, restoring)
    cg_lateral_m: float = 0.0  # lateral CG offset (bias torque m*g*l*cos(th))
    disturbance_nm: float = 0.0  # constant disturbance torque
    motor_gain_pos: float = 1.0  # gain of the motor that pushes positive (weak motor < 1)
    motor_gain_neg: float = 1.0
    dead_band: float = 0.0
    quant_step: float = 0.0
    output_limit: float = 1.0
    sensor_delay_s: float = 0.0
    gyro_noise_std: float = 0.0  # rad/s
    gyro_bias: float = 0.0  # rad/s
    angle_noise_std: float = 0.0  # rad
    blocked: bool = False
    blocked_angle_rad: float = 0.0
    initial_angle_rad: float = 0.0

    @property
    def stiffness_nm_rad(self) -> float:
        return self.pendulum_mass_kg * G_M_S2 * self.cg_below_m

    @property
    def mean_motor_gain(self) -> float:
        return 0.5 * (self.motor_gain_pos + self.motor_gain_neg)


class RotationAxis:
    """One rotation axis, advanced tick by tick. See the module docstring for the model."""

    def __init__(self, p: RotationParams, ts: float, gauss: Gauss):
        self.p = p
        self.ts = ts
        self._g = gauss
        j = p.inertia_kg_m2
        k_stiff = p.stiffness_nm_rad
        a = np.array([[-1.0 / p.motor_tau_s, 0.0, 0.0],
                      [p.torque_per_unit_nm / j, -p.viscous_nm_s_rad / j, -k_stiff / j],
                      [0.0, 1.0, 0.0]])
        b = np.array([[1.0 / p.motor_tau_s, 0.0], [0.0, 1.0 / j], [0.0, 0.0]])
        phi, g0, _ = zoh_matrices(a, b, ts)
        self._phi = tuple(float(v) for v in phi.ravel())
        self._gam = tuple(float(v) for v in g0.ravel())
        # the rate/angle update while the motor state alone changes (stuck by static friction)
        self._stiff = k_stiff
        self._mgl_lat = p.pendulum_mass_kg * G_M_S2 * p.cg_lateral_m
        # per-tick constants as plain attributes (the tick is the hot path)
        ph, ga = self._phi, self._gam
        self._f = (ph[0], ph[3], ph[4], ph[5], ph[6], ph[7], ph[8])
        self._gm = (ga[0], ga[2], ga[3], ga[4], ga[5])
        self._lim = p.output_limit
        self._q = p.quant_step
        self._db = p.dead_band
        self._dist = p.disturbance_nm
        self._k = p.torque_per_unit_nm
        self._visc = p.viscous_nm_s_rad
        self._coul = p.coulomb_nm
        self._gpos = p.torque_per_unit_nm * (p.motor_gain_pos - 1.0)
        self._gneg = p.torque_per_unit_nm * (p.motor_gain_neg - 1.0)
        self._delay_n = max(0, int(round(p.sensor_delay_s / ts)))
        self.m = 0.0
        self.w = 0.0
        self.th = p.blocked_angle_rad if p.blocked else p.initial_angle_rad
        self._hist: deque = deque([(0.0, self.th)] * (self._delay_n + 1), maxlen=self._delay_n + 1)
        self.coupling_nm = 0.0  # torque from other axes (set by the stand each tick)
        self.blocked = p.blocked
        self.u_eff = 0.0
        self.y_rate = p.gyro_bias
        self.y_angle = self.th
        self.stuck_at: tuple[float, float] | None = None  # stuck-sensor fault: frozen readings

    @property
    def motor_torque_nm(self) -> float:
        m = self.m
        return self.p.torque_per_unit_nm * m * (self.p.motor_gain_pos if m > 0 else
                                                self.p.motor_gain_neg)

    def step(self, u: float) -> None:
        """Advance one tick with actuator command ``u`` (held over the tick)."""
        lim = self._lim
        u = lim if u > lim else (-lim if u < -lim else u)
        q = self._q
        if q:
            u = round(u / q) * q
        db = self._db
        if db and -db < u < db:
            u = 0.0
        self.u_eff = u
        m, w, th = self.m, self.w, self.th
        # torques not in the linear matrices, held over the tick
        extra = self._dist + self.coupling_nm
        if self._stiff:
            extra -= self._stiff * (math.sin(th) - th)
        if self._mgl_lat:
            extra += self._mgl_lat * math.cos(th)
        if m > 0.0:
            if self._gpos:
                extra += self._gpos * m
        elif self._gneg:
            extra += self._gneg * m
        c = self._coul
        stuck = False
        if c:
            if w > 1e-9:
                extra -= c
            elif w < -1e-9:
                extra += c
            else:
                # at rest: static friction holds unless the other torques overcome it
                drive = self._k * m - self._visc * w - self._stiff * th + extra
                if -c <= drive <= c:
                    stuck = True
                else:
                    extra -= c if drive > 0 else -c
        f0, f3, f4, f5, f6, f7, f8 = self._f
        g0, g2, g3, g4, g5 = self._gm
        m1 = f0 * m + g0 * u
        if stuck or self.blocked:
            w1, th1 = 0.0, th
        else:
            w1 = f3 * m + f4 * w + f5 * th + g2 * u + g3 * extra
            th1 = f6 * m + f7 * w + f8 * th + g4 * u + g5 * extra
            if c and w * w1 < 0.0:
                w1 = 0.0  # friction stops the body; it does not reverse it
        self.m, self.w, self.th = m1, w1, th1
        self._hist.append((w1, th1))

    def sample(self) -> None:
        """Update the delayed, noisy measurements ``y_rate`` (gyro) and ``y_angle`` (estimate)."""
        if self.stuck_at is not None:
            self.y_rate, self.y_angle = self.stuck_at
            return
        w, th = self._hist[0]
        p = self.p
        gs, an = p.gyro_noise_std, p.angle_noise_std
        self.y_rate = w + p.gyro_bias + (gs * self._g() if gs else 0.0)
        self.y_angle = th + (an * self._g() if an else 0.0)


# ------------------------------------------------------------------------------------- heave


@dataclass(frozen=True)
class HeaveParams:
    """Physical parameters of a frame on a vertical rail (SI units)."""

    mass_kg: float
    thrust_per_unit_n: float  # thrust of a full (1.0) collective command
    motor_tau_s: float
    drag_n_s_m: float = 0.0
    wind_n: float = 0.0  # constant vertical wind force (positive up)
    gust_std_n: float = 0.0
    gust_tau_s: float = 1.0
    rail_height_m: float = 2.0
    initial_height_m: float = 0.0
    dead_band: float = 0.0
    quant_step: float = 0.0
    sensor_delay_s: float = 0.0
    height_noise_std: float = 0.0  # m
    climb_noise_std: float = 0.0  # m/s
    blocked: bool = False

    @property
    def hover_command(self) -> float:
        """Command that holds the frame still in still air: m*g - wind = F*u."""
        return (self.mass_kg * G_M_S2 - self.wind_n) / self.thrust_per_unit_n


class HeaveAxis:
    """Heave axis on a rail, advanced tick by tick. See the module docstring."""

    def __init__(self, p: HeaveParams, ts: float, gauss: Gauss):
        self.p = p
        self.ts = ts
        self._g = gauss
        mass = p.mass_kg
        a = np.array([[-1.0 / p.motor_tau_s, 0.0, 0.0],
                      [p.thrust_per_unit_n / mass, -p.drag_n_s_m / mass, 0.0],
                      [0.0, 1.0, 0.0]])
        b = np.array([[1.0 / p.motor_tau_s, 0.0], [0.0, 1.0 / mass], [0.0, 0.0]])
        phi, g0, _ = zoh_matrices(a, b, ts)
        self._phi = tuple(float(v) for v in phi.ravel())
        self._gam = tuple(float(v) for v in g0.ravel())
        self._gust_a = math.exp(-ts / p.gust_tau_s) if p.gust_tau_s > 0 else 0.0
        self._gust_s = p.gust_std_n * math.sqrt(1.0 - self._gust_a ** 2)
        self._delay_n = max(0, int(round(p.sensor_delay_s / ts)))
        self.thrust = 0.0
        self.v = 0.0
        self.h = p.initial_height_m
        self.gust = 0.0
        self._hist: deque = deque([(0.0, self.h)] * (self._delay_n + 1), maxlen=self._delay_n + 1)
        self.blocked = p.blocked
        self.u_eff = 0.0
        self.y_rate = 0.0
        self.y_height = self.h
        self.stuck_at: tuple[float, float] | None = None

    def step(self, u: float) -> None:
        p = self.p
        u = 1.0 if u > 1.0 else (0.0 if u < 0.0 else u)  # thrust cannot pull down
        if p.quant_step:
            u = quantise(u, p.quant_step)
        if p.dead_band:
            u = dead_band(u, p.dead_band)
        self.u_eff = u
        if self._gust_s:
            self.gust = self._gust_a * self.gust + self._gust_s * self._g()
        extra = p.wind_n + self.gust - p.mass_kg * G_M_S2
        t, v, h = self.thrust, self.v, self.h
        f, g = self._phi, self._gam
        t1 = f[0] * t + g[0] * u
        if self.blocked:
            v1, h1 = 0.0, h
        else:
            v1 = f[3] * t + f[4] * v + g[2] * u + g[3] * extra
            h1 = f[6] * t + f[7] * v + h + g[4] * u + g[5] * extra
            if h1 <= 0.0:  # bottom stop
                h1 = 0.0
                if v1 < 0.0:
                    v1 = 0.0
            elif h1 >= p.rail_height_m:  # top stop
                h1 = p.rail_height_m
                if v1 > 0.0:
                    v1 = 0.0
        self.thrust, self.v, self.h = t1, v1, h1
        self._hist.append((v1, h1))

    def sample(self) -> None:
        if self.stuck_at is not None:
            self.y_rate, self.y_height = self.stuck_at
            return
        v, h = self._hist[0]
        p = self.p
        self.y_rate = v + (p.climb_noise_std * self._g() if p.climb_noise_std else 0.0)
        self.y_height = h + (p.height_noise_std * self._g() if p.height_noise_std else 0.0)


# ------------------------------------------------------------------------------------- generic


@dataclass(frozen=True)
class TransferFunctionParams:
    """A generic LTI plant from controller output to measurement (benchmark batteries)."""

    num: tuple[float, ...]
    den: tuple[float, ...]
    delay_s: float = 0.0
    noise_std: float = 0.0
    output_limit: float = 1.0


class TransferFunctionPlant:
    """``num/den`` with input delay ``delay_s`` (whole ticks plus a fraction), exact ZOH.

    At tick k the measurement is ``y[k] = C x[k] + D u(t_k - delay)`` plus noise; ``step(u)``
    holds ``u`` over the tick and advances the state exactly.
    """

    def __init__(self, p: TransferFunctionParams, ts: float, gauss: Gauss):
        if len(p.den) < 1 or p.den[0] == 0:
            raise ValueError("transfer function denominator must have a non-zero leading "
                             "coefficient")
        if len(p.num) > len(p.den):
            raise ValueError("transfer function must be proper (numerator degree <= denominator "
                             "degree)")
        if p.delay_s < 0:
            raise ValueError(f"delay_s must be >= 0, got {p.delay_s}")
        self.p = p
        self.ts = ts
        self._g = gauss
        delay_ticks = p.delay_s / ts
        d_ticks = int(math.floor(delay_ticks + 1e-9))
        frac = delay_ticks - d_ticks
        if frac < 1e-9:
            frac = 0.0
        if len(p.den) == 1:  # static gain
            n = 0
            phi = g0 = g1 = np.zeros((0, 0))
            c = np.zeros((1, 0))
            d = p.num[-1] / p.den[0] if p.num else 0.0
        else:
            from scipy.signal import tf2ss

            a, b, c, dm = tf2ss(list(p.num), list(p.den))
            n = a.shape[0]
            phi, g0, g1 = zoh_matrices(a, b, ts, frac)
            d = float(dm.ravel()[0]) if dm.size else 0.0
        self.n = n
        self._phi = [list(map(float, row)) for row in np.asarray(phi).reshape(n, n)]
        self._g0 = [float(v) for v in np.asarray(g0).reshape(n)]
        self._g1 = [float(v) for v in np.asarray(g1).reshape(n)]
        self._c = [float(v) for v in np.asarray(c).reshape(n)]
        self._d = float(d)
        self.d_ticks = d_ticks
        self.frac = frac
        self.x = [0.0] * n
        # inputs u[k-d_ticks-1], u[k-d_ticks] are at _u[0], _u[1] once u[k] is appended
        self._u: deque = deque([0.0] * (d_ticks + 2), maxlen=d_ticks + 2)
        self.u_eff = 0.0
        self.y = 0.0
        self.y_true = 0.0
        self.stuck_at: float | None = None
        self._update_y()

    def _update_y(self) -> None:
        x, c = self.x, self._c
        y = 0.0
        for i in range(self.n):
            y += c[i] * x[i]
        if self._d:
            # direct feed-through of the input at t - delay (buffer ends with the last held u;
            # with no delay at all the last held input stands in for the not yet computed one)
            dt = self.d_ticks
            if self.frac:
                y += self._d * self._u[-1 - dt]
            else:
                y += self._d * self._u[-dt if dt else -1]
        self.y_true = y

    def step(self, u: float) -> None:
        lim = self.p.output_limit
        u = lim if u > lim else (-lim if u < -lim else u)
        self.u_eff = u
        buf = self._u
        buf.append(u)
        u0 = buf[1]  # u[k - d]
        u1 = buf[0]  # u[k - d - 1]
        x, phi, g0, g1 = self.x, self._phi, self._g0, self._g1
        n = self.n
        new = [0.0] * n
        for i in range(n):
            row = phi[i]
            s = g0[i] * u0 + g1[i] * u1
            for j in range(n):
                s += row[j] * x[j]
            new[i] = s
        self.x = new
        self._update_y()

    def sample(self) -> None:
        if self.stuck_at is not None:
            self.y = self.stuck_at
            return
        ns = self.p.noise_std
        self.y = self.y_true + (ns * self._g() if ns else 0.0)

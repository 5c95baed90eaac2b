"""Scenarios: invented test stands described in TOML, and their linearised ground truth.

A scenario file (``mock_device/scenarios/*.toml``) holds::

    name = "gimbal-quad"
    description = "one line, says INVENTED"
    loop_rate_hz = 1000
    [axes.roll]            # rotation axis: RotationParams fields (see mock_device.plant)
    inertia_kg_m2 = 0.004
    ...
    [axes.heave]           # heave rail: HeaveParams fields
    mass_kg = 1.6
    ...
    [gains.roll.rate]      # default gains of a loop level: any PID setting parameter
    kp = 0.5               # (kp ki kd tf b out_limit i_limit aw_mode aw_tt ff)
    [settings]             # any other setting's default, e.g. "kill.angle_rad" = 0.5
    [coupling]             # optional weak cross-coupling of roll/pitch/yaw torques
    matrix = [[1.0, 0.03, 0.0], [0.02, 1.0, 0.0], [0.0, 0.0, 1.0]]
    [faults]               # optional fault injection, see mock_device.faults.FaultConfig
    stuck = "roll.rate@3.0"

A generic benchmark plant uses exactly this form (one axis, one loop level)::

    [plant]
    kind = "transfer_function"
    axis = "roll"            # roll | pitch | yaw | heave
    loop = "rate"            # rate | angle | heave
    num = [1.0]              # coefficients in descending powers of s
    den = [1.0, 3.0, 3.0, 1.0]
    delay_s = 0.0
    noise_std = 0.0          # measurement noise, same unit as the measurement
    output_limit = 1.0       # actuator saturation, symmetric

Ground truth (:meth:`Scenario.ground_truth`) is the linear plant a loop level's controller output
sees up to its measurement: bearings' viscous friction, pendulum stiffness linearised at 0 rad,
mean motor gain, sensor transport delay; Coulomb friction, dead band, quantisation, saturation,
cross-coupling and the lateral-CG bias are left out (they are non-linear or loads). For an outer
level the inner level is closed on the scenario's default gains, using the continuous equivalent
of the board's PID (``kp``, ``ki/s``, ``kd*s/(tf*s+1)``, setpoint weight ``b`` on the forward
path) and a 6th-order Pade approximation of the inner loop's delay (sensor delay plus the board's
sampling delay). The returned ``delay_s`` is the pure delay left outside (the sensor delay of
the level's own measurement); the board's own sampling delay is NOT included, it is
:attr:`Scenario.sampling_delay_s` (protocol/timing.py: 1.5 ticks): the output computed at tick k
is latched at tick k+1 (one tick) and held for a tick (zero-order hold, half a tick on average).
"""

from __future__ import annotations

import math
import tomllib
from dataclasses import dataclass, field, fields
from pathlib import Path
from typing import Any

import numpy as np

from protocol import timing
from protocol.timing import SAMPLING_DELAY_TICKS  # noqa: F401 (importable from here too)

from .plant import G_M_S2, HeaveParams, RotationParams, TransferFunctionParams

SCENARIO_DIR = Path(__file__).with_name("scenarios")
ROTATION_AXES = ("roll", "pitch", "yaw")
ALL_AXES = ("roll", "pitch", "yaw", "heave")
PID_PARAMS = ("kp", "ki", "kd", "tf", "b", "out_limit", "i_limit", "aw_mode", "aw_tt", "ff")
PADE_ORDER = 6


class ScenarioError(ValueError):
    """A scenario file or name is wrong; the message says what and how to fix it."""


# ----------------------------------------------------------------------------- polynomials


def _trim(p) -> np.ndarray:
    p = np.atleast_1d(np.asarray(p, float))
    nz = np.flatnonzero(np.abs(p) > 0.0)
    return p[nz[0]:] if nz.size else np.zeros(1)


def _strip_common_s(num: np.ndarray, den: np.ndarray, tol: float = 1e-14):
    num, den = _trim(num), _trim(den)
    while (len(num) > 1 and len(den) > 1 and abs(num[-1]) <= tol * np.max(np.abs(num))
           and abs(den[-1]) <= tol * np.max(np.abs(den))):
        num, den = num[:-1], den[:-1]
    return num, den


def pade(delay_s: float, order: int = PADE_ORDER) -> tuple[np.ndarray, np.ndarray]:
    """Pade approximation of exp(-s*delay) (standard coefficients, e.g. Golub & Van Loan)."""
    if delay_s <= 0.0:
        return np.array([1.0]), np.array([1.0])
    n = order
    num = np.zeros(n + 1)
    den = np.zeros(n + 1)
    for k in range(n + 1):
        c = math.factorial(2 * n - k) * math.factorial(n) / (
            math.factorial(2 * n) * math.factorial(k) * math.factorial(n - k))
        num[n - k] = c * (-delay_s) ** k
        den[n - k] = c * delay_s ** k
    return num / den[0], den / den[0]


def close_inner(plant_num, plant_den, gains: dict[str, float], loop_delay_s: float):
    """Closed inner loop from its setpoint to its (undelayed) output.

    ``T = Cff*G / (1 + Cfb*G*exp(-s*loop_delay))`` with ``Cff = kp*b + ki/s`` and
    ``Cfb = kp + ki/s + kd*s/(tf*s+1)``; the delay is replaced by a Pade approximation.
    """
    kp, ki, kd = gains.get("kp", 0.0), gains.get("ki", 0.0), gains.get("kd", 0.0)
    tf, b = gains.get("tf", 0.0), gains.get("b", 1.0)
    s = np.array([1.0, 0.0])
    nf = np.polyadd(np.polymul([kp * b], s), [ki])  # Cff = nf / s
    df = s
    dfil = np.array([tf, 1.0])
    nc = np.polyadd(np.polymul(np.polyadd(np.polymul([kp], s), [ki]), dfil),
                    np.polymul([kd], np.polymul(s, s)))  # Cfb = nc / (s (tf s + 1))
    dc = np.polymul(s, dfil)
    npd, dpd = pade(loop_delay_s)
    gn, gd = _trim(plant_num), _trim(plant_den)
    num = np.polymul(np.polymul(nf, gn), np.polymul(dc, dpd))
    den = np.polymul(df, np.polyadd(np.polymul(np.polymul(dc, gd), dpd),
                                    np.polymul(np.polymul(nc, gn), npd)))
    return _strip_common_s(num, den)


def _zpk(num, den):
    n, d = _trim(num), _trim(den)
    return np.roots(n), np.roots(d), n[0] / d[0]


def _log_response(z, p, k, delay_s, w):
    """log of the frequency response as a product of factors (no polynomial overflow) and its
    phase as a sum of factor angles (continuous in w, no unwrapping)."""
    s = 1j * np.asarray(w, float)[:, None]
    fz = s - z[None, :]
    fp = s - p[None, :]
    mag = np.log(abs(k)) + np.sum(np.log(np.abs(fz)), axis=1) - np.sum(np.log(np.abs(fp)), axis=1)
    phase = ((0.0 if k > 0 else -np.pi) + np.sum(np.angle(fz), axis=1)
             - np.sum(np.angle(fp), axis=1) - np.asarray(w, float) * delay_s)
    return mag, phase


def frequency_response(num, den, delay_s: float, w: np.ndarray) -> np.ndarray:
    """``num/den * exp(-s*delay_s)`` at ``s = j*w``."""
    z, p, k = _zpk(num, den)
    mag, phase = _log_response(z, p, k, delay_s, w)
    return np.exp(mag + 1j * phase)


def ultimate_point(num, den, delay_s: float) -> tuple[float, float]:
    """Ultimate gain and period (first crossing of -180 degrees by the phase) of
    ``num/den*exp(-s*delay)`` under proportional control; (inf, nan) if the phase never reaches
    -180 degrees below 1e6 rad/s. Pure numpy (dense grid, then bisection)."""
    z, p, k = _zpk(num, den)
    if k == 0:
        return math.inf, math.nan
    w = np.logspace(-4, 6, 20000)
    _, ph = _log_response(z, p, k, delay_s, w)
    idx = np.flatnonzero(ph <= -np.pi)
    if not idx.size or idx[0] == 0:
        return math.inf, math.nan
    lo, hi = w[idx[0] - 1], w[idx[0]]
    for _ in range(100):
        mid = 0.5 * (lo + hi)
        if _log_response(z, p, k, delay_s, [mid])[1][0] > -np.pi:
            lo = mid
        else:
            hi = mid
    wu = 0.5 * (lo + hi)
    mag, _ = _log_response(z, p, k, delay_s, [wu])
    return float(math.exp(-mag[0])), float(2 * math.pi / wu)


# ----------------------------------------------------------------------------- scenario


@dataclass(frozen=True)
class Scenario:
    """An invented test stand: physics, default gains and settings, faults, ground truth."""

    name: str
    description: str
    loop_rate_hz: int
    rotation: dict[str, RotationParams] = field(default_factory=dict)
    heave: HeaveParams | None = None
    tf_plant: tuple[str, str, TransferFunctionParams] | None = None  # (axis, loop, params)
    gains: dict[tuple[str, str], dict[str, float]] = field(default_factory=dict)
    settings: dict[str, float] = field(default_factory=dict)
    coupling: tuple[tuple[float, ...], ...] | None = None
    faults: dict[str, Any] = field(default_factory=dict)
    device_id: str = "mock-0001"
    source: str = ""

    # -- structure
    @property
    def ts(self) -> float:
        return 1.0 / self.loop_rate_hz

    @property
    def axes(self) -> dict[str, tuple[str, ...]]:
        """Axes present and their loop levels, inner first."""
        out: dict[str, tuple[str, ...]] = {}
        for ax in ROTATION_AXES:
            if ax in self.rotation:
                out[ax] = ("rate", "angle")
        if self.heave is not None:
            out["heave"] = ("rate", "heave")
        if self.tf_plant is not None:
            out[self.tf_plant[0]] = (self.tf_plant[1],)
        return out

    @property
    def sampling_delay_s(self) -> float:
        """Delay the board's sampling adds as a controller sees it (protocol/timing.py): one
        tick from computing at tick k to latching at k+1, half a tick of zero-order hold."""
        return timing.sampling_delay_s(self.loop_rate_hz)

    def default_gains(self, axis: str, loop: str) -> dict[str, float]:
        return dict(self.gains.get((axis, loop), {}))

    def _check_level(self, axis: str, loop: str) -> None:
        if loop not in self.axes.get(axis, ()):
            have = ", ".join(f"{a}.{lv}" for a, lvs in self.axes.items() for lv in lvs)
            raise ScenarioError(f"scenario {self.name!r} has no loop level {axis}.{loop}; "
                                f"it has: {have}")

    def _sensor_delay(self, axis: str) -> float:
        ts = self.ts
        if axis in self.rotation:
            return round(self.rotation[axis].sensor_delay_s / ts) * ts
        return round(self.heave.sensor_delay_s / ts) * ts

    def _inner_plant(self, axis: str) -> tuple[np.ndarray, np.ndarray]:
        """Controller output -> true rate (or climb rate), no delay."""
        if axis in self.rotation:
            p = self.rotation[axis]
            if p.blocked:
                return np.array([0.0]), np.array([1.0])
            k = p.torque_per_unit_nm * p.mean_motor_gain
            num = np.array([k, 0.0])
            den = np.polymul([p.motor_tau_s, 1.0],
                             [p.inertia_kg_m2, p.viscous_nm_s_rad, p.stiffness_nm_rad])
            return _strip_common_s(num, den)
        p = self.heave
        if p.blocked:
            return np.array([0.0]), np.array([1.0])
        return (np.array([p.thrust_per_unit_n]),
                np.polymul([p.motor_tau_s, 1.0], [p.mass_kg, p.drag_n_s_m]))

    def ground_truth(self, axis: str, loop: str) -> tuple[list[float], list[float], float]:
        """Linearised plant seen by that level's controller output up to its measurement:
        ``(num, den, delay_s)``, inner loops closed on the default gains, WITHOUT the board's
        sampling delay (add :attr:`sampling_delay_s` for the loop as the controller sees it)."""
        self._check_level(axis, loop)
        if self.tf_plant is not None and self.tf_plant[0] == axis:
            p = self.tf_plant[2]
            return list(map(float, _trim(p.num))), list(map(float, _trim(p.den))), float(p.delay_s)
        gn, gd = self._inner_plant(axis)
        ls = self._sensor_delay(axis)
        if loop == "rate":
            return list(map(float, gn)), list(map(float, gd)), ls
        tn, td = close_inner(gn, gd, self.default_gains(axis, "rate"), ls + self.sampling_delay_s)
        num, den = _strip_common_s(tn, np.polymul(td, [1.0, 0.0]))
        return list(map(float, num)), list(map(float, den)), ls

    def ultimate_point(self, axis: str, loop: str, with_sampling_delay: bool = True):
        """(Ku, Tu_s) of the ground truth, by default with the board's sampling delay added (the
        ultimate point a relay on the board sees)."""
        num, den, d = self.ground_truth(axis, loop)
        return ultimate_point(num, den, d + (self.sampling_delay_s if with_sampling_delay else 0))

    def noise_std(self, axis: str, loop: str) -> float:
        """Standard deviation of that level's measurement noise (measurement units)."""
        self._check_level(axis, loop)
        if self.tf_plant is not None and self.tf_plant[0] == axis:
            return self.tf_plant[2].noise_std
        if axis in self.rotation:
            p = self.rotation[axis]
            return p.gyro_noise_std if loop == "rate" else p.angle_noise_std
        return self.heave.climb_noise_std if loop == "rate" else self.heave.height_noise_std

    def hover_command(self) -> float:
        if self.heave is None:
            raise ScenarioError(f"scenario {self.name!r} has no heave axis")
        return self.heave.hover_command


# ----------------------------------------------------------------------------- loading


def _build(cls, table: dict, where: str):
    known = {f.name for f in fields(cls)}
    unknown = set(table) - known
    if unknown:
        raise ScenarioError(f"{where}: unknown key(s) {', '.join(sorted(unknown))}; known keys: "
                            f"{', '.join(sorted(known))}")
    try:
        return cls(**table)
    except TypeError as exc:
        raise ScenarioError(f"{where}: {exc}") from None


def _positive(v, what: str) -> float:
    if not isinstance(v, (int, float)) or isinstance(v, bool) or not math.isfinite(v) or v <= 0:
        raise ScenarioError(f"{what} must be a positive number, got {v!r}")
    return float(v)


def scenario_from_dict(data: dict, source: str = "<dict>") -> Scenario:
    """Build a scenario from parsed TOML; raises :class:`ScenarioError` with a clear message."""
    where = source
    name = data.get("name") or Path(source).stem
    rate = int(_positive(data.get("loop_rate_hz", 1000), f"{where}: loop_rate_hz"))
    rotation: dict[str, RotationParams] = {}
    heave = None
    tf = None
    for ax, table in (data.get("axes") or {}).items():
        if ax in ROTATION_AXES:
            p = _build(RotationParams, dict(table), f"{where}: [axes.{ax}]")
            _positive(p.inertia_kg_m2, f"{where}: axes.{ax}.inertia_kg_m2")
            _positive(p.motor_tau_s, f"{where}: axes.{ax}.motor_tau_s")
            rotation[ax] = p
        elif ax == "heave":
            heave = _build(HeaveParams, dict(table), f"{where}: [axes.heave]")
            _positive(heave.mass_kg, f"{where}: axes.heave.mass_kg")
            _positive(heave.motor_tau_s, f"{where}: axes.heave.motor_tau_s")
        else:
            raise ScenarioError(f"{where}: unknown axis [axes.{ax}]; expected one of "
                                f"{', '.join(ALL_AXES)}")
    if "plant" in data:
        pt = dict(data["plant"])
        kind = pt.pop("kind", None)
        if kind != "transfer_function":
            raise ScenarioError(f"{where}: [plant] kind must be \"transfer_function\", got {kind!r}")
        axis = pt.pop("axis", None)
        loop = pt.pop("loop", None)
        if axis not in ALL_AXES:
            raise ScenarioError(f"{where}: [plant] axis must be one of {', '.join(ALL_AXES)}, "
                                f"got {axis!r}")
        legal = ("rate", "heave") if axis == "heave" else ("rate", "angle")
        if loop not in legal:
            raise ScenarioError(f"{where}: [plant] loop for axis {axis} must be one of "
                                f"{', '.join(legal)}, got {loop!r}")
        if axis in rotation or (axis == "heave" and heave is not None):
            raise ScenarioError(f"{where}: [plant] axis {axis} is also given under [axes]")
        for key in ("num", "den"):
            v = pt.get(key)
            if (not isinstance(v, list) or not v
                    or not all(isinstance(c, (int, float)) and math.isfinite(c) for c in v)):
                raise ScenarioError(f"{where}: [plant] {key} must be a non-empty list of numbers "
                                    f"(coefficients in descending powers of s), got {v!r}")
        pt["num"] = tuple(float(c) for c in pt["num"])
        pt["den"] = tuple(float(c) for c in pt["den"])
        p = _build(TransferFunctionParams, pt, f"{where}: [plant]")
        if _trim(p.den)[0] == 0 or len(_trim(p.num)) > len(_trim(p.den)):
            raise ScenarioError(f"{where}: [plant] must be proper: den needs a non-zero leading "
                                f"coefficient and num no higher degree than den")
        if p.delay_s < 0 or p.noise_std < 0 or p.output_limit <= 0:
            raise ScenarioError(f"{where}: [plant] needs delay_s >= 0, noise_std >= 0 and "
                                f"output_limit > 0")
        roots = np.roots(_trim(p.den)) if len(_trim(p.den)) > 1 else np.array([])
        if np.any(roots.real > 1e-9) or np.sum(np.abs(roots) <= 1e-9) > 1:
            raise ScenarioError(f"{where}: [plant] must be stable or have at most one "
                                f"integrator; den roots are {np.round(roots, 4).tolist()}")
        tf = (axis, loop, p)
    if not rotation and heave is None and tf is None:
        raise ScenarioError(f"{where}: no axes: give [axes.roll] (pitch, yaw, heave) tables or "
                            f"a [plant] table")
    gains: dict[tuple[str, str], dict[str, float]] = {}
    for ax, levels in (data.get("gains") or {}).items():
        for lv, g in levels.items():
            bad = set(g) - set(PID_PARAMS)
            if bad:
                raise ScenarioError(f"{where}: [gains.{ax}.{lv}] unknown parameter(s) "
                                    f"{', '.join(sorted(bad))}; known: {', '.join(PID_PARAMS)}")
            gains[(ax, lv)] = {k: float(v) for k, v in g.items()}
    coupling = None
    if "coupling" in data:
        m = data["coupling"].get("matrix")
        arr = np.asarray(m, float) if m is not None else None
        if arr is None or arr.shape != (3, 3):
            raise ScenarioError(f"{where}: [coupling] matrix must be 3x3 (roll, pitch, yaw)")
        coupling = tuple(tuple(float(v) for v in row) for row in arr)
    sc = Scenario(name=str(name), description=str(data.get("description", "")),
                  loop_rate_hz=rate, rotation=rotation, heave=heave, tf_plant=tf, gains=gains,
                  settings={k: float(v) for k, v in (data.get("settings") or {}).items()},
                  coupling=coupling, faults=dict(data.get("faults") or {}),
                  device_id=str(data.get("device_id", f"mock-{name}")), source=source)
    for (ax, lv) in gains:
        sc._check_level(ax, lv)
    from .faults import FaultConfig
    try:
        FaultConfig.from_mapping(sc.faults)
    except ValueError as exc:
        raise ScenarioError(f"{where}: [faults] {exc}") from None
    return sc


def _scenario_files() -> list[Path]:
    return sorted(SCENARIO_DIR.glob("*.toml"))


def load_scenario(name_or_path: str | Path) -> Scenario:
    """Load a bundled scenario by name (``gimbal-quad``) or a TOML file by path."""
    if isinstance(name_or_path, Scenario):
        return name_or_path
    text = str(name_or_path)
    path = Path(text)
    if not (text.endswith(".toml") or path.is_file()):
        path = SCENARIO_DIR / f"{text}.toml"
        if not path.is_file():
            names = ", ".join(n for n, _ in list_scenarios())
            raise ScenarioError(f"no scenario named {text!r}; bundled scenarios: {names}; or give "
                                f"the path of a .toml file")
    if not path.is_file():
        raise ScenarioError(f"scenario file {text!r} not found; give an existing .toml path or a "
                            f"bundled name (tetherloop mock --list)")
    try:
        data = tomllib.loads(path.read_text(encoding="utf-8"))
    except tomllib.TOMLDecodeError as exc:
        raise ScenarioError(f"{path}: not valid TOML ({exc}); fix the file") from None
    except OSError as exc:
        raise ScenarioError(f"{path}: cannot read ({exc})") from None
    data.setdefault("name", path.stem)
    return scenario_from_dict(data, str(path))


def list_scenarios() -> list[tuple[str, str]]:
    """Bundled scenarios as (name, one-line description)."""
    out = []
    for p in _scenario_files():
        try:
            data = tomllib.loads(p.read_text(encoding="utf-8"))
        except (OSError, tomllib.TOMLDecodeError):
            continue
        out.append((str(data.get("name", p.stem)), str(data.get("description", ""))))
    return out


__all__ = ["Scenario", "ScenarioError", "load_scenario", "list_scenarios", "ultimate_point",
           "close_inner", "pade", "G_M_S2"]

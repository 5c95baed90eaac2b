"""Low-order process models fitted to the whole relay waveform.

Three model families, all with a dead time ``L``:

* ``fopdt``  ``K exp(-Ls) / (T s + 1)``
* ``sopdt``  ``K exp(-Ls) / (T^2 s^2 + 2 zeta T s + 1)`` (real or complex poles)
* ``ipdt``   ``K exp(-Ls) / (s (T s + 1))``  (integrator plus lag plus dead time)

Fitting (output error, whole waveform)
--------------------------------------
For candidate time constants and dead time the recorded relay output ``u`` is passed through
the model's exact zero-order-hold equivalent (:mod:`agent.analysis.lti`), which is exactly what
the relay loop did, and the waveform is least-squared against the measured ``y``. The gain, the
output offset, the unknown initial state (the free modes of the model) and, for the integrating
model, an input offset (the trim) enter linearly and are solved by linear least squares inside
the residual (variable projection), so :func:`scipy.optimize.least_squares` searches only the
time constants and the dead time. The first ~0.6 period is left out so that the input history
seen through the dead time is always recorded.

Model choice uses the Bayesian information criterion on the residual (with a floor so that
noise-free fits do not split hairs) and the normalized time delay ``tau = L / (L + T)``
(Berner 2017): with ``tau`` small the process looks integrating, with ``tau`` large higher-order
lags cannot be told from dead time, so the simpler model is kept unless the richer one fits
clearly better.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np
from scipy import optimize, signal

from .lti import freq_response, phase_crossover, zoh_discretize

__all__ = ["MODEL_KINDS", "Model", "fit_model", "fit_models", "select_model"]

MODEL_KINDS = ("fopdt", "sopdt", "ipdt")


@dataclass(frozen=True)
class Model:
    """A fitted process model.

    ``params`` holds ``K`` (gain; per second for ``ipdt``), ``T`` (s), ``L`` (s) and for
    ``sopdt`` also ``zeta``. ``rmse`` is the waveform fit residual (measurement units),
    ``rel_rmse`` the same relative to the oscillation amplitude. ``basis`` says what the dead
    time describes: ``"record"`` (as fitted, relay output to measurement), ``"loop"`` (as the
    controller sees it, hold included) or ``"plant"`` (board sampling delay removed).
    """

    kind: str
    params: dict[str, float]
    rmse: float
    normalized_delay: float
    rel_rmse: float = float("nan")
    basis: str = "record"
    extras: dict[str, float] = field(default_factory=dict)

    def tf(self) -> tuple[np.ndarray, np.ndarray, float]:
        """``(num, den, delay_s)`` in descending powers of s."""
        p = self.params
        K, T, L = p["K"], p["T"], p["L"]
        if self.kind == "fopdt":
            den = np.array([T, 1.0])
        elif self.kind == "sopdt":
            den = np.array([T * T, 2.0 * p["zeta"] * T, 1.0])
        elif self.kind == "ipdt":
            den = np.array([T, 1.0, 0.0])
        else:  # pragma: no cover - guarded by construction
            raise ValueError(f"unknown model kind {self.kind!r}")
        return np.array([K]), den, float(L)

    def ultimate(self) -> tuple[float, float]:
        """``(ku, tu_s)`` of this model (first -180° crossing); ``(inf, nan)`` if none."""
        r = phase_crossover(self.tf())
        if r is None:
            return float("inf"), float("nan")
        ku, wu = r
        return ku, 2 * np.pi / wu

    def freq(self, w: np.ndarray) -> np.ndarray:
        return freq_response(self.tf(), w)

    def with_delay(self, delay_s: float, basis: str) -> Model:
        p = dict(self.params)
        p["L"] = max(float(delay_s), 0.0)
        return replace(self, params=p, basis=basis,
                       normalized_delay=_normalized_delay(self.kind, p))

    def to_dict(self) -> dict:
        return {"kind": self.kind, "params": {k: float(v) for k, v in self.params.items()},
                "rmse": float(self.rmse), "rel_rmse": float(self.rel_rmse),
                "normalized_delay": float(self.normalized_delay), "basis": self.basis,
                "extras": {k: float(v) for k, v in self.extras.items()}}


def _normalized_delay(kind: str, p: dict[str, float]) -> float:
    L = p["L"]
    if kind == "fopdt":
        return L / (L + p["T"]) if L + p["T"] > 0 else 0.0
    if kind == "sopdt":
        tar = 2.0 * p["zeta"] * p["T"]  # sum of time constants (average residence time)
        return L / (L + tar) if L + tar > 0 else 0.0
    return 0.0  # integrating: tau -> 0 by definition (Berner 2017)


def _unit_tf(kind: str, th: np.ndarray):
    if kind == "fopdt":
        T = np.exp(th[0])
        return np.array([1.0]), np.array([T, 1.0]), {"T": T}
    if kind == "sopdt":
        T, z = np.exp(th[0]), np.exp(th[1])
        return np.array([1.0]), np.array([T * T, 2 * z * T, 1.0]), {"T": T, "zeta": z}
    T = np.exp(th[0])
    return np.array([1.0]), np.array([T, 1.0, 0.0]), {"T": T}


class _Fitter:
    """Variable-projection residual. ``variant`` "rest": the record starts at rest (plant at
    equilibrium for an unknown constant input before the first sample), fitted from the first
    sample, which keeps the low-frequency information of the start-up; "free": the state at
    ``k0`` is unknown (free modes), for records that do not start at rest."""

    def __init__(self, kind: str, dt: float, u: np.ndarray, y: np.ndarray, k0: int,
                 period_s: float, variant: str = "free", u_ref: float = 0.0):
        if variant == "rest":
            k0 = 0
        self.u_ref = u_ref
        self.variant = variant
        self.kind, self.dt, self.k0, self.P = kind, dt, k0, period_s
        self.u_raw = u
        self.step_in = np.ones(len(u))
        self.uc = u - np.mean(u)
        n = len(y) - k0
        # compare on at most ~3000 rows (the filters still run at the full rate)
        self.q = max(1, n // 2000)
        self.ybar = y[k0:][:: self.q]
        self.ones = np.ones(len(self.ybar))
        self.ramp = (np.arange(n) * dt)[:: self.q]
        self.imp = np.zeros(n)
        self.imp[0] = 1.0

    def solve(self, x: np.ndarray):
        th = x[:-1]
        L = x[-1] * self.P
        num, den, info = _unit_tf(self.kind, th)
        dm = zoh_discretize(num, den, L, self.dt)
        if self.variant == "rest":
            # at rest before the first sample with the relay output at its centre u_ref:
            # y = y0 + K * response(u - u_ref); an integrating plant also needs the unknown
            # input that held it still (its trim), which enters through its step response
            m = dm.shift
            w = self.u_raw - self.u_ref
            if m > 0:
                w = np.concatenate([np.zeros(m), w[:-m]])
            resp = signal.lfilter(dm.b, dm.a, w)[:: self.q]
            cols = [resp, self.ones]
            if self.kind == "ipdt":
                st = self.step_in
                if m > 0:
                    st = np.concatenate([np.zeros(m), st[:-m]])
                cols.append(signal.lfilter(dm.b, dm.a, st)[:: self.q])
            X = np.column_stack(cols)
            scale = np.sqrt(np.sum(X * X, axis=0))
            scale[scale == 0] = 1.0
            Xs = X / scale
            coef, *_ = np.linalg.lstsq(Xs.T @ Xs, Xs.T @ self.ybar, rcond=1e-13)
            coef = coef / scale
            r = self.ybar - X @ coef
            c_step = coef[2] if self.kind == "ipdt" else 0.0
            # same layout as the free variant: [K, offset, ..., step coefficient]
            return r, np.array([coef[0], coef[1], c_step]), info, L
        w = self.uc
        if dm.shift > 0:
            w = np.concatenate([np.full(dm.shift, self.uc[0]), self.uc[:-dm.shift]])
        q = self.q
        resp = signal.lfilter(dm.b, dm.a, w)[self.k0:][::q]
        a = np.trim_zeros(dm.a, "b")
        cols = [resp, self.ones]
        base = signal.lfilter([1.0], a, self.imp)
        for j in range(len(a) - 1):
            cols.append(np.concatenate([np.zeros(j), base[: len(base) - j]])[::q])
        if self.kind == "ipdt":
            cols.append(self.ramp)
        X = np.column_stack(cols)
        scale = np.sqrt(np.sum(X * X, axis=0))
        scale[scale == 0] = 1.0
        Xs = X / scale
        # small normal equations solved with a rank cut (mode columns can be nearly collinear)
        coef, *_ = np.linalg.lstsq(Xs.T @ Xs, Xs.T @ self.ybar, rcond=1e-13)
        coef = coef / scale
        r = self.ybar - X @ coef
        return r, coef, info, L

    def residual(self, x: np.ndarray) -> np.ndarray:
        return self.solve(x)[0]


def _grid(kind: str) -> list[np.ndarray]:
    pts = []
    if kind == "fopdt":
        for T in (0.03, 0.15, 0.6, 3.0, 15.0):
            for lf in (0.03, 0.12, 0.22, 0.32, 0.42):
                pts.append(np.array([np.log(T), lf]))
    elif kind == "sopdt":
        for T in (0.05, 0.15, 0.5, 2.0):
            for z in (0.5, 1.0, 2.5):
                for lf in (0.02, 0.12, 0.25, 0.4):
                    pts.append(np.array([np.log(T), np.log(z), lf]))
    else:
        for T in (0.01, 0.05, 0.15, 0.4):
            for lf in (0.0, 0.05, 0.12, 0.22):
                pts.append(np.array([np.log(T), lf]))
    return pts


def fit_model(kind: str, dt: float, u: np.ndarray, y: np.ndarray, period_s: float,
              amplitude: float, k0: int | None = None, variant: str = "free",
              u_ref: float = 0.0) -> Model:
    """Fit one model family to a relay record by whole-waveform output-error least squares.

    Parameters
    ----------
    kind : {"fopdt", "sopdt", "ipdt"}
    dt : float
        Sample time.
    u, y : ndarray
        Applied relay output and measurement.
    period_s, amplitude : float
        Oscillation period and amplitude (for scaling and starting points).
    k0 : int, optional
        First sample of the fitted window (default: 0.6 period in; "free" variant only).
    variant : {"free", "rest"}
        "rest" assumes the record starts at rest (see :class:`_Fitter`).
    """
    if k0 is None:
        k0 = int(np.ceil(0.6 * period_s / dt)) + 2
    k0 = min(k0, len(y) // 2)
    f = _Fitter(kind, dt, u, y, k0, period_s, variant, u_ref)
    # time constants are fitted relative to the period
    lnP = np.log(period_s)
    lo_T, hi_T = lnP + np.log(1e-3), lnP + np.log(1e3)
    if kind == "sopdt":
        lb = np.array([lo_T, np.log(0.05), 0.0])
        ub = np.array([hi_T, np.log(50.0), 0.6])
    else:
        lb = np.array([lo_T, 0.0])
        ub = np.array([hi_T, 0.6])
    starts = []
    for g in _grid(kind):
        x = g.copy()
        x[0] += lnP
        x = np.clip(x, lb + 1e-9, ub - 1e-9)
        r = f.residual(x)
        starts.append((float(r @ r), x))
    starts.sort(key=lambda s: s[0])
    best = None
    for _, x0 in starts[:1]:
        try:
            sol = optimize.least_squares(f.residual, x0, bounds=(lb, ub), method="trf",
                                         x_scale=np.ones_like(x0), diff_step=1e-6,
                                         xtol=1e-10, ftol=1e-12, gtol=1e-12, max_nfev=60)
        except (ValueError, np.linalg.LinAlgError):  # pragma: no cover - defensive
            continue
        if best is None or sol.cost < best.cost:
            best = sol
    x = best.x if best is not None else starts[0][1]
    r, coef, info, L = f.solve(x)
    K = float(coef[0])
    params = {"K": K, **{k: float(v) for k, v in info.items()}, "L": float(L)}
    extras: dict[str, float] = {"offset": float(coef[1]), "rest": float(variant == "rest")}
    if K != 0:
        if variant == "rest" and kind == "ipdt":
            extras["trim"] = float(u_ref - coef[2] / K)  # input that held the plant still
        elif kind == "ipdt":
            # ramp coefficient = -K * (trim - mean(u)) -> trim
            extras["trim"] = float(np.mean(u) - coef[-1] / K)
    if kind == "sopdt":
        z, T = params["zeta"], params["T"]
        if z >= 1:
            s = np.sqrt(z * z - 1)
            extras["T1"] = T * (z + s)
            extras["T2"] = T * (z - s)
    rmse = float(np.sqrt(np.mean(r * r)))
    return Model(kind=kind, params=params, rmse=rmse,
                 normalized_delay=_normalized_delay(kind, params),
                 rel_rmse=rmse / amplitude if amplitude > 0 else float("nan"),
                 extras=extras)


def fit_models(dt: float, u: np.ndarray, y: np.ndarray, period_s: float, amplitude: float,
               kinds: tuple[str, ...] = MODEL_KINDS, u_ref: float = 0.0) -> dict[str, Model]:
    """Fit every family in ``kinds`` (see :func:`fit_model`), each twice: assuming the record
    starts at rest with the relay output at ``u_ref`` before the first sample (the relay
    centre) and with a free initial state. The at-rest fit also sees the start-up, which
    pins the low-frequency gain; it is kept unless its residual is clearly worse (more than
    twice that of the free fit and by more than 1 % of the amplitude), i.e. unless the record
    did not start at rest. The free fit is skipped when the at-rest fit is already within
    0.5 % of the amplitude."""
    out = {}
    for k in kinds:
        rest = fit_model(k, dt, u, y, period_s, amplitude, variant="rest", u_ref=u_ref)
        if rest.rel_rmse <= 0.005:
            out[k] = rest  # already reproduces the record: no need to try a free start
            continue
        free = fit_model(k, dt, u, y, period_s, amplitude, variant="free")
        if rest.rmse <= max(2.0 * free.rmse, free.rmse + 0.01 * amplitude):
            out[k] = rest
        else:
            out[k] = free
    return out


def _bic(m: Model, n: int, amplitude: float) -> float:
    floor = 1e-4 * amplitude
    n_par = {"fopdt": 3, "sopdt": 4, "ipdt": 3}[m.kind]
    return n * np.log(max(m.rmse, floor) ** 2) + n_par * np.log(n)


def select_model(models: dict[str, Model], n_samples: int, amplitude: float) -> Model:
    """Choose a model by fit quality (BIC) and normalized delay (Berner 2017).

    A model with a non-positive gain or a non-finite residual is never chosen. The richer
    ``sopdt`` replaces ``fopdt`` only if it lowers the residual by more than 10 %; for a
    delay-dominated ``fopdt`` (``tau > 0.6``) by more than 30 %. Otherwise the lowest BIC wins.
    """
    ok = {k: m for k, m in models.items() if np.isfinite(m.rmse) and m.params["K"] > 0}
    if not ok:
        return min(models.values(), key=lambda m: m.rmse if np.isfinite(m.rmse) else np.inf)
    n = max(n_samples, 10)
    best = min(ok.values(), key=lambda m: _bic(m, n, amplitude))
    fo, so = ok.get("fopdt"), ok.get("sopdt")
    if best.kind == "sopdt" and fo is not None:
        need = 0.7 if fo.normalized_delay > 0.6 else 0.9
        floor = 1e-4 * amplitude
        if max(so.rmse, floor) > need * max(fo.rmse, floor):
            best = fo
            ip = ok.get("ipdt")
            if ip is not None and _bic(ip, n, amplitude) < _bic(fo, n, amplitude):
                best = ip
    return best

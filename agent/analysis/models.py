"""Low-order process models fitted to the whole relay waveform, and the choice among them.

The families (what each is, its parameters with units, how it is built and searched, how the
families contain each other) are the table :data:`agent.analysis.families.FAMILIES`; this
module fits them and chooses one.

Fitting (output error, whole waveform)
--------------------------------------
For candidate time constants and dead time the recorded relay output ``u`` is passed through
the model's exact zero-order-hold equivalent (:mod:`agent.analysis.lti`), which is exactly what
the relay loop did, and the waveform is least-squared against the measured ``y``. The gain, the
output offset, the unknown initial state (the free modes of the model) and, for an integrating
model, an input offset (the trim) enter linearly and are solved by linear least squares inside
the residual (variable projection), so :func:`scipy.optimize.least_squares` searches only the
time constants and the dead time. The first ~0.6 period is left out so that the input history
seen through the dead time is always recorded.

A richer family starts from the fitted simpler ones it extends (``seeded_from``) and is only
fitted when no family it contains already reproduces the record down to the measurement noise
(the choice could never prefer it). A family never fits worse than a family it contains: when
its search ends above one, it is searched again from that fit. In particular each integrating
family is the limit of a stable one with one more lag (``stable_limit``), whose starting points
otherwise never look at a lag far slower than the oscillation.

Long records (more than ``LONG_RECORD_PERIODS`` periods, as the relay records on noisy loops):
each family is first fitted on the last ten periods, whose result starts the search on the
whole record (the coarse grid alone can rank a poorer basin first), and slow trends (gusts,
drift; slower than an eighth of the oscillation frequency) are projected out with half-cosine
columns. A caller that knows whether the record starts at rest says so
(``RelayRecord.at_rest``): the online workflow's windows start mid-oscillation, and a wrong
at-rest assumption biases the gain while hardly raising the residual.

What a record can tell: a window of a stationary symmetric relay oscillation pins the response
near the odd harmonics of the oscillation only; the static gain (and whether the loop
integrates at all) shows in the start from rest or in a change of the relay's mean output.

Model choice uses the Bayesian information criterion on the residual (with a floor so that
noise-free fits do not split hairs) and the normalized time delay ``tau = L / (L + T)``
(Berner 2017): with ``tau`` small the process looks integrating, with ``tau`` large higher-order
lags cannot be told from dead time, so the simpler model is kept unless the richer one fits
clearly better; "better" is judged on the misfit beyond the measurement noise (see
:func:`select_model`). Accuracy and cost: tests/bench/identify.py.
"""

from __future__ import annotations

from dataclasses import dataclass, field, replace

import numpy as np
from scipy import optimize, signal

from .families import FAMILIES, Family, family
from .lti import freq_response, phase_crossover, zoh_discretize

__all__ = ["FAMILIES", "MODEL_KINDS", "Family", "Model", "fit_model", "fit_models",
           "select_model"]

MODEL_KINDS = tuple(FAMILIES)
STABLE_LIMIT = {k: f.stable_limit for k, f in FAMILIES.items() if f.stable_limit}
NESTED_IN = {k: f.nested_in for k, f in FAMILIES.items() if f.nested_in}
SEEDED_FROM = {k: f.seeded_from for k, f in FAMILIES.items() if f.seeded_from}


@dataclass(frozen=True)
class Model:
    """A fitted process model.

    ``params`` holds ``K`` (gain; per second for the integrating families), ``T`` (s), ``L``
    (s), for the second-order factor ``zeta``, and where the family has them ``T3`` (s, the
    third pole) and ``Tz`` (s, the zero; negative in the right half-plane). ``rmse`` is the waveform fit residual (measurement units),
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

    @property
    def family(self) -> Family:
        """The record of this model's family (label, parameters with units, relations)."""
        return family(self.kind)

    def tf(self) -> tuple[np.ndarray, np.ndarray, float]:
        """Transfer function of the model.

        Returns
        -------
        tuple
            ``(num, den, delay_s)``, polynomials in descending powers of s.
        """
        return self.family.tf(self.params)

    @property
    def integrating(self) -> bool:
        """True for the families with an integrator (``ipdt``, ``isopdt``, ``izsopdt``)."""
        return self.family.integrating

    def ultimate(self) -> tuple[float, float]:
        """``(ku, tu_s)`` of this model (first -180° crossing); ``(inf, nan)`` if none."""
        r = phase_crossover(self.tf())
        if r is None:
            return float("inf"), float("nan")
        ku, wu = r
        return ku, 2 * np.pi / wu

    def freq(self, w: np.ndarray) -> np.ndarray:
        """Frequency response of the model.

        Parameters
        ----------
        w : ndarray
            Angular frequencies (rad/s).

        Returns
        -------
        ndarray
            Complex frequency response of :meth:`tf`.
        """
        return freq_response(self.tf(), w)

    def with_delay(self, delay_s: float, basis: str) -> Model:
        """The same model with another dead time, e.g. on the loop or the plant basis.

        Parameters
        ----------
        delay_s : float
            The new dead time (s); negative values are clipped to 0.
        basis : {"record", "loop", "plant"}
            What the dead time now describes.

        Returns
        -------
        Model
            A copy with the dead time, the basis and the normalized delay replaced.
        """
        p = dict(self.params)
        p["L"] = max(float(delay_s), 0.0)
        return replace(self, params=p, basis=basis,
                       normalized_delay=self.family.normalized_delay(p))

    def to_dict(self) -> dict:
        """JSON-ready dictionary (floats, lists, strings)."""
        return {"kind": self.kind, "params": {k: float(v) for k, v in self.params.items()},
                "rmse": float(self.rmse), "rel_rmse": float(self.rel_rmse),
                "normalized_delay": float(self.normalized_delay), "basis": self.basis,
                "extras": {k: float(v) for k, v in self.extras.items()}}


def _linear_fit(cols: list[np.ndarray], y: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Least squares of ``y`` on the columns (scaled to unit norm): (residual, coefficients).
    Small normal equations solved with a rank cut: mode columns can be nearly collinear."""
    X = np.column_stack(cols)
    scale = np.sqrt(np.sum(X * X, axis=0))
    scale[scale == 0] = 1.0
    Xs = X / scale
    coef, *_ = np.linalg.lstsq(Xs.T @ Xs, Xs.T @ y, rcond=1e-13)
    coef = coef / scale
    return y - X @ coef, coef


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
        self.family = family(kind)
        integ = self.family.integrating
        self.u_raw = u
        self.step_in = np.ones(len(u))
        self.uc = u - np.mean(u)
        n = len(y) - k0
        # compare on at most ~16000 rows (the filters still run at the full rate): a thinner
        # comparison throws information away (see README.md)
        self.q = max(1, n // 16000)
        self.ybar = y[k0:][:: self.q]
        self.ones = np.ones(len(self.ybar))
        self.ramp = (np.arange(n) * dt)[:: self.q]
        self.imp = np.zeros(n)
        self.imp[0] = 1.0
        # slow disturbances (wind gusts, thermal drift) move the measurement over a long record
        # in a way no initial state explains: "free" fits absorb everything slower than an
        # eighth of the oscillation frequency with half-cosines over the record (detrending,
        # common practice in system identification, no source). Only on long records: a short
        # one shows too little of a slow disturbance to matter, and its low frequencies are
        # what tells an integrating loop from a slow lag. (Why an eighth: README.md.)
        span = n * dt
        long_record = period_s > 0 and span >= LONG_RECORD_PERIODS * period_s
        n_drift = min(int(span / (4.0 * period_s)) - 1, 40) if long_record else 0
        tt = np.arange(n)[:: self.q] / max(n - 1, 1)
        self.drift = [np.cos(np.pi * (j + 1) * tt) for j in range(max(n_drift, 0))]
        if self.drift:
            # the columns that do not depend on the searched parameters (offset, the trim's
            # ramp, the drift) are projected out once: each residual then solves only for the
            # gain and the free modes (variable projection; the same least-squares answer)
            fixed = [self.ones] + ([self.ramp] if integ else []) + self.drift
            self.Q, self.R = np.linalg.qr(np.column_stack(fixed))
            self.y_perp = self.ybar - self.Q @ (self.Q.T @ self.ybar)

    def solve(self, x: np.ndarray):
        th = x[:-1]
        L = x[-1] * self.P
        num, den, info = self.family.unit_tf(th)
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
            if self.family.integrating:
                st = self.step_in
                if m > 0:
                    st = np.concatenate([np.zeros(m), st[:-m]])
                cols.append(signal.lfilter(dm.b, dm.a, st)[:: self.q])
            r, coef = _linear_fit(cols, self.ybar)
            c_step = coef[2] if self.family.integrating else 0.0
            # same layout as the free variant: [K, offset, ..., step coefficient]
            return r, np.array([coef[0], coef[1], c_step]), info, L
        w = self.uc
        if dm.shift > 0:
            w = np.concatenate([np.full(dm.shift, self.uc[0]), self.uc[:-dm.shift]])
        q = self.q
        resp = signal.lfilter(dm.b, dm.a, w)[self.k0:][::q]
        nz = np.flatnonzero(dm.a)
        a = dm.a[: nz[-1] + 1]  # trailing zeros dropped
        cols = [resp, self.ones]
        # free response of the model: impulse responses of (1 - z^-1)^j / a(z), j < order.
        # They span the same space as impulses at samples 0 .. order-1 (any initial state),
        # but stay far from collinear when the poles sit close to z = 1 (time constants of
        # many ticks), where one-sample shifts of one impulse response differ only in their
        # j-th differences and the normal equations below would lose them to the rank cut.
        diff = np.array([1.0])
        for _ in range(len(a) - 1):
            cols.append(signal.lfilter(diff, a, self.imp)[::q])
            diff = np.convolve(diff, [1.0, -1.0])
        if self.drift:
            var = [cols[0]] + cols[2:]  # gain column and free modes
            V = np.column_stack(var)
            Vp = V - self.Q @ (self.Q.T @ V)
            r, cv = _linear_fit(list(Vp.T), self.y_perp)
            cf = np.linalg.solve(self.R, self.Q.T @ (self.ybar - V @ cv))
            coef = [cv[0], cf[0], *cv[1:]]
            if self.family.integrating:
                coef.append(cf[1])  # the ramp, last as below
            return r, np.array(coef), info, L
        if self.family.integrating:
            cols.append(self.ramp)
        r, coef = _linear_fit(cols, self.ybar)
        return r, coef, info, L

    def residual(self, x: np.ndarray) -> np.ndarray:
        return self.solve(x)[0]


def _two_poles(t1: float, t2: float) -> dict[str, float]:
    """Two real lags as the second-order factor ``T^2 s^2 + 2 zeta T s + 1``."""
    T = float(np.sqrt(t1 * t2))
    return {"T": T, "zeta": (t1 + t2) / (2.0 * T)}


def _from_limit(p: dict, P: float, kind: str) -> list[dict]:
    # from the integrating family this one contains as a limit: the integrator becomes a lag
    # much slower than the oscillation (the gain is solved linearly)
    out = []
    for slow in (4.0 * P, 40.0 * P):
        if FAMILIES[kind].third_pole:
            out.append({**p, "T3": slow})
        else:  # the lag and the slow pole as one second-order factor
            out.append({**p, **_two_poles(p["T"], slow)})
    return out


def _pole_from_delay(p: dict, P: float) -> list[dict]:
    # an extra lag T3 = r T, taken out of the dead time or not
    return [{**p, "T3": r * p["T"], "L": L} for r in (0.05, 0.25, 0.7)
            for L in (max(p["L"] - r * p["T"], 0.0), p["L"])]


def _lag_split(p: dict, P: float) -> list[dict]:
    # the lag T split into two real poles T and r T
    return [{**p, **_two_poles(p["T"], r * p["T"]), "L": L} for r in (0.05, 0.25, 1.0)
            for L in (max(p["L"] - r * p["T"], 0.0), p["L"])]


def _zero_third_order(p: dict, P: float) -> list[dict]:
    # a zero at -1/Tz in either half-plane; or the dead time traded for a right half-plane
    # zero (1 - L s ~ exp(-L s) at low frequency)
    out = [{**p, "Tz": r * p["T"], "L": L} for r in (-0.3, 0.0, 0.3)
           for L in (p["L"] - min(r * p["T"], 0.0), p["L"])]
    return out + [{**p, "Tz": -f * p["L"], "L": (1 - f) * p["L"]} for f in (1.0, 0.5)]


def _zero_integrating(p: dict, P: float) -> list[dict]:
    # a zero at -1/Tz in either half-plane, with or without the lag grown to make room
    out = []
    for r in (-0.3, 0.3, 1.0, 3.0):
        tz = r * p["T"]
        out.append({**p, "Tz": tz, "L": p["L"] - min(tz, 0.0)})
        out.append({**p, "T": p["T"] * (1 + max(r, 0.0)), "Tz": tz})
    return out + [{**p, "Tz": -f * p["L"], "L": (1 - f) * p["L"]} for f in (1.0, 0.5)]


def _slow_lag_as_integrator(p: dict, P: float) -> list[dict]:
    # a stable fit's slow lag taken as the integrator (izsopdt from ztopdt)
    return [{**p, "Tz": tz} for tz in (p["Tz"], 0.5 * p["Tz"] + 0.5 * p["T"])]


# (family, fitted family) -> starting parameters derived from the fitted one
_SEEDERS = {("topdt", "sopdt"): _pole_from_delay, ("isopdt", "ipdt"): _lag_split,
            ("ztopdt", "topdt"): _zero_third_order, ("izsopdt", "isopdt"): _zero_integrating,
            ("izsopdt", "ztopdt"): _slow_lag_as_integrator}


def _seed_starts(kind: str, seed: Model, period_s: float) -> list[np.ndarray]:
    """Starting points for a family from a fitted family it extends or contains: part of the
    dead time (or of the lag) is handed to the extra pole or zero."""
    fam = FAMILIES[kind]
    if fam.code == FAMILIES[seed.kind].stable_limit:
        starts = _from_limit(seed.params, period_s, kind)
    else:
        seeder = _SEEDERS.get((kind, seed.kind))
        starts = seeder(seed.params, period_s) if seeder else []
    return [fam.search_vector(q, period_s) for q in starts]


LONG_RECORD_PERIODS = 14  # a record longer than this is fitted on its tail first


def fit_model(kind: str, dt: float, u: np.ndarray, y: np.ndarray, period_s: float,
              amplitude: float, k0: int | None = None, variant: str = "free",
              u_ref: float = 0.0, seed: Model | tuple | None = None) -> Model:
    """Fit one model family to a relay record by whole-waveform output-error least squares.

    Parameters
    ----------
    kind : {"fopdt", "sopdt", "ipdt", "topdt", "isopdt"}
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
    seed : Model or tuple of Model, optional
        Fitted families whose parameters give the starting points (``SEEDED_FROM``: ``sopdt``
        for ``topdt``, ``ipdt`` for ``isopdt`` ...); without them a coarse grid is searched.
    """
    if k0 is None:
        k0 = int(np.ceil(0.6 * period_s / dt)) + 2
    k0 = min(k0, len(y) // 2)
    f = _Fitter(kind, dt, u, y, k0, period_s, variant, u_ref)
    fam = family(kind)
    # time constants are fitted relative to the period
    lb, ub = fam.bounds(period_s)
    starts = []
    seeds = seed if isinstance(seed, tuple) else (seed,) if seed is not None else ()
    seeded = []
    for sd in seeds:
        if sd is not None and (sd.kind in SEEDED_FROM.get(kind, ())
                               or STABLE_LIMIT.get(sd.kind) == kind):
            seeded += _seed_starts(kind, sd, period_s)
    # the grid when there are no seeds, or for a family whose seeds can all mislead
    gridded = fam.grid_points(period_s) if not seeded or fam.grid_with_seeds else []
    if not seeded and not gridded:
        raise ValueError(f"the {kind} family has no starting grid; fit it with a seed from "
                         f"{' or '.join(fam.seeded_from)}")

    def ranked(points: list[np.ndarray]) -> list[tuple[float, np.ndarray]]:
        out = []
        for x in points:
            x = np.clip(x, lb + 1e-9, ub - 1e-9)
            r = f.residual(x)
            out.append((float(r @ r), x))
        return sorted(out, key=lambda s: s[0])

    rs, rg = ranked(seeded), ranked(gridded)
    # seeded families: the two most promising seeds (a seed that fits best at first sight can
    # lead into a poorer minimum) and the best grid point when there is a grid too
    starts = rs[:1] + rg[:1] if rs and rg else rs[:2] if rs else rg[:1]
    if not seeded and len(y) * dt > LONG_RECORD_PERIODS * period_s:
        # a long record: the coarse grid can rank a start in a poorer basin first, so the
        # family is first fitted on the last ten periods and that fit starts the search too
        tail = int(10 * period_s / dt)
        short = fit_model(kind, dt, u[-tail:], y[-tail:], period_s, amplitude,
                          variant="free", u_ref=u_ref, seed=seed)
        x_short = np.clip(fam.search_vector(short.params, period_s), lb + 1e-9, ub - 1e-9)
        starts = [(float(f.residual(x_short) @ f.residual(x_short)), x_short)] + starts
    best = None
    for _, x0 in starts:
        try:
            sol = optimize.least_squares(f.residual, x0, bounds=(lb, ub), method="trf",
                                         x_scale=np.ones_like(x0), diff_step=1e-6,
                                         xtol=1e-8, ftol=1e-9, gtol=1e-10,
                                         max_nfev=40 if seeded else 60)
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
        if variant == "rest" and fam.integrating:
            extras["trim"] = float(u_ref - coef[2] / K)  # input that held the plant still
        elif fam.integrating:
            # ramp coefficient = -K * (trim - mean(u)) -> trim
            extras["trim"] = float(np.mean(u) - coef[-1] / K)
    if fam.second_order:  # real poles of the second-order factor
        z, T = params["zeta"], params["T"]
        if z >= 1:
            s = np.sqrt(z * z - 1)
            extras["T1"] = T * (z + s)
            extras["T2"] = T * (z - s)
    rmse = float(np.sqrt(np.mean(r * r)))
    return Model(kind=kind, params=params, rmse=rmse,
                 normalized_delay=fam.normalized_delay(params),
                 rel_rmse=rmse / amplitude if amplitude > 0 else float("nan"),
                 extras=extras)


def fit_models(dt: float, u: np.ndarray, y: np.ndarray, period_s: float, amplitude: float,
               kinds: tuple[str, ...] = MODEL_KINDS, u_ref: float = 0.0,
               noise_std: float | None = None, at_rest: bool | None = None) -> dict[str, Model]:
    """Fit every family in ``kinds`` (see :func:`fit_model`) in one variant. ``at_rest``
    False (the record starts mid-oscillation, as the online workflow's windows do) fits with a
    free initial state only; True only at rest; None lets the record decide: assuming the
    record starts at rest with the relay output at ``u_ref`` before the first sample (the
    relay centre), or with a free initial state. The at-rest fit also sees the start-up,
    which pins the low-frequency gain. The variant is decided on the two cheapest families
    (``fopdt``, ``ipdt``): at rest unless their best at-rest misfit (residual beyond the noise
    ``noise_std``) is clearly worse than their best free one (more than twice and by more
    than 1 % of the amplitude), i.e. unless
    the record did not start at rest; the free fits are skipped when an at-rest fit is
    already within 0.5 % of the amplitude or within 1.05 times the measurement noise
    ``noise_std`` (when given). A richer family (``topdt``, ``isopdt``, ``ztopdt``,
    ``izsopdt``) starts from the parameters of the simpler families it extends, fitted in the
    same variant, and is not fitted at all (absent from the result) when a family it extends already fits down to
    the noise (``select_model`` could never prefer it then).

    Parameters
    ----------
    dt : float
        Sample time (s).
    u, y : ndarray
        Applied relay output and measurement.
    period_s, amplitude : float
        Oscillation period and amplitude.
    kinds : tuple of str
        Families to fit (codes of :data:`FAMILIES`).
    u_ref : float
        Relay centre: the output before the first sample of an at-rest record.
    noise_std : float, optional
        Measurement noise (standard deviation).
    at_rest : bool, optional
        Whether the record starts at rest (None: decided from the record).

    Returns
    -------
    dict of str to Model
        The fitted families by code.
    """
    floor = 0.005 * amplitude
    if noise_std is not None and np.isfinite(noise_std):
        # 1.05: a residual of 1.3 noise deviations still hides a misfit of 0.8 sigma, which
        # on a long record is a clearly wrong start assumption
        floor = max(floor, 1.05 * float(noise_std))
    order = sorted(kinds, key=lambda k: any(s in kinds for s in SEEDED_FROM.get(k, ())))

    sig = float(noise_std) if noise_std is not None and np.isfinite(noise_std) else 0.0
    at_noise = max(1e-4 * amplitude, 0.3 * sig)  # misfit floor of select_model

    def misfit(m: Model) -> float:  # residual beyond the measurement noise
        return float(np.sqrt(max(m.rmse ** 2 - sig ** 2, 0.0)))

    def reaches_noise(m: Model) -> bool:
        return misfit(m) <= at_noise

    def contained(k: str) -> set[str]:  # every family k contains, directly or through others
        out: set[str] = set()
        todo = list(NESTED_IN.get(k, ()))
        while todo:
            c = todo.pop()
            if c not in out:
                out.add(c)
                todo += NESTED_IN.get(c, ())
        return out

    def fit_all(variant: str, res: dict[str, Model], only=None) -> dict[str, Model]:
        for k in order:
            if k in res or (only is not None and k not in only):
                continue
            # a family it contains already fits down to the noise: select_model could never
            # prefer it, skip the fit
            if any(c in res and reaches_noise(res[c]) for c in contained(k)):
                continue
            res[k] = fit_model(k, dt, u, y, period_s, amplitude, variant=variant, u_ref=u_ref,
                               seed=tuple(res[s] for s in SEEDED_FROM.get(k, ()) if s in res))
        if only is None:
            # a family never fits worse than a family it contains (as an extra factor or as a
            # limit); when its search ended above one (a local minimum: the stable families'
            # starting points never look at a lag far slower than the oscillation, where their
            # integrating limits sit), it is searched again from that family's fit and the
            # better fit kept. Contained families first, so that a repair carries on upwards.
            for k in sorted(res, key=lambda k: len(contained(k))):
                for c in NESTED_IN.get(k, ()):
                    seedable = c in SEEDED_FROM.get(k, ()) or STABLE_LIMIT.get(c) == k
                    if c in res and seedable and res[c].rmse < res[k].rmse:
                        again = fit_model(k, dt, u, y, period_s, amplitude, variant=variant,
                                          u_ref=u_ref, seed=res[c])
                        if again.rmse < res[k].rmse:
                            res[k] = again
        return res

    # the cheap base families decide whether the record starts at rest
    base_kinds = [k for k in ("fopdt", "ipdt") if k in kinds] or order[:1]
    if at_rest is not None:
        variant = "rest" if at_rest else "free"
        out = fit_all(variant, {})
        return {k: out[k] for k in kinds if k in out}
    rest = fit_all("rest", {}, only=base_kinds)
    variant = "rest"
    if min(m.rmse for m in rest.values()) > floor:
        free = fit_all("free", {}, only=base_kinds)
        r = min(misfit(m) for m in rest.values())
        f = min(misfit(m) for m in free.values())
        if r > max(2.0 * f, f + 0.01 * amplitude):
            variant, rest = "free", free
    out = fit_all(variant, rest)
    return {k: out[k] for k in kinds if k in out}


def _bic(m: Model, n: int, amplitude: float) -> float:
    floor = 1e-4 * amplitude
    n_par = m.family.n_params
    return n * np.log(max(m.rmse, floor) ** 2) + n_par * np.log(n)


def select_model(models: dict[str, Model], n_samples: int, amplitude: float,
                 noise_std: float | None = None) -> Model:
    """Choose a model by fit quality (BIC) and normalized delay (Berner 2017).

    A model with a non-positive gain or a non-finite residual is never chosen. The lowest BIC
    wins, except that a richer family must earn its extra parameters against each simpler
    family it contains (``NESTED_IN``: by an extra factor, e.g. ``topdt`` over ``sopdt``, or
    as a limit, e.g. ``topdt`` over ``isopdt``: an integrator is a lag far slower than the
    record, whose static gain the record cannot show): its misfit must be more than 10 %
    below the simpler one's, more than 30 % for a delay-dominated ``fopdt`` (``tau > 0.6``).
    The misfit is the residual in excess of the measurement noise ``noise_std`` (when given),
    ``sqrt(rmse^2 - noise^2)``, floored at 0.3 noise deviations and 1e-4 of the amplitude, so
    that two fits that both reach the noise are called equal; a rejected richer family is set
    aside and the choice repeated.

    Parameters
    ----------
    models : dict of str to Model
        Fitted families (:func:`fit_models`).
    n_samples : int
        Samples in the fitted record (for the information criterion).
    amplitude : float
        Oscillation amplitude.
    noise_std : float, optional
        Measurement noise (standard deviation).

    Returns
    -------
    Model
    """
    ok = {k: m for k, m in models.items() if np.isfinite(m.rmse) and m.params["K"] > 0}
    if not ok:
        return min(models.values(), key=lambda m: m.rmse if np.isfinite(m.rmse) else np.inf)
    n = max(n_samples, 10)
    sig = float(noise_std) if noise_std is not None and np.isfinite(noise_std) else 0.0
    floor = max(1e-4 * amplitude, 0.3 * sig)

    def misfit(m: Model) -> float:
        return max(float(np.sqrt(max(m.rmse ** 2 - sig ** 2, 0.0))), floor)

    def earns(m: Model, simpler: Model) -> bool:
        need = 0.7 if simpler.kind == "fopdt" and simpler.normalized_delay > 0.6 else 0.9
        return misfit(m) <= need * misfit(simpler)

    pool = dict(ok)
    while True:
        best = min(pool.values(), key=lambda m: _bic(m, n, amplitude))
        simpler = [ok[c] for c in NESTED_IN.get(best.kind, ()) if c in ok]
        if len(pool) == 1 or all(earns(best, s) for s in simpler):
            return best
        del pool[best.kind]

"""The process-model families fitted to relay records: one record per family, one table.

Every family has a dead time ``L`` and a gain ``K``; ``T2(s) = T^2 s^2 + 2 zeta T s + 1`` is a
second-order factor with real or complex poles:

=========  ===================================================  =================================
code       transfer function                                    in words
=========  ===================================================  =================================
fopdt      ``K exp(-Ls) / (T s + 1)``                           first-order lag with dead time
sopdt      ``K exp(-Ls) / T2(s)``                               second-order lag with dead time
ipdt       ``K exp(-Ls) / (s (T s + 1))``                       integrator plus first-order lag
topdt      ``K exp(-Ls) / (T2(s) (T3 s + 1))``                  third-order lag with dead time
isopdt     ``K exp(-Ls) / (s T2(s))``                           integrator plus second-order lag
ztopdt     ``K (Tz s + 1) exp(-Ls) / (T2(s) (T3 s + 1))``       third-order lag with a zero
izsopdt    ``K (Tz s + 1) exp(-Ls) / (s T2(s))``                integrator, second-order lag, zero
=========  ===================================================  =================================

``Tz < 0`` is a right half-plane zero (inverse response). ``ipdt`` keeps its short code for the
logbook's sake, but it is the integrator *with a first-order lag* ``T`` (the lag that an inner
loop or an actuator leaves), not the bare integrator with dead time.

Relations between families, which the fit and the choice read:

* ``nested_in``: the simpler families this one contains, by an extra factor (``topdt`` contains
  ``sopdt`` with ``T3 = 0``) or as a limit: an integrator is a lag far slower than the record,
  ``K / s = lim K T / (T s + 1)`` for ``T -> infinity``, so ``topdt`` contains ``isopdt``. The
  choice asks a richer family to earn its extra parameters against each of them.
* ``seeded_from``: the fitted families whose parameters start this one's search.
* ``stable_limit``: for an integrating family, the stable family that contains it as a limit.

The search runs over ``log T``, ``log zeta``, ``log T3`` and ``Tz`` (whichever the family
has) and the dead time in periods, ``L / P``; the gain enters linearly (see
:mod:`agent.analysis.models`).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["FAMILIES", "Family", "Param", "family"]


@dataclass(frozen=True)
class Param:
    """One parameter of a model family: its name, unit and meaning in words."""

    name: str
    unit: str
    label: str


_K = Param("K", "measurement per output unit", "static gain")
_KI = Param("K", "measurement per output unit and second", "integrating gain (slope per unit "
            "of output)")
_T1 = Param("T", "s", "time constant of the lag")
_T = Param("T", "s", "time constant of the second-order factor")
_ZETA = Param("zeta", "1", "damping ratio of the second-order factor (below 1: resonant)")
_T3 = Param("T3", "s", "time constant of the third pole")
_TZ = Param("Tz", "s", "time constant of the zero (negative: inverse response)")
_L = Param("L", "s", "dead time")


@dataclass(frozen=True)
class Family:
    """One model family: what it is called, what it means, and how it is built and searched.

    Attributes
    ----------
    code : str
        Short name stored in results and logs (``Model.kind``).
    label : str
        Plain-language name, e.g. "integrator plus second-order lag with dead time".
    explanation : str
        When a loop looks like this, in a sentence for users.
    formula : str
        The transfer function in text.
    second_order : bool
        The main lag is the second-order factor ``T2(s)`` (else ``T s + 1``).
    third_pole, zero, integrating : bool
        The family has the pole ``T3``, the zero ``Tz``, an integrator.
    nested_in, seeded_from : tuple of str
        See the module docstring.
    stable_limit : str or None
        See the module docstring.
    grid : tuple of tuple of float
        Coarse starting points of the search when no fitted family seeds it: the search
        variables with time constants relative to the period (``Tz`` too) and the dead time in
        periods.
    grid_with_seeds : bool
        Search the grid even when seeded (a family whose seeds can all mislead).
    """

    code: str
    label: str
    explanation: str
    formula: str
    second_order: bool
    third_pole: bool
    zero: bool
    integrating: bool
    nested_in: tuple[str, ...] = ()
    seeded_from: tuple[str, ...] = ()
    stable_limit: str | None = None
    grid: tuple[tuple[float, ...], ...] = ()
    grid_with_seeds: bool = False

    @property
    def params(self) -> tuple[Param, ...]:
        """The family's parameters in order (``K`` first, ``L`` last)."""
        out = [_KI if self.integrating else _K]
        out += [_T, _ZETA] if self.second_order else [_T1]
        if self.third_pole:
            out.append(_T3)
        if self.zero:
            out.append(_TZ)
        return (*out, _L)

    @property
    def param_names(self) -> tuple[str, ...]:
        """Names of :attr:`params`."""
        return tuple(p.name for p in self.params)

    @property
    def n_params(self) -> int:
        """Number of parameters (the information criterion counts them)."""
        return len(self.params)

    @property
    def search_names(self) -> tuple[str, ...]:
        """The searched parameters before the dead time (``K`` and ``L`` excluded)."""
        return tuple(n for n in self.param_names if n not in ("K", "L"))

    def _den(self, T: float, zeta: float, T3: float) -> np.ndarray:
        den = np.array([T * T, 2.0 * zeta * T, 1.0]) if self.second_order else np.array([T, 1.0])
        if self.third_pole:
            den = np.polymul(den, [T3, 1.0])
        if self.integrating:
            den = np.polymul(den, [1.0, 0.0])
        return den

    def tf(self, params: dict[str, float]) -> tuple[np.ndarray, np.ndarray, float]:
        """Transfer function of a fitted model of this family.

        Parameters
        ----------
        params : dict
            The family's parameters by name (:attr:`param_names`).

        Returns
        -------
        tuple
            ``(num, den, delay_s)``, polynomials in descending powers of s.
        """
        p = params
        den = self._den(p["T"], p.get("zeta", 1.0), p.get("T3", 0.0))
        num = np.array([p["K"] * p["Tz"], p["K"]]) if self.zero else np.array([p["K"]])
        return num, den, float(p["L"])

    def unit_tf(self, th: np.ndarray) -> tuple[np.ndarray, np.ndarray, dict[str, float]]:
        """Unit-gain transfer function at a point of the search.

        Parameters
        ----------
        th : ndarray
            Search variables without the dead time, in :attr:`search_names` order (time
            constants and damping as logarithms, ``Tz`` as is).

        Returns
        -------
        tuple
            ``(num, den, values)``: the polynomials and the parameter values by name.
        """
        vals = {n: (float(v) if n == "Tz" else float(np.exp(v)))
                for n, v in zip(self.search_names, th)}
        den = self._den(vals["T"], vals.get("zeta", 1.0), vals.get("T3", 0.0))
        num = np.array([vals["Tz"], 1.0]) if self.zero else np.array([1.0])
        return num, den, vals

    def search_vector(self, params: dict[str, float], period_s: float) -> np.ndarray:
        """The search point of a fitted model's parameters (the inverse of :meth:`unit_tf`,
        plus the dead time in periods).

        Parameters
        ----------
        params : dict
            Parameters by name; a missing one takes a neutral value.
        period_s : float
            Oscillation period.

        Returns
        -------
        ndarray
        """
        x = [params.get(n, 0.0) if n == "Tz" else np.log(params.get(n, 1.0))
             for n in self.search_names]
        return np.array([*x, params["L"] / period_s], dtype=float)

    def bounds(self, period_s: float) -> tuple[np.ndarray, np.ndarray]:
        """Box of the search: time constants within 1e-3..1e3 periods, damping 0.05..50,
        ``|Tz|`` below a period, the dead time below 0.6 period.

        Parameters
        ----------
        period_s : float
            Oscillation period.

        Returns
        -------
        tuple of ndarray
            ``(lower, upper)``.
        """
        lnP = np.log(period_s)
        box = {"T": (lnP + np.log(1e-3), lnP + np.log(1e3)), "T3": (lnP + np.log(1e-3),
                                                                    lnP + np.log(1e3)),
               "zeta": (np.log(0.05), np.log(50.0)), "Tz": (-period_s, period_s)}
        lo = [box[n][0] for n in self.search_names] + [0.0]
        hi = [box[n][1] for n in self.search_names] + [0.6]
        return np.array(lo), np.array(hi)

    def grid_points(self, period_s: float) -> list[np.ndarray]:
        """:attr:`grid` in search variables for this period.

        Parameters
        ----------
        period_s : float
            Oscillation period.

        Returns
        -------
        list of ndarray
        """
        lnP = np.log(period_s)
        out = []
        for g in self.grid:
            x = []
            for n, v in zip(self.search_names, g):
                if n == "Tz":
                    x.append(v * period_s)
                elif n == "zeta":
                    x.append(np.log(v))
                else:
                    x.append(np.log(v) + lnP)
            out.append(np.array([*x, g[-1]]))
        return out

    def residence_time(self, params: dict[str, float]) -> float:
        """Sum of the lag time constants (the average residence time of the lags; the
        integrator and the zero excluded).

        Parameters
        ----------
        params : dict
            Parameters by name.

        Returns
        -------
        float
        """
        lag = 2.0 * params["zeta"] * params["T"] if self.second_order else params["T"]
        return lag + (params["T3"] if self.third_pole else 0.0)

    def normalized_delay(self, params: dict[str, float]) -> float:
        """``tau = L / (L + residence time)`` (Berner 2017); 0 for the integrating families,
        whose tau tends to 0 by definition.

        Parameters
        ----------
        params : dict
            Parameters by name.

        Returns
        -------
        float
        """
        if self.integrating:
            return 0.0
        L, tar = params["L"], self.residence_time(params)
        return L / (L + tar) if L + tar > 0 else 0.0


def _product(*axes: tuple[float, ...]) -> tuple[tuple[float, ...], ...]:
    pts: list[tuple[float, ...]] = [()]
    for ax in axes:
        pts = [(*p, v) for p in pts for v in ax]
    return tuple(pts)


FAMILIES: dict[str, Family] = {f.code: f for f in (
    Family("fopdt", "first-order lag with dead time",
           "The measurement follows the output with one lag and a delay, and settles.",
           "K exp(-L s) / (T s + 1)", second_order=False, third_pole=False, zero=False,
           integrating=False,
           grid=_product((0.03, 0.15, 0.6, 3.0, 15.0), (0.03, 0.12, 0.22, 0.32, 0.42))),
    Family("sopdt", "second-order lag with dead time",
           "Two lags (or a damped resonance) and a delay; the measurement settles.",
           "K exp(-L s) / (T^2 s^2 + 2 zeta T s + 1)", second_order=True, third_pole=False,
           zero=False, integrating=False, nested_in=("fopdt", "ipdt"),
           grid=_product((0.05, 0.15, 0.5, 2.0), (0.5, 1.0, 2.5), (0.02, 0.12, 0.25, 0.4))),
    Family("ipdt", "integrator plus first-order lag with dead time",
           "The measurement keeps moving while the output is off its trim (an angle under a "
           "rate loop), behind one lag and a delay.",
           "K exp(-L s) / (s (T s + 1))", second_order=False, third_pole=False, zero=False,
           integrating=True, stable_limit="sopdt",
           grid=_product((0.01, 0.05, 0.15, 0.4), (0.0, 0.05, 0.12, 0.22))),
    Family("topdt", "third-order lag with dead time",
           "Three lags (higher-order lags in series) and a delay; the measurement settles.",
           "K exp(-L s) / ((T^2 s^2 + 2 zeta T s + 1) (T3 s + 1))", second_order=True,
           third_pole=True, zero=False, integrating=False, nested_in=("sopdt", "isopdt"),
           seeded_from=("sopdt",),
           grid=_product((0.05, 0.15, 0.5), (0.5, 1.0), (0.02, 0.1), (0.02, 0.12, 0.3))),
    Family("isopdt", "integrator plus second-order lag with dead time",
           "An integrating loop behind two lags (or a damped resonance) and a delay.",
           "K exp(-L s) / (s (T^2 s^2 + 2 zeta T s + 1))", second_order=True,
           third_pole=False, zero=False, integrating=True, nested_in=("ipdt",),
           seeded_from=("ipdt",), stable_limit="topdt",
           grid=_product((0.05, 0.15, 0.5, 2.0), (0.5, 1.0, 2.5), (0.02, 0.12, 0.25, 0.4))),
    Family("ztopdt", "third-order lag with a zero and dead time",
           "Three lags and a zero; a negative Tz is an inverse response (the measurement "
           "first moves the wrong way).",
           "K (Tz s + 1) exp(-L s) / ((T^2 s^2 + 2 zeta T s + 1) (T3 s + 1))",
           second_order=True, third_pole=True, zero=True, integrating=False,
           nested_in=("topdt", "izsopdt"), seeded_from=("topdt",)),
    Family("izsopdt", "integrator plus second-order lag with a zero and dead time",
           "An integrating loop with two lags and a zero, e.g. an angle loop around a rate "
           "loop closed with a PI, whose integral action leaves the zero.",
           "K (Tz s + 1) exp(-L s) / (s (T^2 s^2 + 2 zeta T s + 1))", second_order=True,
           third_pole=False, zero=True, integrating=True, nested_in=("isopdt",),
           seeded_from=("isopdt", "ztopdt"), stable_limit="ztopdt", grid_with_seeds=True,
           # (T, zeta, Tz, L), Tz a multiple of T
           grid=tuple((T, z, rz * T, lf) for T in (0.1, 0.25) for z in (0.5, 1.0)
                      for rz in (0.5, 1.5) for lf in (0.02, 0.08))),
)}


def family(code: str) -> Family:
    """The family of a model code.

    Parameters
    ----------
    code : str
        ``Model.kind``, e.g. ``"ipdt"``.

    Returns
    -------
    Family

    Raises
    ------
    ValueError
        For a code that names no family (the known codes are listed in the message).
    """
    try:
        return FAMILIES[code]
    except KeyError:
        raise ValueError(f"unknown model family {code!r}; expected one of "
                         f"{', '.join(FAMILIES)}") from None

"""Tuning rules: from the ultimate point and from a first-order-plus-dead-time model.

Each rule returns ``(kp, ki, kd)`` in parallel form (``ki = kp/Ti``, ``kd = kp*Td``) or raises
``ValueError`` for a controller type it does not define. A derivative filter and set-point
weight are added by :mod:`agent.analysis.tuning`.
"""

from __future__ import annotations

import numpy as np

__all__ = [
    "amigo",
    "amigo_setpoint_weight",
    "astrom_hagglund_phase_margin",
    "tyreus_luyben",
    "ziegler_nichols",
]


def _parallel(K: float, Ti: float, Td: float) -> tuple[float, float, float]:
    ki = K / Ti if np.isfinite(Ti) and Ti > 0 else 0.0
    return float(K), float(ki), float(K * Td)


def ziegler_nichols(ku: float, tu_s: float, controller: str) -> tuple[float, float, float]:
    """Ziegler & Nichols (1942), "Optimum settings for automatic controllers", Trans. ASME 64,
    ultimate-cycle table: P ``0.5 Ku``; PI ``0.45 Ku, Ti = Tu/1.2``;
    PID ``0.6 Ku, Ti = Tu/2, Td = Tu/8``. No PD entry in the table.

    Parameters
    ----------
    ku, tu_s : float
        Ultimate gain and period (s).
    controller : {"p", "pi", "pid"}
        Controller structure.

    Returns
    -------
    tuple of float
        ``(kp, ki, kd)``.

    Raises
    ------
    ValueError
        For a controller type the table does not cover.
    """
    if controller == "pi":
        return _parallel(0.45 * ku, tu_s / 1.2, 0.0)
    if controller == "pid":
        return _parallel(0.6 * ku, tu_s / 2.0, tu_s / 8.0)
    raise ValueError("Ziegler–Nichols (1942) gives no PD setting")


def tyreus_luyben(ku: float, tu_s: float, controller: str) -> tuple[float, float, float]:
    """Tyreus & Luyben (1992), "Tuning PI controllers for integrator/dead time processes",
    Ind. Eng. Chem. Res. 31(11): PI ``Ku/3.2, Ti = 2.2 Tu``; PID ``Ku/2.2, Ti = 2.2 Tu,
    Td = Tu/6.3``. No PD entry.

    Parameters
    ----------
    ku, tu_s : float
        Ultimate gain and period (s).
    controller : {"pi", "pid"}
        Controller structure.

    Returns
    -------
    tuple of float
        ``(kp, ki, kd)``.

    Raises
    ------
    ValueError
        For a controller type the table does not cover.
    """
    if controller == "pi":
        return _parallel(ku / 3.2, 2.2 * tu_s, 0.0)
    if controller == "pid":
        return _parallel(ku / 2.2, 2.2 * tu_s, tu_s / 6.3)
    raise ValueError("Tyreus–Luyben (1992) gives no PD setting")


def astrom_hagglund_phase_margin(ku: float, tu_s: float, controller: str,
                                 phase_margin_deg: float = 45.0, alpha: float = 4.0
                                 ) -> tuple[float, float, float]:
    """Åström & Hägglund (1984), "Automatic tuning of simple regulators with specifications on
    phase and amplitude margins", Automatica 20(5): move the ultimate point ``-1/Ku`` to the
    unit circle at ``-180° + φm``. With ``ωu = 2π/Tu``: ``K = Ku cos φm`` and the controller
    phase at ωu must be ``φm``: PID with ``Ti = α Td`` gives
    ``ωu Td = (tan φm + sqrt(tan²φm + 4/α))/2``; PD gives ``ωu Td = tan φm``.
    A PI cannot add phase, so the rule has no PI form.

    Parameters
    ----------
    ku, tu_s : float
        Ultimate gain and period (s).
    controller : {"pid", "pd"}
        Controller structure.
    phase_margin_deg : float
        Wanted phase margin (degrees).
    alpha : float
        Ratio ``Ti / Td`` of the PID.

    Returns
    -------
    tuple of float
        ``(kp, ki, kd)``.

    Raises
    ------
    ValueError
        For a controller type the rule does not cover.
    """
    phi = np.radians(phase_margin_deg)
    wu = 2 * np.pi / tu_s
    K = ku * np.cos(phi)
    if controller == "pid":
        x = (np.tan(phi) + np.sqrt(np.tan(phi) ** 2 + 4.0 / alpha)) / 2.0
        Td = x / wu
        return _parallel(K, alpha * Td, Td)
    if controller == "pd":
        Td = np.tan(phi) / wu
        return float(K), 0.0, float(K * Td)
    raise ValueError("the Åström–Hägglund (1984) phase-margin rule needs derivative action")


def amigo(K: float, T: float, L: float, controller: str, integrating: bool = False
          ) -> tuple[float, float, float]:
    """AMIGO rules from a FOPDT model ``K exp(-Ls)/(Ts+1)`` or, with ``integrating=True``, an
    integrator with dead time ``K exp(-Ls)/s`` (``K`` is then the velocity gain).

    PI (Åström & Hägglund 2006, Advanced PID Control, ISA, sect. 7.6)::

        K*kp = 0.15 + (0.35 - L T/(L+T)^2) T/L,   Ti = 0.35 L + 13 L T^2/(T^2 + 12 L T + 7 L^2)
        integrating: kp = 0.35/(K L),             Ti = 13.4 L

    PID (Åström & Hägglund 2004, "Revisiting the Ziegler–Nichols step response method for PID
    control", J. Process Control 14)::

        K*kp = 0.2 + 0.45 T/L,   Ti = (0.4 L + 0.8 T)/(L + 0.1 T) L,   Td = 0.5 L T/(0.3 L + T)
        integrating: kp = 0.45/(K L),   Ti = 8 L,   Td = 0.5 L

    Parameters
    ----------
    K, T, L : float
        Gain, time constant (s) and dead time (s) of the model.
    controller : {"pi", "pid"}
        Controller structure.
    integrating : bool
        Use the integrating forms (``T`` unused).

    Returns
    -------
    tuple of float
        ``(kp, ki, kd)``.

    Raises
    ------
    ValueError
        For a non-positive gain or dead time, or a controller type the rules do not cover.
    """
    if L <= 0 or K <= 0:
        raise ValueError("AMIGO needs a positive gain and a positive dead time")
    if controller == "pi":
        if integrating:
            return _parallel(0.35 / (K * L), 13.4 * L, 0.0)
        kp = (0.15 + (0.35 - L * T / (L + T) ** 2) * T / L) / K
        Ti = 0.35 * L + 13 * L * T * T / (T * T + 12 * L * T + 7 * L * L)
        return _parallel(kp, Ti, 0.0)
    if controller == "pid":
        if integrating:
            return _parallel(0.45 / (K * L), 8 * L, 0.5 * L)
        kp = (0.2 + 0.45 * T / L) / K
        Ti = (0.4 * L + 0.8 * T) / (L + 0.1 * T) * L
        Td = 0.5 * L * T / (0.3 * L + T)
        return _parallel(kp, Ti, Td)
    raise ValueError("AMIGO gives no PD setting")


def amigo_setpoint_weight(tau: float) -> float:
    """AMIGO PID set-point weight: ``b = 0`` for ``tau <= 0.5``, ``b = 1`` above
    (Åström & Hägglund 2004; value from memory).

    Parameters
    ----------
    tau : float
        Normalized time delay ``L / (L + T)``.

    Returns
    -------
    float
    """
    return 0.0 if tau <= 0.5 else 1.0

"""Tuning rules reproduce their published tables and formulas."""

import numpy as np
import pytest

from agent.analysis.controller import controller_freq
from agent.analysis.rules import (
    amigo,
    amigo_setpoint_weight,
    astrom_hagglund_phase_margin,
    tyreus_luyben,
    ziegler_nichols,
)

KU, TU = 10.0, 2.0


def test_ziegler_nichols_table():
    # Ziegler & Nichols (1942), Optimum settings for automatic controllers, Trans. ASME 64:
    # PI 0.45 Ku, Ti = Tu/1.2; PID 0.6 Ku, Ti = Tu/2, Td = Tu/8
    kp, ki, kd = ziegler_nichols(KU, TU, "pi")
    assert (kp, kp / ki, kd) == pytest.approx((4.5, TU / 1.2, 0.0))
    kp, ki, kd = ziegler_nichols(KU, TU, "pid")
    assert (kp, kp / ki, kd / kp) == pytest.approx((6.0, 1.0, 0.25))
    with pytest.raises(ValueError):
        ziegler_nichols(KU, TU, "pd")


def test_tyreus_luyben_table():
    # Tyreus & Luyben (1992), Tuning PI controllers for integrator/dead time processes,
    # Ind. Eng. Chem. Res. 31(11): PI Ku/3.2, Ti = 2.2 Tu; PID Ku/2.2, Ti = 2.2 Tu, Td = Tu/6.3
    kp, ki, kd = tyreus_luyben(KU, TU, "pi")
    assert (kp, kp / ki, kd) == pytest.approx((KU / 3.2, 4.4, 0.0))
    kp, ki, kd = tyreus_luyben(KU, TU, "pid")
    assert (kp, kp / ki, kd / kp) == pytest.approx((KU / 2.2, 4.4, TU / 6.3))


@pytest.mark.parametrize("controller", ["pid", "pd"])
@pytest.mark.parametrize("pm", [30.0, 45.0, 60.0])
def test_astrom_hagglund_moves_ultimate_point_to_phase_margin(controller, pm):
    # Åström & Hägglund (1984), Automatica 20(5): the point G(j wu) = -1/Ku is moved to the unit
    # circle at -180° + phase margin
    kp, ki, kd = astrom_hagglund_phase_margin(KU, TU, controller, pm)
    wu = 2 * np.pi / TU
    L = controller_freq(kp, ki, kd, 0.0, np.array([wu]))[0] * (-1.0 / KU)
    assert abs(L) == pytest.approx(1.0, rel=1e-12)
    assert np.degrees(np.angle(L)) + 180.0 == pytest.approx(pm, abs=1e-9)
    if controller == "pid":
        assert kp / ki == pytest.approx(4 * kd / kp)  # Ti = 4 Td


def test_amigo_worked_example_fopdt():
    # Åström & Hägglund (2006, PI) and (2004, PID) AMIGO formulas, values from memory; for
    # K = T = L = 1 they give by hand: PI kp = 0.25, Ti = 1.0; PID kp = 0.65,
    # Ti = 1.2/1.1 = 1.0909..., Td = 0.5/1.3 = 0.3846...
    kp, ki, kd = amigo(1.0, 1.0, 1.0, "pi")
    assert (kp, kp / ki) == pytest.approx((0.25, 1.0))
    kp, ki, kd = amigo(1.0, 1.0, 1.0, "pid")
    assert (kp, kp / ki, kd / kp) == pytest.approx((0.65, 1.2 / 1.1, 0.5 / 1.3))


@pytest.mark.parametrize("K, T, L", [(2.0, 5.0, 0.5), (0.5, 0.3, 1.2), (3.0, 1.0, 0.1)])
def test_amigo_formulas(K, T, L):
    # Åström & Hägglund (2006), Advanced PID Control, AMIGO PI; (2004) J. Process Control 14,
    # AMIGO PID (formulas from memory, written out independently here)
    kp, ki, _ = amigo(K, T, L, "pi")
    assert kp == pytest.approx(0.15 / K + (0.35 - L * T / (L + T) ** 2) * T / (K * L))
    assert kp / ki == pytest.approx(0.35 * L + 13 * L * T ** 2 / (T ** 2 + 12 * L * T + 7 * L ** 2))
    kp, ki, kd = amigo(K, T, L, "pid")
    assert kp == pytest.approx((0.2 + 0.45 * T / L) / K)
    assert kp / ki == pytest.approx((0.4 * L + 0.8 * T) / (L + 0.1 * T) * L)
    assert kd / kp == pytest.approx(0.5 * L * T / (0.3 * L + T))


def test_amigo_integrating_formulas():
    # Åström & Hägglund (2006): integrator with dead time Kv e^{-Ls}/s: PI 0.35/(Kv L),
    # Ti = 13.4 L; PID 0.45/(Kv L), Ti = 8 L, Td = 0.5 L (values from memory)
    kp, ki, _ = amigo(2.0, 0.0, 0.5, "pi", integrating=True)
    assert (kp, kp / ki) == pytest.approx((0.35, 6.7))
    kp, ki, kd = amigo(2.0, 0.0, 0.5, "pid", integrating=True)
    assert (kp, kp / ki, kd / kp) == pytest.approx((0.45, 4.0, 0.25))
    assert amigo_setpoint_weight(0.3) == 0.0 and amigo_setpoint_weight(0.7) == 1.0

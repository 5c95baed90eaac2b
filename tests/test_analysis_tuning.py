"""Margins, Ms, predictions and candidates against python-control and textbook results."""

import json

import control
import numpy as np
import pytest

from agent.analysis import (
    cascade_check,
    identify,
    loop_bandwidth,
    predict_step,
    simulate_relay,
    step_metrics,
    tune,
)
from agent.analysis.design import ms_constrained_design
from agent.analysis.robustness import margins, sensitivity_peak


class Gains:
    def __init__(self, kp, ki, kd=0.0, tf_s=0.0, b=1.0):
        self.kp, self.ki, self.kd, self.tf_s, self.b = kp, ki, kd, tf_s, b


def _pid_tf(kp, ki, kd, tf_s):
    c = control.tf([kp], [1]) + control.tf([ki], [1, 0])
    if kd:
        c = c + control.tf([kd, 0], [tf_s, 1])
    return c


@pytest.mark.parametrize("num, den, gains", [
    ([1.0], [1, 3, 3, 1], (1.0, 0.5, 0.0, 0.0)),
    ([1.0], [1, 3, 3, 1], (2.0, 1.0, 1.5, 0.15)),
    ([1.0], np.polymul([1, 0], [1, 1]), (0.3, 0.02, 0.0, 0.0)),
])
def test_margins_and_ms_against_python_control(num, den, gains):
    # python-control stability_margins on the same loop: gm, pm and sm = 1/Ms
    kp, ki, kd, tf_s = gains
    L = _pid_tf(kp, ki, kd, tf_s) * control.tf(num, den)
    gm, pm, sm, wpc, wgc, _ = control.stability_margins(L)
    my_gm, my_pm, my_wpc, my_wgc = margins((num, den, 0.0), kp, ki, kd, tf_s)
    ms, _ = sensitivity_peak((num, den, 0.0), kp, ki, kd, tf_s)
    assert my_pm == pytest.approx(pm, abs=1e-3)
    assert my_wgc == pytest.approx(wgc, rel=1e-5)
    if np.isfinite(gm):
        assert my_gm == pytest.approx(gm, rel=1e-5)
    assert ms == pytest.approx(1.0 / sm, rel=1e-4)


def test_ms_with_delay_against_pade():
    # python-control: the same loop with a 12th-order Padé delay
    kp, ki, L = 0.4, 0.5, 1.0
    pn, pd = control.pade(L, 12)
    loop = _pid_tf(kp, ki, 0, 0) * control.tf([1], [1, 1]) * control.tf(pn, pd)
    _, pm, sm, _, _, _ = control.stability_margins(loop)
    ms, _ = sensitivity_peak(([1], [1, 1], L), kp, ki, 0.0, 0.0)
    _, my_pm, _, _ = margins(([1], [1, 1], L), kp, ki, 0.0, 0.0)
    assert ms == pytest.approx(1 / sm, rel=1e-3)
    assert my_pm == pytest.approx(pm, abs=0.05)


def test_predicted_load_step_against_python_control():
    # python-control step_response of the continuous closed loop P/(1+CP); the prediction runs
    # the sampled loop at a fine step, so it agrees to a small fraction of the peak
    num, den = [1.0], [1, 3, 3, 1]
    g = Gains(1.0, 0.5)
    P = control.tf(num, den)
    cl = control.feedback(P, _pid_tf(1.0, 0.5, 0, 0))
    pred = predict_step((num, den, 0.0), g, sample_time_s=None, horizon_s=30.0)
    _, yref = control.step_response(cl, T=pred.t_s)
    assert np.max(np.abs(pred.y_load - yref)) < 0.01 * np.max(np.abs(yref))


def test_step_metrics_first_order_lag():
    # textbook first-order lag 1 - e^{-t/T}: rise 10-90 % = T ln 9, 2 % settling = T ln 50,
    # no overshoot, IAE = T
    T = 0.5
    t = np.linspace(0, 10, 200001)
    m = step_metrics(t, 1 - np.exp(-t / T), 0.0, 1.0)
    assert m.overshoot == 0.0
    assert m.rise_s == pytest.approx(T * np.log(9), rel=1e-3)
    assert m.settling_s == pytest.approx(T * np.log(50), rel=1e-3)
    assert m.iae == pytest.approx(T, rel=1e-4)
    with pytest.raises(ValueError, match="zero size"):
        step_metrics(t, t, 1.0, 1.0)


def test_loop_bandwidth_first_order_closed_loop():
    # P control of 1/s: T(s) = kp/(s + kp), -3 dB at w = kp (textbook)
    assert loop_bandwidth(([1.0], [1.0, 0.0], 0.0), Gains(2.0, 0.0)) == pytest.approx(2.0, rel=1e-3)


def test_cascade_check():
    # common practice, no source: inner loop 5-10x faster than the outer loop
    ok = cascade_check(50.0, 5.0)
    assert ok.ok and ok.ratio == pytest.approx(10.0)
    bad = cascade_check(12.0, 4.0)
    assert not bad.ok and "only 3.0x" in bad.message
    with pytest.raises(ValueError, match="positive"):
        cascade_check(0.0, 1.0)


@pytest.fixture(scope="module")
def fopdt_ident():
    rec = simulate_relay([1.0], [1.0, 1.0], 0.5, 0.5, 0.0, 0.0, 0.01, 20.0)
    return identify(rec)


def test_tune_pi_candidates(fopdt_ident):
    res = tune(fopdt_ident, "pi", 1.4, sample_time_s=0.01)
    rules = [c.rule for c in res.candidates]
    assert rules == ["ziegler_nichols", "tyreus_luyben", "amigo", "ms_constrained"]
    assert res.recommended == "ms_constrained"
    best = res.get("ms_constrained")
    assert best.ms <= 1.4 * 1.005
    # Garpinger, Hägglund & Åström (2014): the IAE optimum under Ms <= 1.4 beats any other PI
    # meeting the same bound, here AMIGO (whose Ms is below 1.4 on this plant)
    amigo = res.get("amigo")
    assert amigo.ms <= 1.4
    assert best.predicted.iae_load <= amigo.predicted.iae_load
    # board coefficients follow the documented backward-Euler form
    assert best.discrete["ki_ts"] == pytest.approx(best.ki * 0.01)
    assert best.discrete["method"] == "backward_euler"
    assert best.i_limit > 0
    json.dumps(res.to_dict())


def test_tune_margins_against_python_control(fopdt_ident):
    # python-control margins of the candidate on the identified loop model (Padé delay)
    res = tune(fopdt_ident, "pid", 1.4, sample_time_s=0.01)
    c = res.get("ms_constrained")
    num, den, L = fopdt_ident.model_loop.tf()
    pn, pd = control.pade(L, 12)
    loop = _pid_tf(c.kp, c.ki, c.kd, c.tf_s) * control.tf(num, den) * control.tf(pn, pd)
    gm, pm, sm, _, _, _ = control.stability_margins(loop)
    assert c.ms == pytest.approx(1 / sm, rel=2e-3)
    assert c.gm == pytest.approx(gm, rel=2e-3)
    assert c.pm_deg == pytest.approx(pm, abs=0.1)


def test_tune_rejects_bad_arguments(fopdt_ident):
    with pytest.raises(ValueError, match="expected 'pi', 'pd' or 'pid'"):
        tune(fopdt_ident, "pidf")
    with pytest.raises(ValueError, match="above 1"):
        tune(fopdt_ident, "pi", ms_target=0.9)


def test_pd_design_has_no_integral(fopdt_ident):
    res = tune(fopdt_ident, "pd", 1.4, sample_time_s=0.01)
    assert all(c.ki == 0 for c in res.candidates)
    assert res.get("ms_constrained").ms <= 1.41


def test_ms_design_meets_bound_on_integrating_plant():
    d = ms_constrained_design(([45.0], [0.025, 1, 0], 0.0035), "pi", 1.4, 0.001)
    assert d.success and d.ms <= 1.4 * 1.01 and d.settled


def _second_order_step(wn, zeta, t):
    """Unit step response of wn^2/(s^2 + 2 zeta wn s + wn^2), 0 < zeta < 1 (textbook closed
    form, e.g. Ogata, Modern Control Engineering, 5th ed. 2010, section 5-3)."""
    wd = wn * np.sqrt(1 - zeta ** 2)
    return 1 - np.exp(-zeta * wn * t) / np.sqrt(1 - zeta ** 2) * np.sin(wd * t + np.arccos(zeta))


def test_step_metrics_noiseless_second_order_matches_textbook_overshoot():
    # Ogata (2010), Modern Control Engineering, 5th ed., section 5-3: maximum overshoot
    # Mp = exp(-zeta pi / sqrt(1 - zeta^2)), peak at t = pi / wd
    wn, zeta = 10.0, 0.5
    t = np.arange(0, 3, 1e-4)
    m = step_metrics(t, _second_order_step(wn, zeta, t), 0.0, 1.0)
    assert m.overshoot == pytest.approx(np.exp(-zeta * np.pi / np.sqrt(1 - zeta ** 2)), rel=1e-4)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_step_metrics_with_noise_std_removes_noise_peaks(seed):
    # a known second-order step (Ogata 2010, overshoot exp(-zeta pi/sqrt(1-zeta^2)) = 16.3 %)
    # sampled at 1 kHz with white noise of 15 % of the step, as the gyro gives on the stand
    wn, zeta, noise = 10.0, 0.5, 0.15
    t = np.arange(0, 3, 1e-3)
    y = _second_order_step(wn, zeta, t)
    ref = step_metrics(t, y, 0.0, 1.0)
    mp = np.exp(-zeta * np.pi / np.sqrt(1 - zeta ** 2))
    rng = np.random.default_rng(seed)
    yn = 0.2 + 0.5 * (y + noise * rng.standard_normal(len(t)))  # step 0.2 -> 0.7, offset kept
    raw = step_metrics(t, yn, 0.2, 0.7)
    m = step_metrics(t, yn, 0.2, 0.7, noise_std=0.5 * noise)
    # without the filter the noise peaks read as overshoot (the failure seen on the stand)
    assert raw.overshoot - mp > 0.2
    # stated tolerance (see step_metrics): overshoot within 0.06 of the step, rise within 15 %
    assert abs(m.overshoot - mp) <= 0.06
    assert m.rise_s == pytest.approx(ref.rise_s, rel=0.15)
    # the leftover noise is too large to resolve a 2 % band: no made-up settling time
    assert np.isnan(m.settling_s)
    # the leftover noise adds to |r - y| where the response is near r: IAE is biased upward,
    # within 20 % here (measured 5-15 % over these seeds)
    assert m.iae == pytest.approx(ref.iae * 0.5, rel=0.2)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_step_metrics_settling_with_small_noise(seed):
    # settling time jumps by half a damped period when a late peak touches the 2 % band
    # (common practice, no source), so it is checked within pi/wd of the noise-free value
    wn, zeta, noise = 10.0, 0.5, 0.03
    t = np.arange(0, 3, 1e-3)
    y = _second_order_step(wn, zeta, t)
    ref = step_metrics(t, y, 0.0, 1.0)
    rng = np.random.default_rng(seed)
    m = step_metrics(t, y + noise * rng.standard_normal(len(t)), 0.0, 1.0, noise_std=noise)
    wd = wn * np.sqrt(1 - zeta ** 2)
    assert abs(m.settling_s - ref.settling_s) <= np.pi / wd
    assert abs(m.overshoot - ref.overshoot) <= 0.02
    assert m.rise_s == pytest.approx(ref.rise_s, rel=0.05)


def test_step_metrics_noise_std_zero_is_the_raw_metrics_and_bad_values_are_refused():
    t = np.linspace(0, 5, 501)
    y = 1 - np.exp(-t)
    assert step_metrics(t, y, 0.0, 1.0, noise_std=0.0) == step_metrics(t, y, 0.0, 1.0)
    for bad in (-0.1, float("nan"), "loud"):
        with pytest.raises(ValueError, match="noise_std"):
            step_metrics(t, y, 0.0, 1.0, noise_std=bad)


def test_recommended_pi_is_robust_on_integrator_plus_lags():
    # 1/(s (s+1)^2) lies outside the FOPDT/SOPDT/IPDT families; the recommended PI designed
    # for Ms <= 1.4 must keep Ms <= 1.5 on the TRUE loop (python-control stability_margins,
    # sm = 1/Ms, with a Padé approximation of the half-tick hold)
    num, den = [1.0], np.polymul([1, 0], [1, 2, 1])
    ku0, wu0 = 2.0, 1.0  # textbook: phase -90 - 2 atan(w) = -180 at w = 1, |G| = 1/2
    tu0 = 2 * np.pi / wu0
    dt = tu0 / 200
    sd = 0.01 * 4 / (np.pi * ku0)
    rec = simulate_relay(num, den, 0.0, 1.0, 3 * sd, 0.0, dt, 12 * tu0, noise_std=sd, seed=3)
    ident = identify(rec)
    assert ident.best_plant.ku == pytest.approx(ku0, rel=0.02)
    res = tune(ident, "pi", 1.4, sample_time_s=dt)
    c = res.recommended_candidate
    pn, pd = control.pade(dt / 2, 3)
    loop = _pid_tf(c.kp, c.ki, 0.0, 0.0) * control.tf(num, den) * control.tf(pn, pd)
    _, _, sm, _, _, _ = control.stability_margins(loop)
    assert 1.0 / sm <= 1.5
    assert np.all(np.real(control.poles(control.feedback(loop, 1))) < 0)


# ------------------------------------------------------------------ measurement noise


@pytest.mark.parametrize("kp, kd, tf_s", [(2.0, 0.0, 0.0), (1.2, 0.0165, 0.00134),
                                          (17.5, 0.30, 0.0017), (5.0, 0.3, 0.064)])
def test_noise_gain_is_the_h2_norm_of_the_boards_pd_terms(kp, kd, tf_s):
    # outside reference: scipy.signal.dimpulse of the same difference equation (the controller
    # polynomials with ki = 0), H2 norm = sqrt(sum of squared impulse-response samples); and
    # white noise through scipy.signal.lfilter
    from scipy import signal

    from agent.analysis.controller import discrete_polys, noise_gain
    ts = 0.001
    dc, ny, _ = discrete_polys(kp, 0.0, kd, tf_s, 1.0, ts)
    _, (h,) = signal.dimpulse((ny, dc, ts), n=20000)
    assert noise_gain(kp, kd, tf_s, ts) == pytest.approx(np.sqrt(np.sum(h ** 2)), rel=1e-6)
    n = np.random.default_rng(1).normal(0.0, 0.01, 400_000)
    u = signal.lfilter(ny, dc, n)
    assert np.std(u[1000:]) == pytest.approx(0.01 * noise_gain(kp, kd, tf_s, ts), rel=0.01)


def test_the_mock_boards_pid_turns_noise_into_the_predicted_output_deviation():
    # the board's own discrete controller (mock_device.pid) against the formula
    from agent.analysis.controller import noise_gain
    from mock_device.pid import Pid
    p = Pid(0.001)
    p.kp, p.kd, p.tf = 4.3, 0.09, 0.014
    p.configure()
    n = np.random.default_rng(2).normal(0.0, 0.01, 100_000)
    u = np.array([p.update(0.0, float(y)) for y in n])
    assert np.std(u[1000:]) == pytest.approx(0.01 * noise_gain(4.3, 0.09, 0.014, 0.001),
                                             rel=0.02)


def test_filter_for_noise_meets_the_bound_exactly_or_says_it_cannot():
    from agent.analysis.controller import filter_for_noise, noise_gain
    tf = filter_for_noise(5.0, 0.3, 0.001, 9.6)
    assert tf > 0.001 and noise_gain(5.0, 0.3, tf, 0.001) == pytest.approx(9.6, rel=1e-5)
    assert filter_for_noise(1.0, 0.001, 0.001, 9.6) == 0.0  # quiet enough unfiltered
    assert filter_for_noise(17.0, 0.3, 0.001, 9.6) == float("inf")  # kp alone exceeds it
    assert filter_for_noise(5.0, 0.0, 0.001, 9.6) == 0.0


@pytest.fixture(scope="module")
def noisy_ident():
    # invented loop: a fast lag with a dead time, measurement noise 2 % of the oscillation
    # (amplitude about 1.6), hysteresis 2.5 noise deviations
    rec = simulate_relay([8.0], [0.02, 1.0], 0.004, 1.0, 0.08, 0.0, 0.001, 3.0,
                         noise_std=0.032, seed=4)
    return identify(rec)


def test_noise_bound_limits_every_designed_output_deviation(noisy_ident):
    sigma = noisy_ident.noise_std
    free = tune(noisy_ident, "pid", 1.4, sample_time_s=0.001)
    bound = 0.7 * free.get("ms_constrained").output_noise  # a bound that bites
    res = tune(noisy_ident, "pid", 1.4, sample_time_s=0.001, max_output_noise=bound)
    c = res.get("ms_constrained")
    # the design meets both bounds: Ms (checked on the model) and the output noise
    assert c.output_noise <= bound * 1.001 and c.ms <= 1.4 * 1.01
    assert c.kp < bound / sigma
    # a derivative filter at most Td/2 (N >= 2), or no derivative
    assert c.kd == 0 or c.tf_s <= c.kd / c.kp / 2 * 1.001
    assert res.recommended == "ms_constrained"
    for cand in res.candidates:
        if cand.kp < bound / sigma:  # a filter could help: every rule got one long enough
            assert cand.output_noise <= bound * 1.001, cand.rule
        else:
            assert any("not recommended" in n for n in cand.notes), cand.rule
    # python-control margins of the noise-bounded design on the identified model (Padé delay)
    num, den, L = noisy_ident.model_loop.tf()
    pn, pd = control.pade(L, 12)
    loop = _pid_tf(c.kp, c.ki, c.kd, c.tf_s) * control.tf(num, den) * control.tf(pn, pd)
    assert c.ms == pytest.approx(1 / control.stability_margins(loop)[2], rel=2e-3)
    # without a bound nothing changes
    assert free.get("ms_constrained").output_noise > bound
    with pytest.raises(ValueError, match="max_output_noise"):
        tune(noisy_ident, "pid", max_output_noise=0.0)

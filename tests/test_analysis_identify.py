"""Identification from relay records: exact limit cycles, ultimate points, degenerate records."""

import dataclasses
import json

import control
import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from agent.analysis import RecordError, RelayRecord, identify, simulate_relay
from agent.analysis.lti import phase_crossover


def yu_fopdt_record(K=2.0, T=1.0, L=0.4, d=0.5, n_half=200, n_periods=8):
    """Exact steady relay limit cycle of K e^{-Ls}/(Ts+1) under an ideal relay ±d.

    Yu, C.-C. (2006), Autotuning of PID Controllers: A Relay Feedback Approach, 2nd ed.:
    a = K d (1 - e^{-L/T}), half-period h = T ln(2 e^{L/T} - 1). The relay switches exactly on
    sample instants (dt = h / n_half), so the held samples of u are the continuous relay output.
    """
    h = T * np.log(2 * np.exp(L / T) - 1)
    a = K * d * (1 - np.exp(-L / T))
    dt = h / n_half
    t = np.arange(2 * n_half * n_periods + 1) * dt
    ph = np.mod(t + 1e-9 * dt, 2 * h)
    u = np.where(ph < h, d, -d)
    s = np.mod(t - L, 2 * h)
    y = np.where(s < h, K * d - (K * d + a) * np.exp(-s / T),
                 -K * d + (K * d + a) * np.exp(-(s - h) / T))
    rec = RelayRecord(t_s=t, y=y, u=u, setpoint=0.0, amplitude=d, hysteresis=0.0, bias=0.0,
                      sample_time_s=dt, sampling_delay_s=0.0)
    return rec, a, 2 * h


def test_yu_exact_fopdt_limit_cycle_recovers_k_t_l():
    # Yu (2006), exact FOPDT relay limit cycle: identification recovers K, T, L within 1 %
    K, T, L = 2.0, 1.0, 0.4
    rec, a, P = yu_fopdt_record(K, T, L)
    ident = identify(rec)
    m = ident.models["fopdt"]
    assert m.params["K"] == pytest.approx(K, rel=0.01)
    assert m.params["T"] == pytest.approx(T, rel=0.01)
    assert m.params["L"] == pytest.approx(L, rel=0.01)
    assert ident.model.kind == "fopdt"
    # cycle detection reproduces Yu's amplitude and period (peaks fall between samples: 0.5 %)
    assert ident.cycles.period_s == pytest.approx(P, rel=1e-3)
    assert ident.cycles.amplitude == pytest.approx(a, rel=5e-3)
    assert ident.cycles.stationary
    assert abs(ident.cycles.asymmetry) < 0.01


def test_ultimate_point_of_third_order_lag_from_relay():
    # textbook: 1/(s+1)^3 has Ku = 8, wu = sqrt(3) rad/s (value from memory; python-control
    # margins agree, see test_analysis_lti.py)
    dt = 0.01
    rec = simulate_relay([1], [1, 3, 3, 1], 0.0, 1.0, 0.0, 0.0, dt, 60.0)
    ident = identify(rec)
    best = ident.best_plant
    assert best.basis == "plant"
    assert best.ku == pytest.approx(8.0, rel=0.02)
    assert best.tu_s == pytest.approx(2 * np.pi / np.sqrt(3), rel=0.01)
    # the classic describing function is reported too, and is the least accurate here
    df = ident.ultimate_plant["describing_function"]
    assert abs(df.ku / 8 - 1) > abs(best.ku / 8 - 1)
    assert set(ident.ultimate) == {"describing_function", "hysteresis_corrected",
                                   "first_harmonic", "model_fit"}
    assert all(p.basis == "loop" for p in ident.ultimate.values())


def test_loop_basis_includes_sampling_delay():
    # common practice, no source: the hold adds about half a tick, so the loop as the
    # controller sees it has a lower ultimate frequency than the plant
    rec = simulate_relay([45.0], [0.025, 1, 0], 0.003, 0.1, 0.0, 0.0, 0.001, 1.0)
    ident = identify(rec)
    loop, plant = ident.ultimate["model_fit"], ident.ultimate_plant["model_fit"]
    assert loop.tu_s > plant.tu_s
    ku_l, wu_l = phase_crossover(([45.0], [0.025, 1, 0], 0.003 + 0.0005))
    ku_p, wu_p = phase_crossover(([45.0], [0.025, 1, 0], 0.003))
    assert loop.ku == pytest.approx(ku_l, rel=0.01)
    assert plant.ku == pytest.approx(ku_p, rel=0.01)
    assert plant.tu_s == pytest.approx(2 * np.pi / wu_p, rel=0.005)


def test_integrating_plant_with_load_reports_asymmetry_and_trim():
    # GUIDE field note / common practice: a load on an integrating loop makes the half-periods
    # unequal; the mean relay output over whole periods is the trim (= minus the load)
    load = -0.03
    rec = simulate_relay([8.0], [0.04, 1, 0], 0.01, 0.1, 0.0, 0.0, 0.002, 3.0, load=load)
    ident = identify(rec)
    assert ident.model.kind == "ipdt"
    assert ident.static_gain is None
    assert abs(ident.cycles.asymmetry) > 0.1
    assert ident.bias_estimate == pytest.approx(-load, abs=0.002)
    assert any("half-periods differ" in w for w in ident.warnings)


def test_to_dict_is_json_ready():
    rec = simulate_relay([1], [1, 1], 0.5, 1.0, 0.02, 0.0, 0.02, 16.0, noise_std=0.005)
    d = identify(rec).to_dict()
    text = json.dumps(d)
    assert "model_fit" in text and d["best"]["basis"] == "loop"


def _base(**kw):
    rec = simulate_relay([1], [1, 1], 0.5, 1.0, 0.0, 0.0, 0.01, 20.0)
    fields = dict(t_s=rec.t_s, y=rec.y, u=rec.u, setpoint=0.0, amplitude=1.0, hysteresis=0.0,
                  bias=0.0, sample_time_s=0.01, sampling_delay_s=0.005)
    fields.update(kw)
    return RelayRecord(**fields)


@pytest.mark.parametrize("kw, words", [
    (dict(u=np.full(2001, 1.0)), "never switched"),
    (dict(y=np.where(np.arange(2001) == 500, np.nan, 0.1 * np.sin(np.arange(2001) * 0.05))),
     "non-finite"),
    (dict(t_s=np.arange(10) * 0.01, y=np.zeros(10), u=np.ones(10)), "only 10 samples"),
    (dict(y=np.zeros(1999)), "different lengths"),
    (dict(sample_time_s=0.02), "sample_time_s"),
    (dict(amplitude=0.0), "amplitude"),
])
def test_degenerate_records_give_reasons(kw, words):
    # common practice, no source: unusable records raise RecordError with a plain reason
    with pytest.raises(RecordError) as exc:
        identify(_base(**kw))
    assert words in str(exc.value)
    assert str(exc.value).endswith(".")


def test_one_cycle_is_too_short():
    rec = simulate_relay([1], [1, 1], 0.5, 1.0, 0.0, 0.0, 0.01, 2.2)
    with pytest.raises(RecordError, match="complete oscillation cycle"):
        identify(rec)


def test_clipped_measurement_is_refused():
    rec = simulate_relay([1], [1, 1], 0.5, 1.0, 0.0, 0.0, 0.01, 20.0)
    top = 0.6 * np.max(rec.y)
    clipped = _base(y=np.minimum(rec.y, top), t_s=rec.t_s, u=rec.u)
    with pytest.raises(RecordError, match="saturated"):
        identify(clipped)


def test_flat_measurement_is_refused():
    n = 2001
    u = np.where(np.sin(np.arange(n) * 0.05) > 0, 1.0, -1.0)
    with pytest.raises(RecordError, match="did not move"):
        identify(_base(y=np.zeros(n), u=u))


@settings(max_examples=3, deadline=None)
@given(T=st.floats(0.2, 5.0), L=st.floats(0.1, 1.0), K=st.floats(0.5, 3.0))
def test_fopdt_family_recovered(T, L, K):
    # in-class plants: the model-fit ultimate point matches the exact crossover of the true
    # plant (python-control-free check of the same quantity: lti.phase_crossover is checked
    # against python-control in test_analysis_lti.py)
    ku0, wu0 = phase_crossover(([K], [T, 1], L))
    dt = (2 * np.pi / wu0) / 150
    rec = simulate_relay([K], [T, 1], L, 0.2, 0.0, 0.0, dt, 10 * 2 * np.pi / wu0)
    ident = identify(rec)
    p = ident.ultimate_plant["model_fit"]
    assert p.ku == pytest.approx(ku0, rel=0.01)
    assert p.tu_s == pytest.approx(2 * np.pi / wu0, rel=0.01)


def _relay(num, den, delay=0.0, periods=10, per_period=200, noise=0.0, seed=0):
    ku0, wu0 = phase_crossover((num, den, delay))
    tu0 = 2 * np.pi / wu0
    dt = tu0 / per_period
    sd = noise * 4 / (np.pi * ku0)
    rec = simulate_relay(num, den, delay, 1.0, 3 * sd, 0.0, dt, periods * tu0, noise_std=sd,
                         seed=seed)
    return rec, ku0, tu0


def test_third_order_lag_is_recovered_by_the_third_order_family():
    # 1/(s+1)^3 = third-order lag with T = 1, zeta = 1, T3 = 1, no dead time; Ku = 8 and
    # wu = sqrt(3) (textbook, value from memory)
    rec, _, _ = _relay([1.0], [1, 3, 3, 1])
    ident = identify(rec)
    assert ident.model.kind == "topdt"
    p = ident.model.params
    assert p["K"] == pytest.approx(1.0, rel=0.01)
    assert p["L"] == pytest.approx(0.0, abs=0.02)
    assert ident.best_plant.ku == pytest.approx(8.0, rel=0.005)
    assert ident.best_plant.tu_s == pytest.approx(2 * np.pi / np.sqrt(3), rel=0.005)


def test_non_minimum_phase_zero_is_recovered():
    # (1 - 0.5 s)/(s+1)^3: the zero family finds Tz = -0.5; ultimate point against
    # python-control's gain margin of the same transfer function
    num, den = [-0.5, 1.0], [1, 3, 3, 1]
    gm, _, wpc, _ = control.margin(control.tf(num, den))
    rec, _, _ = _relay(num, den, noise=0.01, seed=2)
    ident = identify(rec)
    assert ident.model.kind == "ztopdt"
    assert ident.model.params["Tz"] == pytest.approx(-0.5, abs=0.05)
    assert ident.best_plant.ku == pytest.approx(gm, rel=0.01)
    assert ident.best_plant.tu_s == pytest.approx(2 * np.pi / wpc, rel=0.005)


def _window(rec, start_s):
    """The part of a record from ``start_s`` on, stated to start mid-oscillation (as the
    workflow's windows are)."""
    i = int(round(start_s / rec.sample_time_s))
    return dataclasses.replace(rec, t_s=rec.t_s[i:] - rec.t_s[i], y=rec.y[i:], u=rec.u[i:],
                               at_rest=False)


def _free_window_third_order(dt, periods):
    # 1/(s+1)^3 behind a one-tick output delay, sampled at dt, four periods after the start
    tu0 = 2 * np.pi / np.sqrt(3)
    rec = simulate_relay([1.0], [1, 3, 3, 1], dt, 0.5, 0.0, 0.0, dt, (periods + 4) * tu0,
                         sampling_delay_s=1.5 * dt)
    return _window(rec, 4 * tu0), tu0


def test_free_initial_state_is_exact_when_time_constants_span_many_ticks():
    # A window starting mid-oscillation is fitted with a free initial state. With the lags
    # 1000 ticks long, the true model (third order, T = 1, zeta = 1, T3 = 1, one-tick dead
    # time) must reproduce the noise-free window to rounding; a free-state basis of one-sample
    # shifts lost modes in the rank cut and left a misfit of several per cent.
    from agent.analysis.models import Model, fit_model
    rec, tu0 = _free_window_third_order(0.001, 3)
    a = float(np.max(rec.y) - np.min(rec.y)) / 2
    seed = Model("sopdt", {"K": 1.0, "T": 1.0, "zeta": 1.0, "L": 0.001}, 0.0, 0.0)
    m = fit_model("topdt", 0.001, rec.u, rec.y, tu0, a, variant="free", seed=seed)
    # (a window of a symmetric relay pins the response near the harmonics of the oscillation,
    # not the time constants themselves: only the residual is checked)
    assert m.rel_rmse < 1e-4


def test_stable_plant_in_a_free_window_is_not_called_integrating():
    # 1/(s+1)^3 (textbook Ku = 8, wu = sqrt(3) rad/s, value from memory) at 500 ticks per
    # second, a four-period window of the running relay and no prior on integration: an
    # integrating family was chosen (the stable ones could not reproduce their own free
    # response, see the test above).
    rec, tu0 = _free_window_third_order(0.002, 4)
    ident = identify(rec)
    assert not ident.model.integrating, ident.model.kind
    assert ident.best_plant.ku == pytest.approx(8.0, rel=0.015)
    assert ident.best_plant.tu_s == pytest.approx(tu0, rel=0.005)


def test_stable_family_never_fits_worse_than_its_integrating_limit():
    # K/s is the limit of K T/(T s + 1) for T -> infinity, so each stable family reproduces
    # whatever the integrating family it contains does. On a window of (1 - 0.5 s)/(s+1)^3
    # the third-order-with-zero search ended in a poorer minimum than the integrating family
    # with a zero, which was then chosen for this stable plant.
    from agent.analysis.models import STABLE_LIMIT
    rec, _, tu0 = _relay([-0.5, 1.0], [1, 3, 3, 1], noise=0.01, seed=2)
    ident = identify(_window(rec, 3 * tu0))
    for integ, stable in STABLE_LIMIT.items():
        if integ in ident.models and stable in ident.models:
            assert ident.models[stable].rmse <= ident.models[integ].rmse * (1 + 1e-6), stable
    assert ident.model.kind == "ztopdt"
    assert ident.model.params["Tz"] == pytest.approx(-0.5, abs=0.05)


def test_stable_family_must_beat_its_integrating_limit_to_be_chosen():
    # common practice, no source: a lag far slower than the record cannot be told from an
    # integrator, and its fitted static gain is then arbitrary; the integrating family (one
    # parameter fewer) is kept unless the stable one fits clearly better
    from agent.analysis.models import Model, select_model

    def m(kind, rmse, **p):
        return Model(kind, {"K": 1.0, "T": 1.0, "L": 0.1, **p}, rmse, 0.0)

    amp, noise = 1.0, 0.01
    near = {"ipdt": m("ipdt", 0.0150), "sopdt": m("sopdt", 0.0146, zeta=8.0)}
    assert select_model(near, 2000, amp, noise_std=noise).kind == "ipdt"
    clear = {"ipdt": m("ipdt", 0.0150), "sopdt": m("sopdt", 0.0105, zeta=1.0)}
    assert select_model(clear, 2000, amp, noise_std=noise).kind == "sopdt"


def test_integrator_plus_two_lags_is_recovered():
    # 1/(s (s+1)^2): integrator plus second order with T = 1, zeta = 1; textbook ultimate
    # point Ku = 2, wu = 1 rad/s (phase -90 - 2 atan(w) = -180 at w = 1)
    rec, _, _ = _relay([1.0], np.polymul([1, 0], [1, 2, 1]), noise=0.01, seed=4)
    ident = identify(rec)
    assert ident.model.kind == "isopdt" and ident.model.integrating
    p = ident.model.params
    assert p["K"] == pytest.approx(1.0, rel=0.02)
    assert p["T"] == pytest.approx(1.0, rel=0.03)
    assert p["zeta"] == pytest.approx(1.0, rel=0.03)
    assert ident.static_gain is None
    assert ident.best_plant.ku == pytest.approx(2.0, rel=0.01)
    assert ident.best_plant.tu_s == pytest.approx(2 * np.pi, rel=0.005)


def test_richer_family_must_beat_the_noise_to_be_chosen():
    # common practice, no source: two fits that both reach the measurement noise are equal,
    # so the simpler family is kept; a clearly smaller misfit selects the richer one
    from agent.analysis.models import Model, select_model

    def m(kind, rmse, **p):
        return Model(kind, {"K": 1.0, "T": 1.0, "L": 0.1, **p}, rmse, 0.1)

    amp, noise = 1.0, 0.01
    same = {"fopdt": m("fopdt", 0.01005), "sopdt": m("sopdt", 0.01000, zeta=1.0)}
    assert select_model(same, 2000, amp, noise_std=noise).kind == "fopdt"
    better = {"fopdt": m("fopdt", 0.0150), "sopdt": m("sopdt", 0.0101, zeta=1.0)}
    assert select_model(better, 2000, amp, noise_std=noise).kind == "sopdt"
    neg = {"fopdt": m("fopdt", 0.02), "sopdt": Model("sopdt", {"K": -1.0, "T": 1.0, "L": 0.1,
                                                               "zeta": 1.0}, 0.001, 0.1)}
    assert select_model(neg, 2000, amp, noise_std=noise).kind == "fopdt"


def test_integrating_prior_restricts_the_model_choice():
    # An integrator with lag, e^(-0.02 s) / (s (0.05 s + 1)): told that the loop integrates, the
    # chosen model must be an integrating one and its ultimate point match python-control's
    # margins of the true plant (python-control, margin(); Padé approximation of the delay).
    import control
    from agent.analysis import identify, simulate_relay
    num, den, L = [1.0], [0.05, 1.0, 0.0], 0.02
    rec = simulate_relay(num, den, L, 0.5, 0.0, 0.0, 0.001, 4.0)
    from dataclasses import replace
    ident = identify(replace(rec, integrating=True))
    assert ident.model.integrating
    g = control.tf(num, den) * control.tf(*control.pade(L + rec.sampling_delay_s, 10))
    gm, _, wcg, _ = control.margin(g)
    assert ident.best.ku == pytest.approx(gm, rel=0.02)
    assert ident.best.tu_s == pytest.approx(2 * np.pi / wcg, rel=0.01)


def test_slow_drift_over_a_long_record_does_not_bias_the_ultimate_point():
    # 1/(s+1)^3: Ku = 8, Tu = 2 pi / sqrt(3) (value from memory; python-control margins agree in
    # test_analysis_lti.py). 40 periods with a slow output drift of 30 % of the oscillation
    # (a gust-like disturbance, periods 23 and 37 Tu) and 2 % noise: the free fit absorbs the
    # drift with its half-cosine columns (detrending, common practice, no source); without them
    # the same record gives Ku 15 % low (measured while writing this test).
    rec, ku0, tu0 = _relay([1], [1, 3, 3, 1], periods=40, per_period=100, noise=0.02, seed=3)
    a = 4 / (np.pi * ku0)
    t = rec.t_s - rec.t_s[0]
    drift = 0.3 * a * (np.sin(2 * np.pi * t / (23 * tu0)) + 0.5 * np.sin(2 * np.pi * t / (37 * tu0)))
    rec = dataclasses.replace(rec, y=rec.y + drift, at_rest=False)
    ident = identify(rec)
    assert ident.best.method == "model_fit"
    best = ident.best_plant
    assert best.ku == pytest.approx(ku0, rel=0.02)
    assert best.tu_s == pytest.approx(tu0, rel=0.01)


@pytest.mark.parametrize("at_rest, flag", [(False, 0.0), (True, 1.0)])
def test_stated_start_decides_the_fit_variant(at_rest, flag):
    rec, ku0, _ = _relay([1], [1, 3, 3, 1], periods=8)
    ident = identify(dataclasses.replace(rec, at_rest=at_rest))
    assert ident.model.extras["rest"] == flag
    assert ident.best_plant.ku == pytest.approx(ku0, rel=0.02)


@pytest.mark.parametrize("seed", range(4))
def test_noisy_steady_relay_is_called_steady(seed):
    # A steady limit cycle of 1/(s+1)^3 measured with noise at sigma/a = 0.11: single cycles
    # scatter beyond the fixed 5 %/10 % tolerances, which used to call such a record unsettled
    # ("did not settle", two cycles averaged). The tolerances now widen to what the noise
    # explains (own measurement of the per-cycle scatter, agent/analysis/cycles.py).
    rec = simulate_relay([1], [1, 3, 3, 1], 0.0, 1.0, 0.12, 0.0, 0.01, 200.0, noise_std=0.04,
                         seed=seed)
    ident = identify(rec)
    cyc = ident.cycles
    assert 0.08 < ident.noise_std / cyc.amplitude < 0.15
    assert cyc.stationary
    assert cyc.n_stationary >= cyc.n_cycles // 3, (cyc.n_stationary, cyc.n_cycles)
    assert not any("settle" in w or "steady cycles" in w for w in ident.warnings), ident.warnings


def test_noisy_record_with_a_relay_step_is_steady_only_after_it():
    # The ramp raises the relay 2.5-fold: even with the noise-widened tolerances the cycles
    # before the step must not count as steady (their amplitude is 60 % lower).
    a = simulate_relay([1], [1, 3, 3, 1], 0.0, 0.4, 0.05, 0.0, 0.01, 80.0, noise_std=0.016,
                       seed=7)
    b = simulate_relay([1], [1, 3, 3, 1], 0.0, 1.0, 0.12, 0.0, 0.01, 120.0, noise_std=0.04,
                       seed=8)
    t = np.concatenate([a.t_s, b.t_s[1:] + a.t_s[-1]])
    y = np.concatenate([a.y, b.y[1:]])
    u = np.concatenate([a.u, b.u[1:]])
    rec = dataclasses.replace(b, t_s=t, y=y, u=u, at_rest=False)
    ident = identify(rec)
    cyc = ident.cycles
    join = len(a.t_s)
    assert cyc.window[0] >= join, (cyc.window, join)
    alone = identify(b).cycles
    assert cyc.amplitude == pytest.approx(alone.amplitude, rel=0.05)

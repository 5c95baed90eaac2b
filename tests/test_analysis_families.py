"""The model-family table: every family's parameters, transfer function and relations."""

import numpy as np
import pytest

from agent.analysis import simulate_relay
from agent.analysis.families import FAMILIES, family
from agent.analysis.models import Model, fit_models


def _poly_eq(a, b):
    return np.allclose(np.trim_zeros(np.asarray(a, float), "f"),
                       np.trim_zeros(np.asarray(b, float), "f"))


# the transfer functions as written in the module docstring, built by hand (K, T, zeta, T3,
# Tz, L = 2, 0.5, 0.7, 0.3, -0.2, 0.1)
K, T, Z, T3, TZ, L = 2.0, 0.5, 0.7, 0.3, -0.2, 0.1
T2 = [T * T, 2 * Z * T, 1.0]
BY_HAND = {
    "fopdt": ([K], [T, 1.0]),
    "sopdt": ([K], T2),
    "ipdt": ([K], [T, 1.0, 0.0]),
    "topdt": ([K], np.polymul(T2, [T3, 1.0])),
    "isopdt": ([K], np.polymul(T2, [1.0, 0.0])),
    "ztopdt": ([K * TZ, K], np.polymul(T2, [T3, 1.0])),
    "izsopdt": ([K * TZ, K], np.polymul(T2, [1.0, 0.0])),
}


@pytest.mark.parametrize("code", list(FAMILIES))
def test_each_family_builds_its_own_transfer_function_from_its_own_parameters(code):
    f = FAMILIES[code]
    values = {"K": K, "T": T, "zeta": Z, "T3": T3, "Tz": TZ, "L": L}
    params = {n: values[n] for n in f.param_names}
    num, den, delay = Model(code, params, 0.0, 0.0).tf()
    assert _poly_eq(num, BY_HAND[code][0]) and _poly_eq(den, BY_HAND[code][1])
    assert delay == L
    # only the parameters the family has: a zero only with Tz, a damping only with T2(s)
    assert ("Tz" in f.param_names) == f.zero
    assert ("zeta" in f.param_names) == f.second_order
    assert ("T3" in f.param_names) == f.third_pole
    assert f.integrating == (den[-1] == 0)
    assert f.label and f.explanation and all(p.unit and p.label for p in f.params)
    assert "integrator" in f.label if f.integrating else "integrator" not in f.label


def test_relations_name_known_families_and_integrating_limits_are_stable():
    for f in FAMILIES.values():
        assert set(f.nested_in + f.seeded_from) <= set(FAMILIES)
        if f.stable_limit:
            s = FAMILIES[f.stable_limit]
            assert f.integrating and not s.integrating and f.code in s.nested_in
            assert s.n_params == f.n_params + 1  # one more lag


def test_unknown_family_is_refused_with_the_known_codes():
    with pytest.raises(ValueError, match="unknown model family 'xyz'.*ipdt"):
        family("xyz")


def test_fitted_models_report_exactly_their_familys_parameters():
    rec = simulate_relay([1.0], [1, 3, 3, 1], 0.0, 1.0, 0.0, 0.0, 0.02, 40.0)
    models = fit_models(rec.sample_time_s, rec.u, rec.y, 2 * np.pi / np.sqrt(3), 0.13)
    assert models
    for code, m in models.items():
        assert tuple(m.params) == FAMILIES[code].param_names, code

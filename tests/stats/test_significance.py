"""Empirical significance: the amplitude among amplitudes fitted to curves without signal."""

import numpy as np
import pytest

from pairvel.stats.fit import fit_amplitude
from pairvel.stats.significance import describe, empirical_significance, fitted_amplitudes, headline


def test_fitted_amplitudes_equal_the_fit():
    """Internal consistency: the vectorised amplitudes are fit_amplitude's best fits (Hartlap factor cancels)."""
    rng = np.random.default_rng(0)
    t = np.linspace(1.0, 0.2, 8)
    cov = np.diag(np.linspace(1.0, 2.0, 8)) + 0.1
    curves = rng.normal(size=(5, 8))
    use = np.arange(8) > 0
    amps = fitted_amplitudes(curves, t, cov, use=use)
    for a, d in zip(amps, curves):
        assert a == pytest.approx(fit_amplitude(d, t, cov, n_samples=50, use=use).amplitude, rel=1e-10)


def test_counts_p_values_and_pooling():
    """Analytic: 2 of 4 null amplitudes reach |0.5|; p = (2 + 1) / (4 + 1); with none reaching, p is the
    bound 1 / (n + 1); the pooled entry holds every null set but not the simulated skies."""
    out = empirical_significance(0.5, {"shuffled": [0.1, -0.6, 0.5, 0.2], "random_positions": [0.0, 0.1],
                                       "simulated skies": [0.9, 0.1, 0.2]})
    by = {e["source"]: e for e in out}
    assert by["shuffled"]["exceeded_by"] == 2 and by["shuffled"]["p_value"] == pytest.approx(3 / 5)
    assert by["random_positions"]["exceeded_by"] == 0 and by["random_positions"]["p_is_bound"]
    assert by["random_positions"]["p_value"] == pytest.approx(1 / 3)
    assert by["all nulls"]["n"] == 6 and by["all nulls"]["exceeded_by"] == 2
    assert by["shuffled"]["snr"] == pytest.approx(0.5 / np.std([0.1, -0.6, 0.5, 0.2], ddof=1))
    assert headline(out)["source"] == "all nulls"
    assert describe(by["random_positions"]).startswith("exceeded by 0 of 2 amplitudes fitted to random_positions "
                                                      "(p <= 1/3 = 0.33)")
    assert empirical_significance(1.0, {"shuffled": []}) == [] and headline([]) is None


def test_empirical_p_value_is_uniform_without_signal():
    """Statistics: when the measured curve is one more draw like the null curves, the p-value
    (c + 1) / (n + 1) is uniform on {1/(n+1), ..., 1} (exchangeability; common practice):
    P(p <= 0.05) = 0.05 within the binomial error over 2000 trials."""
    rng = np.random.default_rng(1)
    t = np.ones(4)
    p_values = []
    for _ in range(2000):
        amps = fitted_amplitudes(rng.normal(size=(20, 4)), t, np.eye(4))
        p_values.append(empirical_significance(amps[0], {"shuffled": amps[1:]})[0]["p_value"])
    assert abs(np.mean(np.array(p_values) <= 0.05) - 1 / 20) < 4 * np.sqrt(0.05 * 0.95 / 2000)

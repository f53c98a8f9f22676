"""Joint fit of tau_mean and f sigma_8 with a Gaussian prior on tau_mean."""

import numpy as np
import pytest

from pairvel.core.errors import InputError
from pairvel.stats.fit import fit_amplitude
from pairvel.stats.joint import fit_velocity_scale, hpd_levels, plot_velocity_scale

T = -np.linspace(2.0, 0.4, 8)
COV = np.diag(np.linspace(0.3, 0.6, 8) ** 2)
S_FID = 0.45


def test_narrow_prior_turns_the_amplitude_into_f_sigma8():
    """Analytic propagation: with A = tau s / s_fid measured to sigma_A and a prior on tau much narrower
    than sigma_A / A, s = A s_fid / tau with error sigma_A s_fid / tau."""
    tau_true, s_true = 1.2, 0.6
    a_true = tau_true * s_true / S_FID
    fit = fit_amplitude(a_true * T, T, COV)  # noiseless data
    v = fit_velocity_scale(fit, S_FID, tau_prior=(tau_true, 1e-4), n_tau=201, n_s=1201)
    np.testing.assert_allclose(v.s_mean, s_true, rtol=2e-3)
    np.testing.assert_allclose(v.s_std, fit.error * S_FID / tau_true, rtol=0.02)
    np.testing.assert_allclose(v.tau_mean_post, tau_true, rtol=1e-4)
    assert v.s_lower_68 < s_true < v.s_upper_68


def test_wider_prior_wider_constraint_and_no_prior_no_constraint(tmp_path):
    """The degeneracy: only the prior on tau_mean sets the f sigma_8 error; without one it is not reported."""
    fit = fit_amplitude(1.5 * T, T, COV)
    narrow = fit_velocity_scale(fit, S_FID, tau_prior=(1.0, 0.05))
    wide = fit_velocity_scale(fit, S_FID, tau_prior=(1.0, 0.3))
    assert wide.s_std > 1.5 * narrow.s_std
    free = fit_velocity_scale(fit, S_FID)
    assert np.isnan(free.s_mean) and free.prior is None and free.as_dict()["tau_prior"] is None
    # the posterior ridge follows tau s / s_fid = A_hat: at each s the most probable tau is A_hat s_fid / s
    j = np.searchsorted(free.s_grid, 0.6)
    i = np.argmax(free.posterior[:, j])
    np.testing.assert_allclose(free.tau_grid[i], fit.amplitude * S_FID / free.s_grid[j],
                               atol=2 * np.diff(free.tau_grid)[0])
    assert plot_velocity_scale(narrow, tmp_path, "c") == ["c.pdf", "c.png"]
    plot_velocity_scale(free, tmp_path, "f")
    assert (tmp_path / "c.png").stat().st_size > 1000 and (tmp_path / "f.pdf").stat().st_size > 1000


def test_sellentin_heavens_joint_fit_matches_its_amplitude_interval():
    """Analytic identity: with a delta-like prior at tau = 1 the posterior of s / s_fid is the amplitude
    posterior, so its 68% interval equals the Sellentin-Heavens (Student t) interval of A."""
    rng = np.random.default_rng(3)
    d = 1.0 * T + rng.normal(size=8) * np.sqrt(np.diag(COV))
    fit = fit_amplitude(d, T, COV, n_samples=30, likelihood="sellentin-heavens")
    v = fit_velocity_scale(fit, S_FID, n_samples=30, tau_prior=(1.0, 1e-5), n_s=3001)
    np.testing.assert_allclose([v.s_lower_68 / S_FID, v.s_upper_68 / S_FID], [fit.lower_68, fit.upper_68],
                               atol=3e-3)


def test_hpd_levels_of_a_gaussian():
    """Analytic: a 2-D Gaussian's 68.27% region ends at density exp(-q/2) of the peak, q = -2 ln(1 - 0.6827)."""
    x = np.linspace(-8, 8, 801)
    g = np.exp(-0.5 * (x[:, None] ** 2 + x[None, :] ** 2))
    np.testing.assert_allclose(hpd_levels(g)[0] / g.max(), np.exp(-2.2957 / 2), rtol=2e-3)


def test_joint_fit_errors():
    fit = fit_amplitude(T, T, COV)
    with pytest.raises(InputError, match="prior on tau_mean needs a finite mean and sigma > 0"):
        fit_velocity_scale(fit, S_FID, tau_prior=(1.0, 0.0))
    with pytest.raises(InputError, match="f sigma_8 must be finite and > 0"):
        fit_velocity_scale(fit, 0.0)


def test_truncated_posterior_warns():
    """A prior on tau far below what the amplitude needs pushes f sigma_8 against the top of its range."""
    from pairvel.core.errors import PairvelWarning

    fit = fit_amplitude(5.0 * T, T, COV)
    with pytest.warns(PairvelWarning, match="top of its flat prior"):
        fit_velocity_scale(fit, S_FID, tau_prior=(1.0, 0.05))

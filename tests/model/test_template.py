"""The fitted template: bin averaging with pair counts, the pairs' redshift distribution, photo-z damping."""

import numpy as np
import pytest

from pairvel.core.errors import TheoryError
from pairvel.model import template as tp
from pairvel.model import theory as th
from pairvel.model.cosmology import DEFAULT_COSMOLOGY

C = DEFAULT_COSMOLOGY
EDGES = np.arange(0.0, 201.0, 20.0)


def test_reduces_to_volume_weighted_single_redshift():
    """Internal regression: one redshift and no pair counts is the r^2-weighted bin average of before;
    pair counts proportional to the shell volumes give the same (analytic: g(r) is then constant)."""
    ref = th.binned_pairwise_velocity(EDGES, 0.3, 1.2)
    np.testing.assert_allclose(tp.bin_averaged_velocity(EDGES, [0.3], [1.0], 1.2), ref, rtol=1e-12)
    shells = (EDGES[1:] ** 3 - EDGES[:-1] ** 3) * 7.0
    np.testing.assert_allclose(tp.bin_averaged_velocity(EDGES, [0.3], [1.0], 1.2, pair_counts=shells), ref,
                               rtol=1e-12)


def test_pair_counts_shift_the_weight_inside_bins():
    """Analytic direction: counts falling faster than r^2 across the bins (a survey window) weight each
    bin towards its low-r side, where |v12| is larger beyond the v12 minimum (about 20-30 Mpc)."""
    shells = (EDGES[1:] ** 3 - EDGES[:-1] ** 3) * np.exp(-0.5 * EDGES[1:] / 50)
    vol = tp.bin_averaged_velocity(EDGES, [0.3], [1.0])
    cnt = tp.bin_averaged_velocity(EDGES, [0.3], [1.0], pair_counts=shells)
    assert np.all(np.abs(cnt[3:]) > np.abs(vol[3:]))
    assert np.max(np.abs(cnt / vol - 1)) < 0.1


def test_pair_redshift_distribution_of_uniform_density():
    """Analytic: for tracers of constant comoving density, dN/dz is proportional to dV/dz, so the pair
    distribution (dN/dz)^2 / (dV/dz) is proportional to dV/dz itself."""
    rng = np.random.default_rng(5)
    zg = np.linspace(0.2, 0.6, 2001)
    dvdz = C.comoving_distance_mpc(zg) ** 2 / C.hubble_km_s_mpc(zg)
    cdf = np.cumsum(dvdz) / dvdz.sum()
    z = np.interp(rng.uniform(size=400000), cdf, zg)
    zn, w = tp.pair_redshift_distribution(z, n_nodes=8)
    expect = C.comoving_distance_mpc(zn) ** 2 / C.hubble_km_s_mpc(zn)
    np.testing.assert_allclose(w, expect / expect.sum(), rtol=0.02)  # Monte-Carlo noise of 5e4 per node
    # the redshift-averaged template is the weighted mean of single-redshift templates (linear in weights)
    both = tp.bin_averaged_velocity(EDGES, [0.2, 0.6], [0.25, 0.75])
    np.testing.assert_allclose(both, 0.25 * tp.bin_averaged_velocity(EDGES, [0.2], [1.0])
                               + 0.75 * tp.bin_averaged_velocity(EDGES, [0.6], [1.0]), rtol=1e-12)


def test_photoz_damping_limits():
    """Analytic limits: sigma_z -> 0 recovers the undamped template; pairs far closer than the
    line-of-sight error lose most of their signal; pairs far wider keep it."""
    r = np.array([10.0, 30.0, 80.0, 150.0])
    v = th.pairwise_velocity(r, 0.4)
    for model in tp.PHOTOZ_MODELS:
        np.testing.assert_allclose(tp.photoz_damped_velocity(r, 0.4, 0.0, model=model), v, rtol=0)
        np.testing.assert_allclose(tp.photoz_damped_velocity(r, 0.4, 1e-5, model=model), v, rtol=2e-3)
    sig = np.sqrt(2) * tp.los_error_mpc(0.4, 0.02)  # pair error, ~141 Mpc here
    # analytic: c sigma_z (1 + z) / H(z) with H(0.4) from astropy for the default cosmology
    np.testing.assert_allclose(sig / np.sqrt(2), 299792.458 * 0.028 / C.astropy.H(0.4).value, rtol=1e-12)
    for model in tp.PHOTOZ_MODELS:
        d = tp.photoz_damped_velocity(np.array([sig / 6, 3 * sig]), 0.4, 0.02, model=model)
        ratio = d / th.pairwise_velocity(np.array([sig / 6, 3 * sig]), 0.4)
        assert ratio[0] < 0.3 and ratio[1] > 0.75, (model, ratio)
    with pytest.raises(TheoryError, match="damping model must be one of"):
        tp.photoz_damped_velocity(r, 0.4, 0.01, model="gauss")
    with pytest.raises(TheoryError, match="sigma_z0 must be finite and >= 0"):
        tp.photoz_damped_velocity(r, 0.4, -0.01)


def test_photoz_convolution_against_monte_carlo_pairs():
    """Independent method for the same model: draw pairs uniformly in separation space, displace each
    pair's line-of-sight separation by N(0, sigma_p^2), and apply the estimator sum(v_los c)/sum(c^2)
    with c from the observed separation; it matches the quadrature within Monte-Carlo noise."""
    rng = np.random.default_rng(12)
    z, sz = 0.4, 0.01
    sigma_p = np.sqrt(2) * tp.los_error_mpc(z, sz)
    rg = np.geomspace(0.5, 2000, 800)
    vg = th.pairwise_velocity(rg, z)
    n = 4_000_000
    # true separations uniform in a cylinder that holds every pair which can be observed below 120 Mpc
    rho_max, z_max = 120.0, 120.0 + 6 * sigma_p
    rho = rho_max * np.sqrt(rng.uniform(size=n))
    phi = rng.uniform(0, 2 * np.pi, n)
    sep = np.column_stack([rho * np.cos(phi), rho * np.sin(phi), rng.uniform(-z_max, z_max, n)])
    rt = np.linalg.norm(sep, axis=1)
    vlos = np.interp(rt, rg, vg, left=0.0) * sep[:, 2] / rt
    obs = sep.copy()
    obs[:, 2] += rng.normal(0, sigma_p, n)
    ro = np.linalg.norm(obs, axis=1)
    c = obs[:, 2] / ro
    edges = np.array([20.0, 40.0, 60.0, 90.0, 120.0])
    idx = np.digitize(ro, edges) - 1
    ok = (idx >= 0) & (idx < edges.size - 1)
    mc = np.bincount(idx[ok], vlos[ok] * c[ok], edges.size - 1) / np.bincount(idx[ok], c[ok] ** 2, edges.size - 1)
    quad = tp.bin_averaged_velocity(edges, [z], [1.0], sigma_z0=sz)
    np.testing.assert_allclose(mc, quad, rtol=0.05)
    # and the damping is large at these separations, so the check is not of an untouched v12
    assert np.all(np.abs(quad) < 0.8 * np.abs(th.binned_pairwise_velocity(edges, z)))


def test_growth_option_in_the_template():
    """Analytic: v12 is proportional to f, so the Linder (2005) option scales it by f_linder / f_exact."""
    r = np.array([20.0, 60.0])
    ratio = th.pairwise_velocity(r, 0.5, growth="linder") / th.pairwise_velocity(r, 0.5)
    np.testing.assert_allclose(ratio, th.growth_rate(0.5, method="linder") / th.growth_rate(0.5), rtol=1e-12)


def test_bin_without_pairs_borrows_its_neighbours_weighting():
    """A bin with zero pairs (outside a subsample's reach) leaves the other bins' pair-count weighting
    intact: with counts proportional to the shell volumes elsewhere, the result is the volume average."""
    shells = (EDGES[1:] ** 3 - EDGES[:-1] ** 3) * 3.0
    shells[-1] = 0
    np.testing.assert_allclose(tp.bin_averaged_velocity(EDGES, [0.3], [1.0], pair_counts=shells),
                               th.binned_pairwise_velocity(EDGES, 0.3), rtol=1e-12)


def test_pair_redshift_model_against_the_pair_engine():
    """The (dN/dz)^2/(dV/dz) model against the c_ij^2-weighted mean pair redshift that the pair engine
    measures, for 30000 random tracers in a 25 x 24 deg cone with a selection falling with z: the model
    mean is within 0.003 of the measured one in the 0-20 Mpc bin (measured 0.2174, model 0.2160),
    the tracers' own mean redshift (0.27) is not."""
    from pairvel.pairs.estimator import pairwise_momentum
    from pairvel.pairs.geometry import comoving_positions

    rng = np.random.default_rng(2)
    zg = np.linspace(0.1, 0.6, 3001)
    pdf = C.comoving_distance_mpc(zg) ** 2 / C.hubble_km_s_mpc(zg) * np.exp(-(((zg - 0.1) / 0.2) ** 2))
    n = 30000
    z = np.interp(rng.uniform(size=n), np.cumsum(pdf) / pdf.sum(), zg)
    ra = rng.uniform(0, 25, n)
    dec = np.degrees(np.arcsin(rng.uniform(np.sin(np.radians(-12)), np.sin(np.radians(12)), n)))
    pr = pairwise_momentum(comoving_positions(ra, dec, z), np.zeros(n), np.array([0.0, 20.0]), redshifts=z)
    zn, w = tp.pair_redshift_distribution(z)
    model = np.sum(zn * w)
    assert abs(model - pr.z_eff[0]) < 0.003, (model, pr.z_eff)
    assert abs(z.mean() - pr.z_eff[0]) > 0.03


def test_exponential_form_uses_the_pair_error():
    """SCIENCE.md asks which width enters 1 - exp(-r^2/2 sigma_r^2) for a pair: against the convolution
    (derived, and checked by Monte Carlo above), sigma_r = sqrt(2) sigma_x (the error of the pair
    difference, as implemented) is closer on 20-200 Mpc than the single-tracer sigma_x."""
    edges = np.arange(20.0, 201.0, 20.0)
    conv = tp.bin_averaged_velocity(edges, [0.4], [1.0], sigma_z0=0.01)
    pair = tp.bin_averaged_velocity(edges, [0.4], [1.0], sigma_z0=0.01, photoz_model="exponential")
    single = tp.bin_averaged_velocity(edges, [0.4], [1.0], sigma_z0=0.01 / np.sqrt(2), photoz_model="exponential")
    undamped = th.binned_pairwise_velocity(edges, 0.4)

    def rms(a):
        return np.sqrt(np.mean(((a - conv) / undamped) ** 2))

    assert rms(pair) < 0.5 * rms(single), (rms(pair), rms(single))  # measured 0.055 and 0.184


def test_template_for_run_refuses_a_config_without_bias():
    """A TheoryConfig built in code without the bias (load_config already refuses such a file)."""
    from pairvel.input.config import TheoryConfig

    edges = np.array([0.0, 20.0, 40.0])
    with pytest.raises(TheoryError, match=r"theory\.bias is required: tau_mean scales as 1/b"):
        tp.template_for_run(TheoryConfig(), DEFAULT_COSMOLOGY, edges, pair_counts=np.ones(2),
                            z_tracers=np.array([0.2, 0.3]), z_eff=0.25)


def test_pair_redshift_distribution_with_weights_counts_a_tracer_w_times():
    """Analytic: integer weights give the distribution of the catalogue with each tracer repeated w times."""
    rng = np.random.default_rng(8)
    z = rng.uniform(0.1, 0.5, 3000)
    w = rng.integers(0, 4, z.size)
    w[np.argmin(z)] = w[np.argmax(z)] = 1  # the same redshift range, so the same nodes
    zn, share = tp.pair_redshift_distribution(z, n_nodes=10, weights=w.astype(float))
    zr, rep = tp.pair_redshift_distribution(np.repeat(z, w), n_nodes=10)
    np.testing.assert_allclose(zn, zr, rtol=1e-12)
    np.testing.assert_allclose(share, rep, rtol=1e-12)
    _, plain = tp.pair_redshift_distribution(z, n_nodes=10)
    assert not np.allclose(share, plain, rtol=1e-3)

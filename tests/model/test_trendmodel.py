"""The linear-theory prediction of the signal the redshift-trend removal takes away (pairvel.model.trendmodel)."""

import math

import numpy as np
import pytest

from pairvel.core.errors import InputError
from pairvel.model.cosmology import DEFAULT_COSMOLOGY
from pairvel.model.trendmodel import _kernel_sums, _shell_streaming, trend_transfer
from pairvel.pairs.geometry import comoving_positions


def _cone(n, seed, half_deg=10.0, z_range=(0.1, 0.4)):
    rng = np.random.default_rng(seed)
    ra = rng.uniform(-half_deg, half_deg, n) % 360.0
    dec = np.degrees(np.arcsin(rng.uniform(math.sin(math.radians(-half_deg)), math.sin(math.radians(half_deg)), n)))
    z = rng.uniform(*z_range, n)
    return comoving_positions(ra, dec, z, cosmo=DEFAULT_COSMOLOGY), z


def test_shell_streaming_kernel_matches_a_numpy_sum():
    """The compiled shell means equal a plain numpy evaluation of the same weighted sums."""
    rng = np.random.default_rng(1)
    pos, z = _cone(300, 2)
    order = np.argsort(z)
    pos_k, z_k = pos[order].copy(), z[order].copy()
    rhat_k = pos_k / np.linalg.norm(pos_k, axis=1)[:, None]
    first, second = pos[:20] + rng.normal(0, 5, (20, 3)), pos[20:40].copy()
    z_shell = z[:20].copy()
    step = 0.25
    table = 1.0 / (1.0 + (step * np.arange(4002)) / 50.0)  # any smooth U(s)/s
    sigma = 0.02
    out = _shell_streaming(first, second, z_shell, pos_k, rhat_k, z_k, 1 / (2 * sigma**2), 6 * sigma, step, table)

    def u_over_s(s):
        v = np.interp(s / step, np.arange(table.size), table)
        return np.where((s >= 0.5) & (s < 1000.0), v, 0.0)

    for m in range(20):
        w = np.exp(-((z_k - z_shell[m]) ** 2) / (2 * sigma**2)) * (np.abs(z_k - z_shell[m]) < 6 * sigma)
        for row, x in enumerate((first[m], second[m])):
            d = x - pos_k
            s = np.linalg.norm(d, axis=1)
            ref = np.sum(w * u_over_s(s) * np.einsum("ij,ij->i", d, rhat_k)) / np.sum(w)
            assert out[row, m] == pytest.approx(ref, rel=1e-10, abs=1e-12)


def test_kernel_sums_match_the_direct_sum():
    z = np.random.default_rng(4).uniform(0.1, 0.4, 5000)
    at = np.array([0.1, 0.2, 0.33, 0.4])
    direct = np.exp(-((at[:, None] - z[None, :]) ** 2) / (2 * 0.01**2)).sum(axis=1)
    # binned at sigma/8: ~0.5% at most, plenty for the pair's own small share of the kernel mean
    np.testing.assert_allclose(_kernel_sums(z, at, 0.01), direct, rtol=5e-3)


def test_kept_fraction_falls_with_separation_and_is_small_loss_for_close_pairs():
    """Close pairs sit in nearly the same shell, so the removal takes little of their signal; wide pairs
    lose more because the shells around their two redshifts see different streaming (common practice:
    the trend removal is known to suppress the large-separation signal)."""
    pos, z = _cone(8000, 5)
    edges = np.arange(0.0, 301.0, 20.0)
    tr = trend_transfer(pos, z, edges, 0.01, seed=6, n_pairs=300, n_shell=4000)
    assert np.all(np.isfinite(tr.ratio)) and np.all(tr.error > 0)
    assert 0.97 < tr.ratio[0] <= 1.0
    assert tr.ratio[-1] < 0.7
    smooth = np.convolve(tr.ratio, np.ones(3) / 3, mode="valid")
    assert np.all(np.diff(smooth) < 3 * tr.error.max())


def test_wider_kernel_keeps_more_signal():
    """A kernel wide in redshift averages the streaming of a larger volume, which cancels: the loss shrinks."""
    pos, z = _cone(6000, 7)
    edges = np.arange(0.0, 201.0, 40.0)
    narrow = trend_transfer(pos, z, edges, 0.005, seed=8, n_pairs=300, n_shell=4000)
    wide = trend_transfer(pos, z, edges, 0.1, seed=8, n_pairs=300, n_shell=4000)
    assert np.all(wide.ratio[2:] > narrow.ratio[2:])
    assert np.all(wide.ratio > 0.9)


def test_same_seed_same_result_and_bad_input_refused():
    pos, z = _cone(2000, 9)
    edges = np.arange(0.0, 101.0, 25.0)
    a = trend_transfer(pos, z, edges, 0.01, seed=3, n_pairs=100, n_shell=1000)
    b = trend_transfer(pos, z, edges, 0.01, seed=3, n_pairs=100, n_shell=1000)
    np.testing.assert_array_equal(a.ratio, b.ratio)
    with pytest.raises(InputError, match="sigma_z"):
        trend_transfer(pos, z, edges, 0.0)
    with pytest.raises(InputError, match="positions"):
        trend_transfer(pos[:, :2], z, edges, 0.01)


def test_pair_weights_enter_both_sums():
    """Equal weights change nothing (they cancel in R_b, analytic); 0/1 weights on a random half of the
    tracers (a sub-population with the same geometry) keep the same fraction within the Monte Carlo
    errors, whereas a weight on one sum only would not; bad weights are refused."""
    pos, z = _cone(6000, 12)
    edges = np.arange(0.0, 241.0, 40.0)
    plain = trend_transfer(pos, z, edges, 0.01, seed=4, n_pairs=300, n_shell=3000)
    equal = trend_transfer(pos, z, edges, 0.01, seed=4, n_pairs=300, n_shell=3000, weights=np.full(z.size, 3.0))
    np.testing.assert_allclose(equal.ratio, plain.ratio, rtol=1e-12)
    half = (np.random.default_rng(13).uniform(size=z.size) < 0.5).astype(float)
    sub = trend_transfer(pos, z, edges, 0.01, seed=5, n_pairs=1200, n_shell=3000, weights=half)
    assert np.all(np.abs(sub.ratio - plain.ratio) < 4.0 * np.hypot(sub.error, plain.error))
    assert np.any(np.abs(sub.ratio - plain.ratio) > 0.0)  # a different pair sample: not a copy
    with pytest.raises(InputError, match="weights"):
        trend_transfer(pos, z, edges, 0.01, weights=-half)

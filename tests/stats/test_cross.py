"""Cross pairs of two catalogues ([partner]): the curve against a numpy pair loop, the shared
regions, the cross template, blinding, and (validation) injection-recovery on mocks where both
catalogues carry kSZ."""

import dataclasses
import json

import numpy as np
import pandas as pd
import pytest

from pairvel.input.config import PartnerConfig, load_config
from pairvel.maps.photometry import measure_apertures
from pairvel.maps.skymap import read_map
from pairvel.maps.trend import remove_redshift_trend
from pairvel.model.theory import correlation_function, mean_correlation, pairwise_velocity
from pairvel.pairs.geometry import comoving_positions
from pairvel.pipeline import run_pipeline
from pairvel.report.blinding import apply_factor
from pairvel.stats.covariance import kmeans_regions
from pairvel.stats.cross import partner_regions

PARTNER = """
[partner]
path = "partner.csv"
weight_column = "w"
radius_arcmin = 16.0
bias = 2.5
"""


def write_partner(folder, n=300, seed=5):
    """A partner catalogue (invented) over the tiny survey's footprint, with weights."""
    rng = np.random.default_rng(seed)
    ra = rng.uniform(22, 48, n)
    dec = np.degrees(np.arcsin(rng.uniform(np.sin(np.radians(-8)), np.sin(np.radians(13)), n)))
    pd.DataFrame({"ra": ra, "dec": dec, "z": rng.uniform(0.1, 0.2, n), "w": rng.uniform(0.5, 2.0, n)}).to_csv(
        folder / "partner.csv", index=False)


def brute_cross(pos1, t1, w1, pos2, t2, w2, edges, drop1=None, drop2=None):
    """The Ferreira et al. (1999) estimator over the pairs (i in 1, j in 2) by a numpy loop."""
    num, den = np.zeros(edges.size - 1), np.zeros(edges.size - 1)
    for i in range(len(pos1)):
        if drop1 is not None and drop1[i]:
            continue
        d = pos1[i] - pos2
        r = np.linalg.norm(d, axis=1)
        c = np.einsum("ij,ij->i", d / r[:, None], pos1[i] / np.linalg.norm(pos1[i])
                      + pos2 / np.linalg.norm(pos2, axis=1)[:, None]) / 2
        b = np.searchsorted(edges, r, side="right") - 1
        ok = (b >= 0) & (b < edges.size - 1) & (r < edges[-1])
        if drop2 is not None:
            ok &= ~drop2
        ww = w1[i] * w2[ok]
        np.add.at(num, b[ok], ww * (t1[i] - t2[ok]) * c[ok])
        np.add.at(den, b[ok], ww * c[ok] ** 2)
    return -num / den


@pytest.fixture(scope="module")
def cross_run(tmp_path_factory):
    from tests.conftest import make_tiny_survey

    folder = tmp_path_factory.mktemp("cross")
    make_tiny_survey(folder)
    write_partner(folder)
    (folder / "run.toml").write_text((folder / "run.toml").read_text() + PARTNER)
    cfg = load_config(folder / "run.toml")
    return cfg, run_pipeline(cfg)


def test_cross_curve_and_jackknife_match_a_numpy_pair_loop(cross_run):
    """Photometry of the second catalogue at its own radius, trend removed per catalogue, weights,
    and each delete-one sample re-trended without its region: the engine's cross curve and jackknife
    samples against a direct loop (analytic: the same sums, to rounding)."""
    cfg, res = cross_run
    cross = res.extra["cross"]
    edges = np.asarray(cross["edges_mpc"])
    t = res.tracers[np.asarray(res.tracers["used"], dtype=bool)]
    t = t[np.argsort(np.asarray(t["row"]))]
    z1, t1_raw = np.asarray(t["z"], float), np.asarray(t["t_raw_uK"], float)
    pos1 = comoving_positions(np.asarray(t["ra_deg"], float), np.asarray(t["dec_deg"], float), z1, cosmo=cfg.cosmology)
    reg1 = np.asarray(t["region"], np.int64)
    part = pd.read_csv(cfg.partner.path)
    skymap = read_map(cfg.map.path)
    ap = measure_apertures(skymap, part.ra.to_numpy(), part.dec.to_numpy(), 16.0)
    part = part[ap.usable]
    t2_raw = ap.temperatures[0, ap.usable]
    z2, w2 = part.z.to_numpy(), part.w.to_numpy()
    pos2 = comoving_positions(part.ra.to_numpy(), part.dec.to_numpy(), z2, cosmo=cfg.cosmology)
    w1 = np.ones(z1.size)

    def trend(t_raw, z):
        return remove_redshift_trend(t_raw, z, sigma_z=cfg.trend.sigma_z)

    expect = brute_cross(pos1, trend(t1_raw, z1), w1, pos2, trend(t2_raw, z2), w2, edges)
    np.testing.assert_allclose(cross["p"], expect, rtol=1e-10, atol=0)  # analytic: same sums
    reg2 = partner_regions(part.ra.to_numpy(), part.dec.to_numpy(), np.asarray(t["ra_deg"], float),
                           np.asarray(t["dec_deg"], float), reg1)
    n_jk = cross["n_jk"]
    p_jk = np.array([brute_cross(pos1, _retrended(t1_raw, z1, reg1, k, trend), w1, pos2, _retrended(t2_raw, z2, reg2, k, trend), w2, edges,
                                 drop1=reg1 == k, drop2=reg2 == k) for k in range(n_jk)])
    err = np.sqrt(np.diag((n_jk - 1) / n_jk * (p_jk - p_jk.mean(0)).T @ (p_jk - p_jk.mean(0))))
    np.testing.assert_allclose(cross["p_err"], err, rtol=1e-8)  # analytic: delete-one jackknife of the same sums


def _retrended(t_raw, z, regions, k, trend):
    """Temperatures with the trend estimated without region k (region k's tracers 0)."""
    out = np.zeros_like(t_raw)
    keep = regions != k
    out[keep] = trend(t_raw[keep], z[keep])
    return out


def test_cross_result_reports_fit_nulls_and_meaning(cross_run):
    cfg, res = cross_run
    cross = res.extra["cross"]
    assert cross["partner"]["selection"]["used"] == 300
    assert cross["bias_1"] == 1.0 and cross["bias_2"] == 2.5
    assert "(tau_1 b_2 + tau_2 b_1) / (b_1 + b_2)" in cross["amplitude_meaning"]
    assert {n["kind"] for n in cross["nulls"]} == {"shuffled", "shuffled_in_z"}
    assert all(n["n_realisations"] == 100 for n in cross["nulls"])  # nulls.n_shuffle, n_shuffle_z defaults
    assert np.isfinite(cross["fit"]["amplitude"]) and cross["fit"]["error"] > 0
    # the main curve is that of the run without [partner] (its random stream is untouched)
    bare = run_pipeline(dataclasses.replace(cfg, partner=PartnerConfig()))
    np.testing.assert_array_equal(bare.p, res.p)  # internal regression: same numbers bit for bit
    assert bare.fit.amplitude == res.fit.amplitude and "cross" not in bare.extra


def test_blinding_scales_the_cross_curve_and_fit(cross_run):
    _, res = cross_run
    blind = apply_factor(res, 1.3, blinding={"blinded": True})
    a, b = res.extra["cross"], blind.extra["cross"]
    np.testing.assert_allclose(b["p"], 1.3 * np.asarray(a["p"]), rtol=1e-14)  # analytic: curve x factor
    np.testing.assert_allclose(b["covariance"], 1.69 * np.asarray(a["covariance"]), rtol=1e-14)
    assert b["fit"]["amplitude"] == pytest.approx(1.3 * a["fit"]["amplitude"], rel=1e-14)
    assert b["fit"]["snr"] == a["fit"]["snr"] and b["nulls"][0]["pte_mean_curve"] == a["nulls"][0]["pte_mean_curve"]


def test_partner_regions_reproduce_kmeans_labels():
    """k-means assigns each point to its nearest centre, so the first catalogue's own tracers get
    their own labels back (analytic, for a converged k-means), and a nearby point its neighbour's."""
    rng = np.random.default_rng(2)
    ra, dec = rng.uniform(0, 30, 400), rng.uniform(-10, 10, 400)
    labels = kmeans_regions(ra, dec, 8, seed=4)
    again = partner_regions(ra, dec, ra, dec, labels)
    assert np.mean(again == labels) > 0.995
    assert np.isin(partner_regions(ra[:5] + 1e-6, dec[:5], ra, dec, labels), labels[:5]).all()


def test_cross_template_uses_mean_bias_and_product_of_biases():
    """v12 of cross pairs: -(2/3) H a f r [(b_1 + b_2)/2] xibar / (1 + b_1 b_2 xi) (derived in
    pairvel.model.theory); equal biases give the auto template exactly."""
    from pairvel.model.cosmology import DEFAULT_COSMOLOGY as cosmo
    from pairvel.model.theory import growth_rate

    r, z = np.array([10.0, 30.0, 80.0]), 0.3
    np.testing.assert_array_equal(pairwise_velocity(r, z, (1.7, 1.7)), pairwise_velocity(r, z, 1.7))
    xi, xibar = correlation_function(r, z), mean_correlation(r, z)
    pre = -(2 / 3) * cosmo.hubble_km_s_mpc(z) / (1 + z) * growth_rate(z) * r
    expect = pre * 0.5 * (3.0 + 1.0) * xibar / (1 + 3.0 * 1.0 * xi)
    np.testing.assert_allclose(pairwise_velocity(r, z, (3.0, 1.0)), expect, rtol=1e-12)  # analytic
    np.testing.assert_allclose(pairwise_velocity(r, z, (3.0, 1.0)), pairwise_velocity(r, z, (1.0, 3.0)), rtol=0)


def test_cross_report_section(cross_run):
    from pairvel.report.outputs import report_sections

    _, res = cross_run
    body = report_sections(res)["Cross pairs with a second catalogue"]
    assert "partner.csv" in body and "tau_cross" in body and body.count("\n|") >= len(res.edges)


# ------------------------------------------------------------------------------ validation
MOCK = dict(n_tracers=4000, nside=256, ra_min=-10, ra_max=10, dec_min=-6, dec_max=6, z_min=0.15, z_max=0.4,
            cell_mpc=8.0, beam_fwhm_arcmin=10.0, aperture_radius_arcmin=15.0, include_cmb=False,
            noise_uk_arcmin=10.0, tau_mean=1e-2, bias=0.6, partner_n_tracers=4000, partner_bias=0.3,
            partner_tau_mean=3e-3)


@pytest.mark.validation
def test_cross_amplitude_is_recovered_on_mocks_with_signal_in_both(tmp_path):
    """Cluster-like (b = 0.6, tau = 1e-2) and galaxy-like (b = 0.3, tau = 3e-3) catalogues of one
    volume, both painted: the cross fit recovers (tau_1 b_2 + tau_2 b_1) / (b_1 + b_2) = 5.33e-3
    (times the aperture response) without bias over 8 mocks: mean pull within 3 / sqrt(8) of 0."""
    from pairvel.sims.mock import make_mock_survey

    pulls = []
    for seed in range(8):
        folder = tmp_path / f"m{seed}"
        make_mock_survey(folder, seed=300 + seed, **MOCK)
        cfg = load_config(folder / "run.toml")
        truth = json.loads((folder / "truth.json").read_text())
        fit = run_pipeline(cfg).extra["cross"]["fit"]
        expect = truth["aperture_response"] * truth["partner"]["tau_cross"]
        pulls.append((fit["amplitude"] - expect) / fit["error"])
    pulls = np.array(pulls)
    print("cross-amplitude pulls:", np.round(pulls, 2))
    assert abs(pulls.mean()) < 3 / np.sqrt(8), pulls  # common practice: 3 sigma on the mean pull
    assert pulls.std(ddof=1) < 1.6, pulls  # jackknife errors are, if anything, large


def test_the_template_in_use_is_the_cross_template(cross_run):
    """The reported cross template is the bin average of v12 with the two biases, not the auto one:
    its ratio to the auto template of b = 1 follows (b_1 + b_2)/2 / (1 + b_1 b_2 xi) at large r."""
    cfg, res = cross_run
    cross = res.extra["cross"]
    ratio = np.asarray(cross["v12_template"])[-1] / res.v12_template[-1]
    assert ratio == pytest.approx((1.0 + 2.5) / 2, rel=0.05)  # analytic: xi << 1 at 90-120 Mpc

"""Linear-theory template: EH98 power spectrum, correlation functions, growth, pairwise velocity.

v12(r, z) = -(2/3) H(z) a f(z) r b xibar(r, z) / (1 + b^2 xi(r, z))      [comoving r, km/s]

and for the cross pairs of two samples with biases b_1, b_2 (one member in each)

v12(r, z) = -(2/3) H(z) a f(z) r [(b_1 + b_2) / 2] xibar(r, z) / (1 + b_1 b_2 xi(r, z)).

(Juszkiewicz et al. 1999, ApJ 518, L25; Sheth et al. 2001, MNRAS 326, 463; bias placement as in
Bhattacharya & Kosowsky 2008).  P(k) is the Eisenstein & Hu (1998, ApJ 496, 605) fit normalised to
sigma_8; xi and xibar come from FFTLog (Hamilton 2000, MNRAS 312, 257) as scipy.fft.fht with a
convergence check.  Wavenumbers are in 1/Mpc and distances in Mpc (not h units).
"""

from __future__ import annotations

__all__ = ["transfer_eh98", "growth_factor", "growth_rate", "linear_power", "sigma_radius",
           "correlation_function", "mean_correlation", "pairwise_velocity", "binned_pairwise_velocity",
           "eh98_scales", "bias_factors"]

from functools import lru_cache

import numpy as np
from scipy import fft, integrate
from scipy.interpolate import CubicSpline

from ..core.errors import TheoryError
from .cosmology import DEFAULT_COSMOLOGY, Cosmology

_K_MIN, _K_MAX, _N_K = 1e-5, 1e3, 4096
_XI_RTOL = 2e-3  # agreement demanded between two FFTLog set-ups (relative to the local |xi| scale)


def eh98_scales(omega_m_h2: float, omega_b_h2: float, t_cmb_k: float) -> dict:
    """Characteristic scales of Eisenstein & Hu 1998: z_eq, k_eq (1/Mpc), z_drag, sound horizon (Mpc).

    Returns the sound horizon from their eq. 6 (``s``) and the fitting formula eq. 26 (``s_fit``).
    """
    om, ob = omega_m_h2, omega_b_h2
    th = t_cmb_k / 2.7
    z_eq = 2.50e4 * om * th**-4
    k_eq = 7.46e-2 * om * th**-2
    b1 = 0.313 * om**-0.419 * (1 + 0.607 * om**0.674)
    b2 = 0.238 * om**0.223
    z_d = 1291 * om**0.251 / (1 + 0.659 * om**0.828) * (1 + b1 * ob**b2)
    r_d = 31.5 * ob * th**-4 * (1e3 / z_d)
    r_eq = 31.5 * ob * th**-4 * (1e3 / z_eq)
    if ob > 0:
        s = 2 / (3 * k_eq) * np.sqrt(6 / r_eq) * np.log((np.sqrt(1 + r_d) + np.sqrt(r_d + r_eq)) / (1 + np.sqrt(r_eq)))
    else:
        s = 0.0
    s_fit = 44.5 * np.log(9.83 / om) / np.sqrt(1 + 10 * ob**0.75)
    return {"z_eq": z_eq, "k_eq": k_eq, "z_drag": z_d, "R_drag": r_d, "R_eq": r_eq, "s": s, "s_fit": s_fit}


def _t0_tilde(k, q, alpha, beta):
    c = 14.2 / alpha + 386.0 / (1 + 69.9 * q**1.08)
    lg = np.log(np.e + 1.8 * beta * q)
    return lg / (lg + c * q * q)


def transfer_eh98(k_mpc, *, cosmo: Cosmology = DEFAULT_COSMOLOGY, wiggles: bool = True):
    """Eisenstein & Hu (1998) matter transfer function.

    Parameters
    ----------
    k_mpc : array-like, 1/Mpc
    cosmo : Cosmology
    wiggles : bool, default True
        True: the full fit with baryon acoustic oscillations (their eqs. 2-24); False: the
        no-wiggle shape fit (eqs. 26-31).

    Returns
    -------
    ndarray, dimensionless, -> 1 as k -> 0
    """
    k = np.asarray(k_mpc, dtype=float)
    h = cosmo.h
    om, ob = cosmo.omega_m * h * h, cosmo.omega_b * h * h
    fb = cosmo.omega_b / cosmo.omega_m
    fc = 1.0 - fb
    th = cosmo.t_cmb_k / 2.7
    sc = eh98_scales(om, ob, cosmo.t_cmb_k)
    if not wiggles:
        s = sc["s_fit"]
        alpha_g = 1 - 0.328 * np.log(431 * om) * fb + 0.38 * np.log(22.3 * om) * fb * fb
        gamma_eff = cosmo.omega_m * h * (alpha_g + (1 - alpha_g) / (1 + (0.43 * k * s) ** 4))
        q = (k / h) * th**2 / gamma_eff
        l0 = np.log(2 * np.e + 1.8 * q)
        c0 = 14.2 + 731.0 / (1 + 62.5 * q)
        return l0 / (l0 + c0 * q * q)
    if cosmo.omega_b <= 0:
        raise TheoryError("the Eisenstein & Hu transfer function with wiggles needs omega_b > 0; use wiggles = false")
    k_eq, s, r_d = sc["k_eq"], sc["s"], sc["R_drag"]
    q = k / (13.41 * k_eq)
    k_silk = 1.6 * ob**0.52 * om**0.73 * (1 + (10.4 * om) ** -0.95)
    a1 = (46.9 * om) ** 0.670 * (1 + (32.1 * om) ** -0.532)
    a2 = (12.0 * om) ** 0.424 * (1 + (45.0 * om) ** -0.582)
    alpha_c = a1**-fb * a2 ** (-(fb**3))
    bb1 = 0.944 / (1 + (458 * om) ** -0.708)
    bb2 = (0.395 * om) ** -0.0266
    beta_c = 1.0 / (1 + bb1 * (fc**bb2 - 1))
    f = 1.0 / (1 + (k * s / 5.4) ** 4)
    t_c = f * _t0_tilde(k, q, 1.0, beta_c) + (1 - f) * _t0_tilde(k, q, alpha_c, beta_c)
    y = (1 + sc["z_eq"]) / (1 + sc["z_drag"])
    sq = np.sqrt(1 + y)
    g = y * (-6 * sq + (2 + 3 * y) * np.log((sq + 1) / (sq - 1)))
    alpha_b = 2.07 * k_eq * s * (1 + r_d) ** -0.75 * g
    beta_node = 8.41 * om**0.435
    ks = np.maximum(k * s, 1e-300)
    s_tilde = s / (1 + (beta_node / ks) ** 3) ** (1.0 / 3.0)
    beta_b = 0.5 + fb + (3 - 2 * fb) * np.sqrt((17.2 * om) ** 2 + 1)
    t_b = (_t0_tilde(k, q, 1.0, 1.0) / (1 + (ks / 5.2) ** 2)
           + alpha_b / (1 + (beta_b / ks) ** 3) * np.exp(-((k / k_silk) ** 1.4))) * np.sinc(k * s_tilde / np.pi)
    return fb * t_b + fc * t_c


def _efunc_matter_lambda(z, cosmo):
    return np.sqrt(cosmo.omega_m * (1 + z) ** 3 + 1 - cosmo.omega_m)


def _growth_integral(a, cosmo):
    """int_0^a da' / (a' E(a'))^3 for flat matter + Lambda."""
    a = np.atleast_1d(np.asarray(a, dtype=float))
    fn = lambda x: 1.0 / (x * _efunc_matter_lambda(1 / x - 1, cosmo)) ** 3 if x > 0 else 0.0  # noqa: E731
    return np.array([integrate.quad(fn, 0.0, ai, epsabs=0, epsrel=1e-11, limit=200)[0] for ai in a])


def growth_factor(z, *, cosmo: Cosmology = DEFAULT_COSMOLOGY):
    """Linear growth factor D(z) / D(0) of flat LCDM (Heath 1977, MNRAS 179, 351).

    D ~ (5 Omega_m / 2) E(a) int_0^a da' / (a' E(a'))^3, with E for matter + Lambda (radiation,
    below 1e-3 of the matter density at z < 3, is left out of the growth equation).
    """
    z = np.asarray(z, dtype=float)
    a = 1.0 / (1.0 + z.ravel())
    d = _efunc_matter_lambda(z.ravel(), cosmo) * _growth_integral(a, cosmo)
    d0 = _growth_integral(1.0, cosmo)[0]
    return (d / d0).reshape(z.shape)


def growth_rate(z, *, cosmo: Cosmology = DEFAULT_COSMOLOGY, method: str = "exact"):
    """Linear growth rate f = dln D / dln a.

    method="exact" differentiates the Heath integral analytically; "linder" gives
    Omega_m(z)^0.55 (Linder 2005, PRD 72, 043529).
    """
    z = np.asarray(z, dtype=float)
    e = _efunc_matter_lambda(z, cosmo)
    om_z = cosmo.omega_m * (1 + z) ** 3 / e**2
    if method == "linder":
        return om_z**0.55
    if method != "exact":
        raise TheoryError(f"growth_rate method must be 'exact' or 'linder'; got {method!r}")
    a = 1.0 / (1.0 + z)
    integ = _growth_integral(a.ravel(), cosmo).reshape(z.shape)
    return -1.5 * om_z + 1.0 / (integ * a * a * e**3)


def _tophat(x):
    x = np.asarray(x, dtype=float)
    small = x < 1e-3
    xs = np.where(small, 1.0, x)
    return np.where(small, 1 - x * x / 10, 3 * (np.sin(xs) - xs * np.cos(xs)) / xs**3)


def _shape(k, cosmo, wiggles, power=None):
    """Unnormalised P(k) shape: k^n_s T(k)^2, or the tabulated spectrum when ``power`` is given."""
    if power is not None:
        return power(k)
    return k**cosmo.n_s * transfer_eh98(k, cosmo=cosmo, wiggles=wiggles) ** 2


@lru_cache(maxsize=32)
def _sigma8_norm(cosmo: Cosmology, wiggles: bool, power=None) -> float:
    """Factor that turns the shape into P(k, z=0).

    For EH98, and for a table with ``renormalise``, it makes sigma(R = 8/h Mpc, z = 0) equal
    cosmo.sigma_8 (top-hat window); for a table kept at its own amplitude it is 1 / D(z_table)^2.
    """
    if power is not None and not power.renormalise:
        return float(1.0 / growth_factor(power.z, cosmo=cosmo) ** 2)
    kk = np.geomspace(1e-5, 1e2, 20000)
    integrand = kk**3 * _shape(kk, cosmo, wiggles, power) * _tophat(kk * 8.0 / cosmo.h) ** 2
    return cosmo.sigma_8**2 / (integrate.simpson(integrand, x=np.log(kk)) / (2 * np.pi**2))


@lru_cache(maxsize=32)
def _power_grid(cosmo: Cosmology, wiggles: bool, k_min: float, k_max: float, n_k: int, power=None):
    """Log-spaced k grid and P(k, z=0)."""
    k = np.geomspace(k_min, k_max, n_k)
    return k, _sigma8_norm(cosmo, wiggles, power) * _shape(k, cosmo, wiggles, power)


def linear_power(k_mpc, z=0.0, *, cosmo: Cosmology = DEFAULT_COSMOLOGY, wiggles: bool = True, power=None):
    """Linear matter power spectrum P(k, z) in Mpc^3, normalised so sigma(8/h Mpc, z=0) = sigma_8.

    Parameters
    ----------
    k_mpc : array-like, 1/Mpc
    z : float
    wiggles : bool, default True
        EH98 with (True) or without (False) baryon wiggles; ignored when ``power`` is given.
    power : pairvel.model.power.TabulatedPower, optional
        A tabulated spectrum to use instead of EH98 (scaled from its redshift with D(z), and
        renormalised to sigma_8 when it says so).
    """
    k = np.asarray(k_mpc, dtype=float)
    return (_sigma8_norm(cosmo, bool(wiggles), power) * _shape(k, cosmo, wiggles, power)
            * growth_factor(z, cosmo=cosmo) ** 2)


def sigma_radius(radius_mpc, z=0.0, *, cosmo: Cosmology = DEFAULT_COSMOLOGY, wiggles: bool = True, power=None):
    """rms linear density contrast in top-hat spheres of comoving radius ``radius_mpc``."""
    r = np.atleast_1d(np.asarray(radius_mpc, dtype=float))
    kk = np.geomspace(1e-5, 1e2, 20000)
    pk = linear_power(kk, z, cosmo=cosmo, wiggles=wiggles, power=power)
    out = np.array([integrate.simpson(kk**3 * pk * _tophat(kk * ri) ** 2, x=np.log(kk)) for ri in r])
    out = np.sqrt(out / (2 * np.pi**2))
    return out[0] if np.ndim(radius_mpc) == 0 else out


@lru_cache(maxsize=32)
def _fftlog_tables(cosmo: Cosmology, wiggles: bool, k_min: float, k_max: float, n_k: int, power=None):
    """r grid and xi(r), xibar(r) at z = 0 from one FFTLog set-up."""
    k, pk = _power_grid(cosmo, wiggles, k_min, k_max, n_k, power)
    pk = pk * np.exp(-((k / 20.0) ** 2))  # damp k > 20/Mpc to stop ringing; changes xi by < 1e-4 at r > 1 Mpc
    dln = np.log(k[1] / k[0])
    out = {}
    # scipy's fht gives A(R) = int a(k) J_mu(kR) R dk on R = exp(offset) / k[::-1]; with
    # j0(x) = sqrt(pi/2x) J_1/2(x) and j1(x) = sqrt(pi/2x) J_3/2(x):
    #   xi(R)    = sqrt(pi/2R) / (2 pi^2)       int k^3/2 P J_1/2(kR) dk
    #   xibar(R) = 3 sqrt(pi/2R) / (2 pi^2 R)   int k^1/2 P J_3/2(kR) dk
    offset = fft.fhtoffset(dln, mu=0.5, initial=0.0)
    r = np.exp(offset) / k[::-1]
    pref = np.sqrt(np.pi / (2 * r)) / (2 * np.pi**2)
    out["r"] = r
    out["xi"] = pref * fft.fht(k**1.5 * pk, dln, mu=0.5, offset=offset) / r
    out["xibar"] = 3 * pref * fft.fht(k**0.5 * pk, dln, mu=1.5, offset=offset) / r**2
    return out["r"], out["xi"], out["xibar"]


def _correlations(r_mpc, cosmo, wiggles, power=None):
    r = np.asarray(r_mpc, dtype=float)
    if np.any(~np.isfinite(r)) or np.any(r < 0.5) or np.any(r > 2000):
        raise TheoryError(f"correlation functions are computed for 0.5 <= r <= 2000 Mpc; got r in "
                          f"[{np.min(r):g}, {np.max(r):g}]")
    results = []
    for setup in ((_K_MIN, _K_MAX, _N_K), (_K_MIN / 10, _K_MAX, 2 * _N_K)):
        rg, xi, xibar = _fftlog_tables(cosmo, bool(wiggles), *setup, power)
        sel = (rg > 0.1) & (rg < 1e4)
        results.append((CubicSpline(np.log(rg[sel]), xi[sel])(np.log(r)),
                        CubicSpline(np.log(rg[sel]), xibar[sel])(np.log(r))))
    for j, name in enumerate(("xi", "xibar")):
        a, b = results[0][j], results[1][j]
        scale = np.maximum(np.abs(a), 1e-4)
        worst = np.max(np.abs(a - b) / scale) if r.size else 0.0
        if worst > _XI_RTOL:
            raise TheoryError(f"FFTLog {name}(r) has not converged: two k-grids differ by {worst:.2e} "
                              f"(relative) on the requested r; tolerance {_XI_RTOL:g}")
    return results[1]


def correlation_function(r_mpc, z=0.0, *, cosmo: Cosmology = DEFAULT_COSMOLOGY, wiggles: bool = True,
                         power=None):
    """Linear matter correlation function xi(r, z) = (1/2 pi^2) int k^2 P(k, z) j0(kr) dk."""
    xi, _ = _correlations(r_mpc, cosmo, wiggles, power)
    return xi * growth_factor(z, cosmo=cosmo) ** 2


def mean_correlation(r_mpc, z=0.0, *, cosmo: Cosmology = DEFAULT_COSMOLOGY, wiggles: bool = True, power=None):
    """Volume-averaged correlation xibar(r) = 3/r^3 int_0^r xi(x) x^2 dx (Hankel form with 3 j1(kr)/kr)."""
    _, xibar = _correlations(r_mpc, cosmo, wiggles, power)
    return xibar * growth_factor(z, cosmo=cosmo) ** 2


def pairwise_velocity(r_mpc, z, bias=1.0, *, cosmo: Cosmology = DEFAULT_COSMOLOGY, wiggles: bool = True,
                      power=None, growth: str = "exact"):
    """Linear-theory mean pairwise velocity v12(r, z) in km/s (negative: pairs approach).

    Parameters
    ----------
    r_mpc : array-like, comoving Mpc
    z : float
    bias : float or (float, float), default 1.0
        Linear bias b of the tracers, or the biases (b_1, b_2) of two samples for their cross pairs.
    power : pairvel.model.power.TabulatedPower, optional
        Tabulated linear P(k) instead of EH98.
    growth : {"exact", "linder"}, default "exact"
        Growth rate f(z): exact flat-LCDM value, or Omega_m(z)^0.55 (Linder 2005).

    Notes
    -----
    v12 = -(2/3) H(z) a f(z) r b xibar / (1 + b^2 xi), with xi and xibar of the matter at z.

    Cross pairs (member 1 from a sample of bias b_1, member 2 of b_2): the mean velocity of member 1
    towards member 2 is set by the density of sample 2 around it, so it carries b_2, and the other
    way round; the pair-weighted relative velocity, to the order of the auto formula, is
    v12 = -(2/3) H a f r [(b_1 + b_2) / 2] xibar / (1 + b_1 b_2 xi) [calc: the auto derivation
    (Sheth et al. 2001) with delta_1 = b_1 delta, delta_2 = b_2 delta].  b_1 = b_2 gives the auto form.
    """
    r = np.asarray(r_mpc, dtype=float)
    if not np.isfinite(z) or z < 0:
        raise TheoryError(f"redshift for the pairwise velocity must be finite and >= 0; got {z}")
    g2 = growth_factor(z, cosmo=cosmo) ** 2
    xi, xibar = _correlations(r, cosmo, wiggles, power)
    hz = cosmo.hubble_km_s_mpc(z)
    f = growth_rate(z, cosmo=cosmo, method=growth)
    b_lin, b_sq = bias_factors(bias)
    return -(2.0 / 3.0) * hz / (1 + z) * f * r * b_lin * g2 * xibar / (1 + b_sq * g2 * xi)


def bias_factors(bias) -> tuple[float, float]:
    """The bias in v12 and in its pair-count denominator: (b, b^2) for one sample, ((b_1 + b_2) / 2,
    b_1 b_2) for the cross pairs of two samples given as a pair (b_1, b_2)."""
    if np.ndim(bias) == 0:
        b = float(bias)
        return b, b * b
    b1, b2 = (float(x) for x in np.asarray(bias, dtype=float).reshape(2))
    return 0.5 * (b1 + b2), b1 * b2


def binned_pairwise_velocity(edges_mpc, z, bias=1.0, *, cosmo: Cosmology = DEFAULT_COSMOLOGY,
                             wiggles: bool = True, n_sub: int = 16):
    """v12 averaged over each separation bin [lo, hi) with volume (r^2) weighting, km/s.

    Uses ``n_sub`` Gauss-Legendre nodes per bin; bins starting at 0 are fine (the integrand
    vanishes there and r < 0.5 Mpc contributes < 1e-5 of a 20 Mpc bin).
    """
    edges = np.asarray(edges_mpc, dtype=float)
    x, w = np.polynomial.legendre.leggauss(n_sub)
    out = np.empty(edges.size - 1)
    for b in range(edges.size - 1):
        lo, hi = max(edges[b], 0.5), edges[b + 1]
        r = 0.5 * (hi - lo) * x + 0.5 * (hi + lo)
        wr = w * r * r
        out[b] = np.sum(wr * pairwise_velocity(r, z, bias, cosmo=cosmo, wiggles=wiggles)) / np.sum(wr)
    return out

"""Line-of-sight velocities of single clusters from their aperture temperatures at several frequencies.

In each frequency channel nu_c (thermodynamic uK_CMB) a cluster's compensated-aperture temperature is

    t_c = dT_kSZ + T_CMB f(nu_c) y + n_c,

where the kinematic part dT_kSZ = -tau T_CMB v_r / c follows the CMB blackbody (the same in every
channel), the thermal part has the spectrum f of :func:`pairvel.model.sz.tsz_spectrum`, and n_c is
what else the aperture holds: the channel's noise and the primary CMB, which is the same in every
channel and so cannot be told from the kSZ (a noise term of the kinematic part only).  The channel
covariance N of n is measured from apertures at random positions of the same maps
(:func:`channel_covariance`), so both terms are in it.  Each cluster's (y, dT_kSZ) is the generalised
least-squares fit over the channels with that covariance (:func:`decompose_channels`), the optical
depth follows from y under a stated electron temperature (:func:`pairvel.model.sz.optical_depth_from_y`,
non-relativistic) and the velocity is v_r = -c dT_kSZ / (T_CMB tau), with its error propagated to first
order from the joint covariance of y and dT_kSZ (:func:`line_of_sight_velocities`).

The first-order error holds where tau is measured well: v is a ratio, and where the tau S/N is low
its distribution has heavy tails and its mean is biased.  :func:`caution_flags` marks such clusters.
"""

from __future__ import annotations

__all__ = ["Decomposition", "ClusterVelocities", "channel_covariance", "decompose_channels",
           "line_of_sight_velocities", "caution_flags", "flag_text", "FLAG_NAMES", "pull_summary"]

import math
from dataclasses import dataclass

import numpy as np
from scipy import stats

from ..core.constants import C_KM_S, T_CMB_UK
from ..core.errors import InputError
from ..model.sz import ELECTRON_REST_ENERGY_KEV, optical_depth_from_y

#: Caution flags of :func:`caution_flags`, in the order of their bits, with what each means.
FLAG_NAMES = {
    "low_tau_snr": "tau / sigma_tau below the threshold: the velocity error is first-order only and v is biased",
    "nonpositive_y": "fitted y <= 0: no optical depth, no velocity",
    "poor_fit": "channel residuals inconsistent with tSZ + kSZ (chi2 PTE below the threshold): contamination "
                "(dust, radio source, beam mismatch) likely",
    "low_mass": "mass proxy below the stated minimum: weak tSZ and a tau-temperature relation least certain",
    "neighbour": "another catalogue cluster within the aperture's reach: its tSZ and kSZ enter this aperture",
}


@dataclass(frozen=True, eq=False)
class Decomposition:
    """Per-cluster fit of the channel temperatures.

    Attributes
    ----------
    y : ndarray of shape (n,)
        Compton y in the aperture.
    dt_ksz_uk : ndarray of shape (n,), uK
        Kinematic temperature in the aperture.
    cov : ndarray of shape (n, 2, 2)
        Covariance of (y, dt_ksz_uk).
    chi2 : ndarray of shape (n,)
        Residual chi2 of the fit, with ``n_channels - 2`` degrees of freedom (nan with two channels).
    n_channels : int
    """

    y: np.ndarray
    dt_ksz_uk: np.ndarray
    cov: np.ndarray
    chi2: np.ndarray
    n_channels: int

    @property
    def fit_pte(self) -> np.ndarray:
        """Probability to exceed each ``chi2`` (nan with two channels)."""
        dof = self.n_channels - 2
        return stats.chi2.sf(self.chi2, dof) if dof > 0 else np.full(self.chi2.shape, np.nan)


@dataclass(frozen=True, eq=False)
class ClusterVelocities:
    """Optical depths and line-of-sight velocities (positive receding) of the decomposed clusters.

    Attributes
    ----------
    tau, tau_err : ndarray of shape (n,)
    v_km_s, v_err_km_s : ndarray of shape (n,), km/s
        nan where y <= 0.
    te_kev : ndarray of shape (n,), keV
        The electron temperature used for each cluster.
    """

    tau: np.ndarray
    tau_err: np.ndarray
    v_km_s: np.ndarray
    v_err_km_s: np.ndarray
    te_kev: np.ndarray

    @property
    def tau_snr(self) -> np.ndarray:
        return self.tau / self.tau_err


def channel_covariance(t_random_uk) -> np.ndarray:
    """Covariance between channels of aperture temperatures at random sky positions.

    Parameters
    ----------
    t_random_uk : array_like of shape (m, k), uK
        Rows: positions usable in every channel; columns: channels.

    Returns
    -------
    ndarray of shape (k, k), uK^2
        Holds each channel's noise on the diagonal and the primary CMB (and any other signal common
        to the channels, such as the kSZ of unrelated objects) in every element.
    """
    t = np.asarray(t_random_uk, dtype=float)
    if t.ndim != 2 or t.shape[0] < 10 * t.shape[1] or not np.all(np.isfinite(t)):
        raise InputError(f"random apertures must be a finite (m, k) array with m >= 10 k positions; got shape "
                         f"{t.shape}")
    return np.atleast_2d(np.cov(t, rowvar=False))


def decompose_channels(t_uk, f_tsz, channel_cov, *, t_cmb_uk: float = T_CMB_UK) -> Decomposition:
    """Generalised least-squares split of each cluster's channel temperatures into thermal and kinematic parts.

    Parameters
    ----------
    t_uk : array_like of shape (n, k), uK
        Aperture temperature of each cluster in each channel.
    f_tsz : array_like of shape (k,) or (n, k)
        tSZ spectral factor of each channel (:func:`pairvel.model.sz.tsz_spectrum`), or of each cluster
        and channel (relativistic corrections at each cluster's T_e).
    channel_cov : array_like of shape (k, k) or (n, k, k), uK^2
        Covariance of the channels' aperture noise (the primary CMB included), shared or per cluster.
    t_cmb_uk : float, uK, default :data:`pairvel.core.constants.T_CMB_UK`

    Returns
    -------
    Decomposition

    Notes
    -----
    With design A = [T_CMB f, 1] (k x 2) and N the channel covariance, (y, dT_kSZ) = (A^T N^-1 A)^-1
    A^T N^-1 t with covariance (A^T N^-1 A)^-1 (least squares, e.g. Press et al. 2007, Numerical
    Recipes, section 15.4).  A term of N along the all-ones column (the primary CMB) leaves the
    estimate unchanged and adds its variance to dT_kSZ only.
    """
    t = np.asarray(t_uk, dtype=float)
    f = np.asarray(f_tsz, dtype=float)
    k = f.shape[-1]
    if t.ndim != 2 or t.shape[1] != k or k < 2 or f.shape not in ((k,), t.shape):
        raise InputError(f"channel temperatures must be (n, k) with k = {k} >= 2 channels (and f of shape (k,) or "
                         f"(n, k)); got shapes {t.shape} and {f.shape}")
    f = np.broadcast_to(f, t.shape)
    if np.any(np.ptp(f, axis=1) <= 1e-9 * np.maximum(1.0, np.abs(f).max(axis=1))):
        raise InputError(f"the channels must have different tSZ factors to separate tSZ from kSZ; all have "
                         f"f = {f[0, 0]:.6g}")
    cov = np.asarray(channel_cov, dtype=float)
    cov = np.broadcast_to(cov, (t.shape[0], k, k))
    a = np.stack([t_cmb_uk * f, np.ones(t.shape)], axis=-1)  # (n, k, 2)
    try:
        ninv_a = np.linalg.solve(cov, a)
        fisher = np.einsum("nki,nkj->nij", a, ninv_a)
        par_cov = np.linalg.inv(fisher)
    except np.linalg.LinAlgError:
        raise InputError("the channel covariance is singular; the tSZ/kSZ split has no unique solution (are two "
                         "channels identical or noiseless?)") from None
    rhs = np.einsum("nki,nk->ni", ninv_a, t)
    par = np.einsum("nij,nj->ni", par_cov, rhs)
    resid = t - np.einsum("nkj,nj->nk", a, par)
    chi2 = np.einsum("nk,nk->n", resid, np.linalg.solve(cov, resid[..., None])[..., 0])
    if k == 2:
        chi2 = np.full(t.shape[0], np.nan)
    return Decomposition(y=par[:, 0], dt_ksz_uk=par[:, 1], cov=par_cov, chi2=chi2, n_channels=int(k))


def line_of_sight_velocities(dec: Decomposition, te_kev, *, t_cmb_uk: float = T_CMB_UK,
                             response_scatter: float = 0.0) -> ClusterVelocities:
    """tau = y m_e c^2 / (k T_e) and v_r = -c dT_kSZ / (T_CMB tau), with first-order errors.

    Parameters
    ----------
    dec : Decomposition
    te_kev : float or array_like of shape (n,), keV
        Electron temperature of every cluster (taken as exact).
    t_cmb_uk : float, uK
    response_scatter : float, default 0
        Fractional rms scatter s of the aperture's response to a cluster's own signal (profile and
        pixels against the aperture), added to the optical depth's error:
        tau_err^2 = (noise part)^2 + (s tau)^2.  It multiplies y and dT_kSZ alike, so v and its
        error do not carry it.

    Returns
    -------
    ClusterVelocities

    Notes
    -----
    v = -K dT / y with K = c k T_e / (T_CMB m_e c^2).  To first order,
    var v = (K / y)^2 [var dT - 2 (dT / y) cov(y, dT) + (dT / y)^2 var y], which carries the y error
    and the correlation of the two parts through the fit.  dT_kSZ / T_CMB = -tau v_r / c:
    Sunyaev & Zel'dovich 1980, MNRAS 190, 413; Carlstrom, Holder & Reese 2002, ARA&A 40, 643.
    """
    n = dec.y.size
    te = np.broadcast_to(np.asarray(te_kev, dtype=float), (n,)).copy()
    tau = optical_depth_from_y(dec.y, te)
    tau_err = np.hypot(optical_depth_from_y(np.sqrt(dec.cov[:, 0, 0]), te), response_scatter * tau)
    var_y, var_t, cov_yt = dec.cov[:, 0, 0], dec.cov[:, 1, 1], dec.cov[:, 0, 1]
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = dec.dt_ksz_uk / dec.y
        k = C_KM_S / t_cmb_uk * te / ELECTRON_REST_ENERGY_KEV  # c k T_e / (T_CMB m_e c^2), km/s per uK
        v = -k * ratio
        v_err = np.abs(k / dec.y) * np.sqrt(var_t - 2.0 * ratio * cov_yt + ratio**2 * var_y)
    bad = ~(dec.y > 0)
    v[bad] = np.nan
    v_err[bad] = np.nan
    return ClusterVelocities(tau=tau, tau_err=tau_err, v_km_s=v, v_err_km_s=v_err, te_kev=te)


def caution_flags(dec: Decomposition, vel: ClusterVelocities, *, min_tau_snr: float, min_fit_pte: float,
                  proxy=None, min_proxy=None, neighbour=None) -> np.ndarray:
    """Bit flags of :data:`FLAG_NAMES` per cluster (0: no caution).

    Parameters
    ----------
    dec, vel : the fit and its velocities
    min_tau_snr : float
        Flag ``low_tau_snr`` below it.
    min_fit_pte : float
        Flag ``poor_fit`` where the residual chi2 has a PTE below it (three channels or more).
    proxy : ndarray of shape (n,), optional
        Mass proxy; with ``min_proxy``, flag ``low_mass`` below it.
    neighbour : ndarray of shape (n,), bool, optional
        Flag ``neighbour`` where True (another cluster's aperture overlaps).
    """
    bits = {name: 1 << i for i, name in enumerate(FLAG_NAMES)}
    flags = np.zeros(dec.y.size, dtype=np.int32)
    with np.errstate(invalid="ignore"):
        flags[~(vel.tau_snr >= min_tau_snr)] |= bits["low_tau_snr"]
        flags[~(dec.y > 0)] |= bits["nonpositive_y"]
        flags[dec.fit_pte < min_fit_pte] |= bits["poor_fit"]
        if proxy is not None and min_proxy is not None:
            flags[np.asarray(proxy) < min_proxy] |= bits["low_mass"]
    if neighbour is not None:
        flags[np.asarray(neighbour, dtype=bool)] |= bits["neighbour"]
    return flags


def flag_text(flags) -> list[str]:
    """Comma-joined flag names of each value of ``flags`` ("" for none)."""
    names = list(FLAG_NAMES)
    return [",".join(n for i, n in enumerate(names) if int(v) >> i & 1) for v in np.asarray(flags)]


def pull_summary(v_hat, v_err, v_true) -> dict:
    """Mean and variance of the pulls (v_hat - v_true) / sigma, and the variance's sampling error.

    The sampling error of a Gaussian variance from m values is sqrt(2 / (m - 1)) (analytic).
    """
    pulls = (np.asarray(v_hat) - np.asarray(v_true)) / np.asarray(v_err)
    pulls = pulls[np.isfinite(pulls)]
    m = pulls.size
    if m < 3:
        return {"n": int(m), "mean": math.nan, "variance": math.nan, "variance_error": math.nan}
    return {"n": int(m), "mean": float(pulls.mean()), "mean_error": float(1.0 / math.sqrt(m)),
            "variance": float(pulls.var(ddof=1)), "variance_error": float(math.sqrt(2.0 / (m - 1)))}

"""Statistics on the measured curves: covariance, fits, null tests and the fits built on them.

In: pairwise curves and their jackknife, bootstrap or simulated-sky samples, a template.
Out: covariance matrices and their diagnostics, the tau_mean fit
(:class:`~pairvel.stats.fit.AmplitudeFit`), null-test verdicts, and fits per aperture radius,
per proxy bin (one joint covariance across radii and across proxy bins), tau against mass,
and jointly with f sigma_8.
Depends on :mod:`pairvel.core`, :mod:`pairvel.model`, :mod:`pairvel.maps` (photometry of
simulated and null skies) and :mod:`pairvel.pairs`.
"""

__all__ = ["clustervel", "covariance", "covdiag", "fit", "joint", "jointcov", "masstrend", "nulltests", "radii", "regionseeds",
           "simcov", "subsamples"]

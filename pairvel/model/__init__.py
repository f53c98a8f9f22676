"""Theory: cosmology, power spectra, the linear pairwise-velocity template and its corrections.

In: cosmological parameters (:class:`~pairvel.model.cosmology.Cosmology`), the ``[theory]``
config section, measured pair counts and redshifts.
Out: P(k), xi(r), growth, the template v12(r) averaged like the estimator, the fraction of the
signal the redshift-trend removal keeps, the shipped CMB spectrum and the tSZ spectral factor.
Depends only on :mod:`pairvel.core`.
"""

__all__ = ["cmb", "cosmology", "power", "sz", "template", "theory", "trendmodel"]

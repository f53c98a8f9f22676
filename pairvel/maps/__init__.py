"""Sky maps and what is measured on them: reading, masks, pre-filters, several frequencies,
aperture photometry and the redshift-trend removal of the aperture temperatures.

In: map and mask files (or arrays), tracer positions and redshifts, the ``[map]``,
``[aperture]``, ``[prefilter]``, ``[multifrequency]`` and ``[trend]`` config sections.
Out: a :class:`~pairvel.maps.skymap.SkyMap`, aperture temperatures per tracer and radius (uK),
and those temperatures with the redshift trend removed.
Depends on :mod:`pairvel.core` and :mod:`pairvel.model`.
"""

__all__ = ["harmonics", "multifreq", "photometry", "prefilter", "radii", "skymap", "sources", "trend"]

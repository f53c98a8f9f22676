"""Sky maps and what is measured on them: reading, masks, pre-filters, several frequencies,
aperture photometry and the redshift-trend removal of the aperture temperatures.

In: map and mask files (or arrays), tracer positions and redshifts, the ``[map]``,
``[aperture]``, ``[prefilter]``, ``[multifrequency]`` and ``[trend]`` config sections.
Out: a :class:`~pairvel.maps.skymap.SkyMap`, aperture temperatures per tracer and radius (uK),
and those temperatures with the redshift trend removed.
Depends on :mod:`pairvel.core` and :mod:`pairvel.model`.

``skymap`` is the map interface the stages use; ``healpix`` (with ``healpix_io`` for its FITS
files and the private ``_aperture_kernels``) is its HEALPix implementation; ``car`` (with ``car_io``
and the private ``_car_sums`` and ``_car_kernels``) the rectangular-pixel one, for FITS images with
a cylindrical WCS.
"""

__all__ = ["car", "car_io", "channels", "harmonics", "healpix", "healpix_io", "multifreq", "photometry", "prefilter", "radii", "skymap", "sources",
           "tasks", "trend"]

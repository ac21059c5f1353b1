"""Sky maps: one observer's HEALPix light cone of the conversion kernel.

In: a box series, a mass grid and nside. Out: :class:`~raytrace.sky.maps.SkyResult`
with its maps, angular power spectra, dT/T and HEALPix FITS files (``maps``).
"""

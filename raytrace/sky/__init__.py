"""Sky maps: one observer's HEALPix light cone of the conversion kernel.

In: a box series, a mass grid and nside. Out: :class:`~raytrace.sky.maps.SkyResult`
with its maps, each split's map, angular power spectra, dT/T and HEALPix FITS files
(``maps``); its signal and noise from the independent splits (``spectra``); the
HEALPix pixel window, computed (``pixelwindow``); dT/T map figures (``figures``).
"""

"""Sky maps: one observer's HEALPix light cone of the conversion kernel.

In: a box series, a mass grid and nside. Out: :class:`~raytrace.sky.maps.SkyResult`
with its maps (read one mass at a time from the result file), each split's map,
angular power spectra, dT/T (``maps``), HEALPix FITS files written a block of
pixels at a time (``fits``), a run sized before it runs (``estimate``); its signal
and noise from the independent splits (``spectra``); the HEALPix pixel window,
computed (``pixelwindow``); dT/T map figures (``figures``).
"""

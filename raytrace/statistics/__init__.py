"""What the rays say and how far to trust it.

In: the per-row arrays of :mod:`raytrace.tracing`, or the boxes themselves.
Out: :class:`~raytrace.statistics.results.SightlineResult` (mean, spread,
percentiles, files) and the public ``cast_sightlines``; the one-point-PDF mean
(``onepoint``) and the built-in check that compares a run with it
(``meancheck``); bootstrap intervals and tail diagnostics of the spread
(``spread``); degraded boxes and Richardson extrapolation (``resolution``).
"""

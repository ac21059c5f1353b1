"""Upper limits on the kinetic mixing epsilon versus the dark-photon mass.

In: mean kernels (a sightline result) and a sky. Out: epsilon_max(m) from the
measured CMB spectrum (``spectrum``: the FIRAS monopole; ``spectral``) and from
the isotropy of the CMB (``anisotropy``), gathered in a
:class:`~raytrace.limits.limitset.LimitSet` with its tables and plot.
"""

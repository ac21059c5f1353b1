"""Upper limits on the kinetic mixing epsilon versus the dark-photon mass.

In: mean kernels (a sightline result) and a sky. Out: epsilon_max(m) from the
measured CMB spectrum (``spectrum``: the FIRAS monopole; ``spectral``) and from
a sky's anisotropy against the measured TT spectrum (``cmbpower``: Planck 2018;
``anisotropy``), gathered in a
:class:`~raytrace.limits.limitset.LimitSet` with its tables and plot.
"""

"""A sky's dT/T map as a CMB physicist reads it.

In: a :class:`~raytrace.sky.maps.SkyResult`, a mass, epsilon and the observed
photon energy omega_0. Out: a Mollweide view of the temperature anisotropy
dT/T = -g(x) epsilon^2 K / omega_0 with its mean removed (a conversion monopole is a
spectral distortion, not an anisotropy), its colours symmetric about 0 up to the
larger size of the 2nd and 98th percentiles of the pixels (said in the title);
and the rule for the epsilon a figure shows. The spectra beside it are
:mod:`raytrace.report.skyfigures`'s.
"""

import numpy as np

from raytrace.physics.conversion import anisotropy_per_probability
from raytrace.physics.units import frequency_label

#: Percentiles of the pixels that the colour range of a map spans.
COLOUR_PERCENTILES = (2.0, 98.0)


def anisotropy_map(sky, index, epsilon, omega0_eV):
    """dT/T at ``epsilon`` and ``omega0_eV`` of mass ``index``, mean removed, in the sky's ordering."""
    kernel = sky.map("kernel", index)  # one mass's map, read from the sky's file
    return -(epsilon**2) * anisotropy_per_probability(omega0_eV) / omega0_eV * (kernel - kernel.mean())


def draw_map(sky, index, epsilon, omega0_eV, sub=None, margins=None, title=None):
    """healpy.mollview of :func:`anisotropy_map` on pyplot's current figure; the colour range is stated."""
    from raytrace.core.figures import mollview

    values = anisotropy_map(sky, index, epsilon, omega0_eV)
    # Symmetric about 0, so that white is no anisotropy: the larger of the two percentiles' sizes.
    reach = np.max(np.abs(np.percentile(values, COLOUR_PERCENTILES))) or 1e-30  # a flat map: one colour
    head = title or f"m = {sky.mass_eV[index]:.3g} eV, z < {sky.run['z_max']:g}"
    title = (f"{head}\ndT/T at epsilon = {epsilon:.3g}, {frequency_label(omega0_eV)}, mean removed\n"
             f"colours: +-max |{COLOUR_PERCENTILES[0]:g} %, {COLOUR_PERCENTILES[1]:g} % point|")
    options = {key: value for key, value in (("sub", sub), ("margins", margins)) if value is not None}
    mollview(values, nest=sky.ordering == "NESTED", unit="dT/T", format="%.2g", min=-reach, max=reach,
                    title=title, cmap="RdBu_r", **options)


def shown_epsilon(limit, index, epsilon=None):
    """The epsilon a sky figure shows: the one given, else the measured-spectrum limit at that mass (the
    largest anisotropy allowed), else 1e-7; with the words that say which."""
    if epsilon is not None:
        return float(epsilon), "as given"
    if limit is not None and np.isfinite(limit.epsilon_max[index]):
        return float(limit.epsilon_max[index]), "the anisotropy limit at this mass"
    return 1e-7, "no anisotropy limit at this mass"

"""Electron-density boxes: HDF5 files (or arrays) in, immutable boxes and series out.

In: an HDF5 file with a 3-D cubic dataset of any float or integer dtype, plus what
its values mean, the box side and the snapshot redshift; or a numpy array with
the same information. Out: a :class:`Box`, whose float32 ``data`` times
``comoving_scale`` is the comoving electron density in cm^-3, and a
:class:`BoxSeries` of boxes at several redshifts that says which box serves a ray
sample at redshift z.

Modules: ``values`` (lengths and plain checks), ``meanings`` (quantities, the
factor to n_e, plausibility warnings), ``fractions`` (ionised and neutral
fractions), ``metadata`` (where a file keeps its attributes), ``box`` (the Box),
``arrays`` (Box.from_array), ``reading`` (load_box), ``series`` (BoxSeries,
load_series).

What a box says about itself; every item can be given or overridden as an
argument of :func:`load_box` (CLI flag and run-file key ``boxes.<name>`` in
brackets). Attributes are looked for on the dataset, then its parent groups up
to the root; the redshift, box size and h also in a header group of the file
under the names simulation codes use (metadata.ALIASES and HEADER_GROUPS:
``Header/Redshift``, ``Header/BoxSize``, ``Header/HubbleParam``, ``Cosmology/h``,
``BOX_LEN``, ``hlittle`` ...). ``inspect`` prints where each value came from.

``quantity`` (--quantity): what the values are, one of :data:`QUANTITIES`:
    ``n_e_physical``     electron density in cm^-3, physical, at the snapshot redshift;
    ``n_e_comoving``     comoving electron density n_e / (1+z)^3 in cm^-3;
    ``overdensity``      electron overdensity n_e / nbar_e, nbar_e by ``mean_density``;
    ``gas_density``      gas mass density in g cm^-3, physical, at the snapshot redshift,
                         n_e = x (1 - Y_p) rho / m_p;
    ``gas_overdensity``  gas overdensity rho / rhobar (= n_H / nbar_H),
                         n_e = x delta n_H0 (1+z)^3;
    ``density_contrast`` gas density contrast delta = rho / rhobar - 1, rhobar the cosmic
                         mean baryon density Omega_b rho_crit (1+z)^3 (for a cosmological
                         box its own mean), n_e = x (1 + delta) n_H0 (1+z)^3;
    x being the ionised fraction (electrons per hydrogen nucleus, n_e / n_H).
``mean_density`` (--mean-density): what an overdensity is relative to: ``history``
    (default) nbar_e(z) = x_e(z) n_H(z) of the run's background history, or
    ``box`` the box's own mean x n_H(z), x from the box's ionised or neutral fraction.
``box_size`` (--box-size) with ``box_size_unit``: the side length. As an attribute the
    unit is one of "cMpc", "cMpc/h", "ckpc", "ckpc/h" (comoving), "pMpc", "pkpc" or
    "Mpc", "kpc" (physical at the snapshot redshift); a length without a unit is an
    error naming --box-size. As an argument it is a string such as "100 Mpc/h" or
    "67.7 Mpc", or an astropy Quantity, and a bare "Mpc" there is comoving unless the
    text says "physical" or "pMpc".
``redshift`` (--redshift): the snapshot redshift.
``hubble_h`` (--hubble-h): the simulation's h, needed when the unit has "/h".
``ionised_fraction`` (--ionised-fraction): electrons per hydrogen nucleus, a constant;
    or ``ionised_fraction_dataset``: the path of a 3-D dataset of it in the same file.
``neutral_fraction`` (--neutral-fraction), ``neutral_fraction_dataset``: instead, the
    neutral hydrogen fraction n_HI / n_H, with ``helium_electrons`` (--helium-electrons,
    0, 1 or 2 electrons per helium atom where hydrogen is ionised); meanings.py.
``provenance``: a JSON string the project's own writers store; shown, never used.

Missing information is an InputError naming the flag that supplies it; nothing is
guessed. Loading warns (one line naming the box) when a box's mean n_e is more
than a factor 10 from the expected cosmic mean, naming the unit slip it looks
like, and when its own ionisation is more than a factor 2 from the history's.
"""

from raytrace.boxes.box import PERCENTILES, Box, sample_cells
from raytrace.boxes.meanings import (
    MAX_IONISED_FRACTION,
    MEAN_DENSITY_REFERENCES,
    QUANTITIES,
    PlausibilityWarning,
    plausibility_warnings,
)
from raytrace.boxes.metadata import ALIASES, HEADER_GROUPS
from raytrace.boxes.reading import load_box
from raytrace.boxes.series import BoxSeries, as_series, load_boxes, load_series

__all__ = [
    "ALIASES", "HEADER_GROUPS", "MAX_IONISED_FRACTION", "MEAN_DENSITY_REFERENCES", "PERCENTILES", "QUANTITIES",
    "PlausibilityWarning",
    "Box", "BoxSeries", "as_series", "load_box", "load_boxes", "load_series", "plausibility_warnings",
    "sample_cells",
]

"""The physics, with no boxes or rays: constants, units, plasma mass, conversion.

In: numbers with units (masses, densities, redshifts, photon energies). Out:
constants (``constants``), parsed quantities (``units``), the plasma mass
(``plasma``), the Landau-Zener crossing and P(epsilon, omega) (``conversion``),
distances and times along a sightline (``cosmology``), the ionisation history
(``ionisation``) and the homogeneous universe's kernel (``background``).
Sources: the project's physics notes, sections 1-3 and 5.
"""

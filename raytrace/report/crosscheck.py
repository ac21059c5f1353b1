"""Do a sightline result and a sky result describe the same run set-up?

In: two results (anything with ``run`` and ``mass_eV``: a SightlineResult and a
SkyResult) and the names the user gave them. Out: one RaytraceWarning line per
difference that makes the two hard to compare: the boxes (by checksum), the
mass grid, the ionisation history or cosmology, the seed, z_max. ``limits`` and
``report`` call it when they are given both.
"""

import warnings

import numpy as np

from raytrace.core.errors import RaytraceWarning


def _checksums(run):
    return [str(box.get("checksum")) for box in run.get("boxes", [])]


def _short(checksum):
    return checksum.replace("sha256:", "")[:12]


def differences(first, second):
    """One line per difference between the set-ups of two results (an empty list when they agree)."""
    a, b = first.run, second.run
    lines = []
    sums_a, sums_b = _checksums(a), _checksums(b)
    if sums_a != sums_b:
        lines.append(f"different boxes: checksums {', '.join(map(_short, sums_a)) or 'none'} against "
                     f"{', '.join(map(_short, sums_b)) or 'none'}")
    mass_a, mass_b = np.asarray(first.mass_eV), np.asarray(second.mass_eV)
    if mass_a.shape != mass_b.shape or not np.allclose(mass_a, mass_b, rtol=1e-9, atol=0):
        lines.append(f"different mass grids: {mass_a.size} masses {mass_a[0]:.4g} to {mass_a[-1]:.4g} eV against "
                     f"{mass_b.size} masses {mass_b[0]:.4g} to {mass_b[-1]:.4g} eV")
    for key, what in (("ionisation", "ionisation histories"), ("cosmology", "cosmologies"), ("seed", "seeds"),
                      ("z_max", "z_max")):
        if a.get(key) != b.get(key):
            lines.append(f"different {what}: {a.get(key)} against {b.get(key)}")
    return lines


def warn_differences(first, second, first_name, second_name):
    """Warn, one line each, where ``first`` and ``second`` come from different set-ups; returns the lines."""
    lines = differences(first, second)
    for line in lines:
        warnings.warn(RaytraceWarning(f"{first_name} and {second_name}: {line}"), stacklevel=2)
    return lines

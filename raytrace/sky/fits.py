"""HEALPix FITS files of a sky's maps (healpy.write_map; Gorski et al. 2005, ApJ 622, 759).

In: a :class:`~raytrace.sky.SkyResult`, the masses whose maps to write, and
optionally epsilon with the observed photon energy (probability maps beside
the kernel's) and the mass a run shows. Out: one FITS file, written
atomically: the maps of the given masses in their order, each header naming
every map's mass (MASS1, MASS2 ...); with a shown mass, that mass's maps come
first in their own extension (HDU 1, what ``healpy.read_map`` returns by
default) and the grid's in HDU 2, so a column's number always means the same
mass of the grid.
"""

import os
import tempfile
from pathlib import Path

import numpy as np

from raytrace import __version__
from raytrace.core.errors import InputError


def _columns(sky, masses_eV, epsilon, omega0_eV):
    """(maps, column names, units, MASS cards) for the maps of ``masses_eV``, in their order."""
    maps, names, units, cards = [], [], [], []
    for i, mass in enumerate(np.atleast_1d(masses_eV)):
        k = sky.mass_index(float(mass))
        cards.append((f"MASS{i + 1}", float(sky.mass_eV[k]), "dark-photon mass of map, eV"))
        maps.append(sky.kernel[:, k])
        names.append(f"KERNEL{i + 1}")
        units.append("eV")
        if epsilon is not None:
            maps.append(sky.probability_map(sky.mass_eV[k], epsilon, omega0_eV))
            names.append(f"PROB{i + 1}")
            units.append("")
    return maps, names, units, cards


def _run_cards(sky, epsilon, omega0_eV, owner, shown_eV):
    """Header cards every map extension carries: the run, its boxes, the owner and the shown mass."""
    from raytrace.core.companions import FITS_KEYWORD

    run = sky.run
    cards = []
    if epsilon is not None:
        cards += [("EPSILON", float(epsilon), "kinetic mixing of PROB maps"),
                  ("OMEGA0", float(omega0_eV), "observed photon energy of PROB maps, eV")]
    cards += [("ZMAX", run["z_max"], "rays reach this redshift"),
              ("ZBOXES", run["z_boxes"], "boxes serve up to this redshift"),
              ("SEED", run["seed"], "random seed of the light cone"),
              ("RAYSPIX", run["rays_per_pixel"], "rays averaged per pixel"),
              ("RTVERS", __version__, "raytrace version"),
              ("SKYFRAME", "box axes", "frame: the boxes' axes, not a celestial frame")]
    if shown_eV is not None:
        shown = float(sky.mass_eV[sky.mass_index(shown_eV)])
        cards.append(("SHOWMASS", shown, "mass the run shows (HDU 1), eV"))
    for i, box in enumerate(run["boxes"]):
        checksum = str(box.get("checksum", "")).replace("sha256:", "")
        cards.append((f"BOXSUM{i + 1}", checksum[:64]))  # 64 hex digits fill the card: no room for a comment
    if owner is not None:
        cards.append((FITS_KEYWORD, str(owner), "result file of the run"))
    return cards


def _write_healpix(sky, target, columns, cards, extension):
    maps, names, units, mass_cards = columns
    # healpy names every map extension 'xtension'; its extra cards replace that. coord=None: no
    # COORDSYS, the map's frame is the box axes (SKYFRAME).
    healpy_cards = mass_cards + cards + [("EXTNAME", extension, "conversion kernel maps of a raytrace sky")]
    import healpy

    healpy.write_map(str(target), maps, nest=sky.ordering == "NESTED", coord=None, column_names=names,
                     column_units=units, extra_header=healpy_cards, overwrite=True, dtype=np.float64)


def write_sky_fits(sky, path, masses_eV, epsilon=None, omega0_eV=None, overwrite=False, owner=None, shown_eV=None):
    """Write the maps of ``masses_eV`` (see the module docstring); returns the path."""
    from astropy.io import fits

    from raytrace.core.provenance import atomic_output

    if epsilon is not None and omega0_eV is None:
        raise InputError("write_fits: give omega0_eV (the observed photon energy) with epsilon")
    cards = _run_cards(sky, epsilon, omega0_eV, owner, shown_eV)
    path = Path(path)
    with atomic_output(path, overwrite=overwrite) as temporary:
        grid = _columns(sky, masses_eV, epsilon, omega0_eV)
        if shown_eV is None:
            _write_healpix(sky, temporary, grid, cards, "RAYTRACE_MAPS")
            return path
        extensions = []
        for columns, name in ((_columns(sky, [shown_eV], epsilon, omega0_eV), "SHOWN_MAP"), (grid, "GRID_MAPS")):
            # Each extension through healpy (its HEALPix header), then both into one file.
            handle, part = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=path.parent)
            os.close(handle)
            try:
                _write_healpix(sky, part, columns, cards, name)
                with fits.open(part) as hdus:
                    extensions.append(fits.BinTableHDU(data=hdus[1].data.copy(), header=hdus[1].header.copy()))
            finally:
                os.unlink(part)
        fits.HDUList([fits.PrimaryHDU(), *extensions]).writeto(temporary, overwrite=True)
    return path

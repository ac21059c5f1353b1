"""HEALPix FITS files of a sky's maps, written a block of pixels at a time (Gorski et al. 2005, ApJ 622, 759).

In: a :class:`~raytrace.sky.SkyResult`, the masses whose maps to write, and
optionally epsilon with the observed photon energy (probability maps beside
the kernel's) and the mass a run shows. Out: one FITS file, written
atomically: the maps of the given masses in their order, each header naming
every map's mass (MASS1, MASS2 ...); with a shown mass, that mass's maps come
first in their own extension (HDU 1, what ``healpy.read_map`` returns by
default) and the grid's in HDU 2, so a column's number always means the same
mass of the grid. Each extension is a binary table in the HEALPix convention
healpy.write_map follows (1024 pixels a row, one below 1025 pixels; PIXTYPE,
ORDERING, NSIDE, FIRSTPIX, LASTPIX, INDXSCHM, OBJECT), streamed: each block of
rows is read from every map (one contiguous piece of each mass's map in the
result file) and written in order, so memory holds a few MB whatever nside and
the number of maps.
"""

from pathlib import Path

import numpy as np

from raytrace import __version__
from raytrace.core.errors import InputError

#: Bytes of table rows written at a time (all columns of a block of pixels).
BLOCK_BYTES = 1 << 25
_FITS_RECORD = 2880  # FITS files come in records of 2880 bytes (FITS standard 4.0, section 3.1)


def _columns(sky, masses_eV, epsilon, omega0_eV):
    """([(name, unit, block(start, stop) -> values)], MASS cards) for the maps of ``masses_eV``, in their order."""
    from raytrace.physics.conversion import probability_from_kernel

    saturate = epsilon is not None and sky.saturates(epsilon, omega0_eV)
    columns, cards = [], []
    for i, mass in enumerate(np.atleast_1d(masses_eV)):
        k = sky.mass_index(float(mass))
        cards.append((f"MASS{i + 1}", float(sky.mass_eV[k]), "dark-photon mass of map, eV"))
        columns.append((f"KERNEL{i + 1}", "eV", lambda a, b, k=k: sky.pixels("kernel", k, a, b)))
        if epsilon is not None:
            columns.append((f"PROB{i + 1}", "", lambda a, b, k=k: probability_from_kernel(
                sky.pixels("kernel", k, a, b), epsilon, omega0_eV, saturate=saturate)))
    return columns, cards


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


def write_sky_fits(sky, path, masses_eV, epsilon=None, omega0_eV=None, overwrite=False, owner=None, shown_eV=None):
    """Write the maps of ``masses_eV`` (see the module docstring); returns the path."""
    from astropy.io import fits

    from raytrace.core.provenance import atomic_output

    if epsilon is not None and omega0_eV is None:
        raise InputError("write_fits: give omega0_eV (the observed photon energy) with epsilon")
    cards = _run_cards(sky, epsilon, omega0_eV, owner, shown_eV)
    extensions = [(masses_eV, "RAYTRACE_MAPS")] if shown_eV is None else [([shown_eV], "SHOWN_MAP"),
                                                                            (masses_eV, "GRID_MAPS")]
    path = Path(path)
    with atomic_output(path, overwrite=overwrite) as temporary, open(temporary, "wb") as out:
        out.write(fits.PrimaryHDU().header.tostring().encode("ascii"))
        for masses, name in extensions:
            columns, mass_cards = _columns(sky, masses, epsilon, omega0_eV)
            _write_table(out, sky, columns, mass_cards + cards, name)
    return path


def _write_table(out, sky, columns, cards, extension):
    """One binary table of ``columns``: its header as healpy.write_map writes it, then its rows streamed."""
    from astropy.io import fits

    per_row = 1024 if sky.npix > 1024 else 1
    form = f"{per_row}D" if per_row > 1 else "D"
    definitions = fits.ColDefs([fits.Column(name=name, format=form, unit=unit or None) for name, unit, _ in columns])
    header = fits.BinTableHDU.from_columns(definitions, nrows=0).header
    header["NAXIS2"] = sky.npix // per_row
    header["PIXTYPE"] = ("HEALPIX", "HEALPIX pixelisation")
    header["ORDERING"] = (sky.ordering, "Pixel ordering scheme, either RING or NESTED")
    header["EXTNAME"] = (extension, "conversion kernel maps of a raytrace sky")  # no COORDSYS: see SKYFRAME
    header["NSIDE"] = (sky.nside, "Resolution parameter of HEALPIX")
    header["FIRSTPIX"] = (0, "First pixel # (0 based)")
    header["LASTPIX"] = (sky.npix - 1, "Last pixel # (0 based)")
    header["INDXSCHM"] = ("IMPLICIT", "Indexing: IMPLICIT or EXPLICIT")
    header["OBJECT"] = ("FULLSKY", "Sky coverage, either FULLSKY or PARTIAL")
    for card in cards:
        header[card[0]] = card[1:]
    out.write(header.tostring().encode("ascii"))
    rows = max(1, BLOCK_BYTES // (8 * per_row * len(columns)))
    written = 0
    for first in range(0, sky.npix, rows * per_row):
        last = min(first + rows * per_row, sky.npix)
        block = np.empty(((last - first) // per_row, len(columns), per_row), dtype=">f8")
        for c, (_, _, values) in enumerate(columns):
            block[:, c, :] = np.asarray(values(first, last), dtype=float).reshape(-1, per_row)
        out.write(block.tobytes())
        written += block.nbytes
    out.write(bytes(-written % _FITS_RECORD))

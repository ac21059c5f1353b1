"""HEALPix FITS maps of a sky, written a block of pixels at a time.

In: a :class:`~raytrace.sky.maps.SkyResult`, the masses whose maps to write,
optionally epsilon and omega_0 (a map of P beside each map of K), and the run's
owner mark. Out: one FITS file in the HEALPix convention that healpy.write_map
follows (Gorski et al. 2005, ApJ 622, 759): an empty primary HDU and a binary
table whose columns are the maps, 1024 pixels per row (one per row below 1025
pixels), float64, with PIXTYPE, ORDERING, NSIDE, FIRSTPIX, LASTPIX, INDXSCHM and
OBJECT, and the run's cards. The table is streamed: each block of rows is read
from every map (one contiguous piece of each mass's map in the result file) and
written in order, so memory holds a few MB whatever nside and the number of maps.
"""

from pathlib import Path

import numpy as np

from raytrace import __version__
from raytrace.core.errors import InputError

#: Bytes of table rows written at a time (all columns of a block of pixels).
BLOCK_BYTES = 1 << 25
_FITS_BLOCK = 2880  # FITS files come in records of 2880 bytes (FITS standard 4.0, section 3.1)


def write_fits(sky, path, masses_eV, epsilon=None, omega0_eV=None, overwrite=False, owner=None):
    """Write the maps of ``sky`` at ``masses_eV`` (and of P with ``epsilon``) to ``path``; returns the path.

    The header carries nside, ordering, units, the frame (SKYFRAME: the box axes,
    no celestial COORDSYS), each map's mass, the run's seed, z range, the input
    checksums, EPSILON and OMEGA0 only with probability maps, and ``owner`` (the
    run's result file, keyword RTRESULT; see :mod:`raytrace.core.companions`).
    """
    from raytrace.core.companions import FITS_KEYWORD
    from raytrace.core.provenance import atomic_output

    if epsilon is not None and omega0_eV is None:
        raise InputError("write_fits: give omega0_eV (the observed photon energy) with epsilon")
    columns, cards = _columns(sky, masses_eV, epsilon, omega0_eV)
    run = sky.run
    cards += [("ZMAX", run["z_max"], "rays reach this redshift"),
              ("ZBOXES", run["z_boxes"], "boxes serve up to this redshift"),
              ("SEED", run["seed"], "random seed of the light cone"),
              ("RAYSPIX", run["rays_per_pixel"], "rays averaged per pixel"),
              ("RTVERS", __version__, "raytrace version"),
              ("SKYFRAME", "box axes", "frame: the boxes' axes, not a celestial frame")]
    for i, box in enumerate(run["boxes"]):
        checksum = str(box.get("checksum", "")).replace("sha256:", "")
        cards.append((f"BOXSUM{i + 1}", checksum[:64]))  # 64 hex digits fill the card: no room for a comment
    if owner is not None:
        cards.append((FITS_KEYWORD, str(owner), "result file of the run"))
    cards.append(("EXTNAME", "RAYTRACE_MAPS", "conversion kernel maps of a raytrace sky"))
    per_row = 1024 if sky.npix > 1024 else 1
    path = Path(path)
    with atomic_output(path, overwrite=overwrite) as temporary:
        with open(temporary, "wb") as out:
            out.write(_primary_header())
            out.write(_table_header(sky, columns, cards, per_row))
            written = _write_rows(out, sky.npix, columns, per_row)
            out.write(bytes(-written % _FITS_BLOCK))
    return path


def _columns(sky, masses_eV, epsilon, omega0_eV):
    """([(name, unit, block(start, stop) -> values)], mass cards): K of each mass, and P after it with epsilon."""
    from raytrace.physics.conversion import probability_from_kernel

    columns, cards = [], []
    for i, mass in enumerate(np.atleast_1d(masses_eV)):
        k = sky.mass_index(float(mass))
        cards.append((f"MASS{i + 1}", float(sky.mass_eV[k]), "dark-photon mass of map, eV"))
        columns.append((f"KERNEL{i + 1}", "eV", lambda a, b, k=k: sky.pixels("kernel", k, a, b)))
        if epsilon is not None:
            columns.append((f"PROB{i + 1}", "", lambda a, b, k=k: probability_from_kernel(
                sky.pixels("kernel", k, a, b), epsilon, omega0_eV)))
    if epsilon is not None:
        cards += [("EPSILON", float(epsilon), "kinetic mixing of PROB maps"),
                  ("OMEGA0", float(omega0_eV), "observed photon energy of PROB maps, eV")]
    return columns, cards


def _primary_header():
    from astropy.io import fits

    return fits.PrimaryHDU().header.tostring().encode("ascii")


def _table_header(sky, columns, cards, per_row):
    """The binary table's header, as healpy.write_map writes it, for npix / per_row rows."""
    from astropy.io import fits

    form = f"{per_row}D" if per_row > 1 else "D"
    definitions = fits.ColDefs([fits.Column(name=name, format=form, unit=unit or None) for name, unit, _ in columns])
    header = fits.BinTableHDU.from_columns(definitions, nrows=0).header
    header["NAXIS2"] = sky.npix // per_row
    header["PIXTYPE"] = ("HEALPIX", "HEALPIX pixelisation")
    header["ORDERING"] = (sky.ordering, "Pixel ordering scheme, either RING or NESTED")
    header["NSIDE"] = (sky.nside, "Resolution parameter of HEALPIX")
    header["FIRSTPIX"] = (0, "First pixel # (0 based)")
    header["LASTPIX"] = (sky.npix - 1, "Last pixel # (0 based)")
    header["INDXSCHM"] = ("IMPLICIT", "Indexing: IMPLICIT or EXPLICIT")
    header["OBJECT"] = ("FULLSKY", "Sky coverage, either FULLSKY or PARTIAL")
    for card in cards:
        header[card[0]] = card[1:]
    return header.tostring().encode("ascii")


def _write_rows(out, npix, columns, per_row):
    """Stream the table's rows: blocks of pixels, every column's piece of each, big-endian float64."""
    rows = max(1, BLOCK_BYTES // (8 * per_row * len(columns)))
    written = 0
    for first in range(0, npix, rows * per_row):
        last = min(first + rows * per_row, npix)
        block = np.empty(((last - first) // per_row, len(columns), per_row), dtype=">f8")
        for c, (_, _, values) in enumerate(columns):
            block[:, c, :] = np.asarray(values(first, last), dtype=float).reshape(-1, per_row)
        out.write(block.tobytes())
        written += block.nbytes
    return written

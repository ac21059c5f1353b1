"""Which run an output file belongs to, so that one run never replaces another's files.

In: the path of a figure or FITS file, and the result file (HDF5) of the run that
wants to write it. Out: the mark to write into the file (FITS keyword RTRESULT,
PNG text chunk, PDF Subject), the owner read back from an existing file, and a
refusal naming every file of another run that a write would replace.

``--overwrite`` replaces a run's own outputs: its result and the files marked
with that result. A file marked with another result belongs to that other run
and is never replaced; a file without a mark (written by something else, or by a
run without a result file) follows the plain ``--overwrite`` rule.
"""

import re
from pathlib import Path

from raytrace.core.errors import InputError

FITS_KEYWORD = "RTRESULT"
PNG_KEY = "raytrace result"
_PDF_PREFIX = "raytrace result: "


def owner_name(result_path):
    """The mark of a run: its result file's absolute path, or None for a run without one."""
    return None if not result_path else str(Path(result_path).resolve())


def figure_metadata(path, owner):
    """savefig metadata carrying ``owner`` for the figure formats that keep it (PNG, PDF)."""
    if owner is None:
        return None
    suffix = Path(path).suffix.lower()
    if suffix == ".png":
        return {PNG_KEY: owner}
    if suffix == ".pdf":
        return {"Subject": _PDF_PREFIX + owner}
    return None


def read_owner(path):
    """The result an existing output file is marked with, or None (no mark, unreadable, or not ours)."""
    path = Path(path)
    suffix = path.suffix.lower()
    try:
        if suffix in (".fits", ".fit", ".fts"):
            from astropy.io import fits

            with fits.open(path) as hdus:
                for hdu in hdus:
                    if FITS_KEYWORD in hdu.header:
                        return str(hdu.header[FITS_KEYWORD])
            return None
        if suffix == ".png":
            from PIL import Image

            with Image.open(path) as image:
                return image.text.get(PNG_KEY)
        if suffix == ".pdf":
            found = re.search(rb"/Subject \(" + re.escape(_PDF_PREFIX.encode()) + rb"((?:[^()\\]|\\.)*)\)",
                              path.read_bytes())
            return None if found is None else re.sub(rb"\\(.)", rb"\1", found.group(1)).decode()
    except Exception:  # a file we cannot parse carries no mark of ours
        return None
    return None


def check_outputs(paths, overwrite, result_path):
    """Refuse, before any work, outputs that exist (without ``overwrite``) or belong to another run.

    ``paths``: (path, flag) pairs, the flag naming the option of each output (a
    path of None or '' is switched off); ``result_path`` is this run's result file
    (None: the run writes none). Each path is checked by
    :func:`raytrace.core.provenance.check_outputs` (writable, no path twice), then for
    another run's mark.
    """
    from raytrace.core.provenance import check_outputs as check_writable_set

    named = [(path, flag) for path, flag in paths if path]
    check_writable_set([path for path, _ in named], overwrite, [flag for _, flag in named])
    owner = owner_name(result_path)
    own_result = Path(result_path).resolve() if result_path else None
    foreign = []
    for path, flag in named:
        if Path(path).exists() and Path(path).resolve() != own_result:
            marked = read_owner(path)
            if marked is not None and marked != owner:
                foreign.append(f"{path} ({flag}, written with {marked})")
    if foreign:
        raise InputError("would replace another run's files, which --overwrite does not cover: "
                         + "; ".join(foreign) + "; choose other names or remove them")

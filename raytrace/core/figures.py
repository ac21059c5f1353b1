"""The plumbing of figures: matplotlib without a display, figure names checked, figures saved safely.

In: a matplotlib figure and a path. Out: the file, written atomically and marked
with the run that owns it (:mod:`raytrace.core.companions`).
"""

from pathlib import Path

from raytrace.core.companions import figure_metadata
from raytrace.core.errors import InputError
from raytrace.core.provenance import atomic_output


def pyplot():
    """matplotlib.pyplot, on the Agg backend unless an interactive or file backend is already chosen."""
    import matplotlib

    if matplotlib.get_backend().lower() not in ("agg", "pdf", "svg") and not matplotlib.is_interactive():
        matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    return plt


def check_figure_path(path, what="--plot"):
    """Refuse, before any work, a figure name whose format matplotlib cannot write."""
    suffix = Path(path).suffix.lstrip(".").lower()
    formats = pyplot().figure().canvas.get_supported_filetypes()
    pyplot().close("all")
    if suffix not in formats:
        raise InputError(f"{what}: {path}: expected a figure file ending in one of "
                         f"{', '.join('.' + f for f in sorted(formats))}")
    return path


def save_figure(figure, path, overwrite=False, owner=None):
    """Save a figure atomically (the format from the file's suffix), marked with the run's result ``owner``
    (see :mod:`raytrace.core.companions`)."""
    path = Path(path)
    with atomic_output(path, overwrite=overwrite) as temporary:
        figure.savefig(temporary, format=path.suffix.lstrip(".") or "png", dpi=150, bbox_inches="tight",
                       metadata=figure_metadata(path, owner))
    return path


def mollview(*arguments, **keywords):
    """healpy.mollview, without the PendingDeprecationWarning healpy's own colour-map calls raise in
    matplotlib (healpy's to change, not the user's: a warning nobody can act on)."""
    import warnings

    import healpy

    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", category=PendingDeprecationWarning, module=r"healpy\.")
        return healpy.mollview(*arguments, **keywords)

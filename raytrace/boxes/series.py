"""Series of boxes at several snapshot redshifts: :class:`BoxSeries`, :func:`load_series`.

In: boxes, or file paths and globs with the :func:`load_box` arguments (one value
for every box, or a list with one per box). Out: a BoxSeries sorted by redshift
that says which box serves a ray sample at redshift z.
"""

import glob
import math
import os
from pathlib import Path

import numpy as np

from raytrace.boxes.box import Box
from raytrace.boxes.metadata import carries_redshift
from raytrace.boxes.reading import _candidates, _open, load_box
from raytrace.boxes.values import _number, _supply
from raytrace.core.errors import InputError, require_path

_GLOB_CHARACTERS = "*?["


# -- several boxes -----------------------------------------------------------------------------
def _label(box):
    if box.path is None:
        return f"in-memory box at z = {box.redshift:g}"
    return f"{box.path}:{box.dataset} (z = {box.redshift:g})"


class BoxSeries:
    """Boxes at several snapshot redshifts, sorted by redshift (immutable).

    Without blending the box nearest in redshift serves a sample (boundaries
    half-way between snapshot redshifts). With ``blend=True`` a sample between two
    snapshots is served by both, n_e blended linearly with a weight linear in z; that
    needs every neighbouring pair to share a grid (same N and box size). Boxes of
    different sizes and resolutions are fine without blending.
    """

    __slots__ = ("boxes", "redshifts", "blend")

    def __init__(self, boxes, blend=False):
        if isinstance(boxes, Box):
            boxes = [boxes]
        try:
            boxes = tuple(boxes)
        except TypeError:
            raise InputError(f"boxes: expected a list of Box objects, got {type(boxes).__name__}") from None
        if not boxes:
            raise InputError("boxes: expected at least one box, got none")
        for box in boxes:
            if not isinstance(box, Box):
                raise InputError(f"boxes: expected Box objects, got a {type(box).__name__}")
        boxes = tuple(sorted(boxes, key=lambda box: box.redshift))
        for lower, upper in zip(boxes[:-1], boxes[1:]):
            if lower.redshift == upper.redshift:
                raise InputError(
                    f"boxes: two boxes at the same redshift: {_label(lower)} and {_label(upper)}; "
                    "a series needs one box per snapshot redshift (give one per file, in the files' order: "
                    "--redshift Z1,Z2,... or redshift = [Z1, Z2, ...] in [boxes])"
                )
            if blend and not (
                lower.n_cells == upper.n_cells
                and math.isclose(lower.box_size_cMpc, upper.box_size_cMpc, rel_tol=1e-9)
            ):
                raise InputError(
                    f"--blend (blend=True): {_label(lower)} ({lower.n_cells}^3, {lower.box_size_cMpc:.6g} cMpc) "
                    f"and {_label(upper)} ({upper.n_cells}^3, {upper.box_size_cMpc:.6g} cMpc) do not share "
                    "a grid; blending needs the same N and box size"
                )
        redshifts = np.array([box.redshift for box in boxes])
        redshifts.flags.writeable = False
        object.__setattr__(self, "boxes", boxes)
        object.__setattr__(self, "redshifts", redshifts)
        object.__setattr__(self, "blend", bool(blend))

    def __setattr__(self, name, value):
        raise AttributeError("BoxSeries objects are immutable")

    def __reduce__(self):
        return (BoxSeries, (self.boxes, self.blend))

    def __repr__(self):
        zs = ", ".join(f"{z:g}" for z in self.redshifts)
        return f"BoxSeries({len(self.boxes)} boxes at z = {zs}{', blended' if self.blend else ''})"

    def __len__(self):
        return len(self.boxes)

    def __iter__(self):
        return iter(self.boxes)

    def __getitem__(self, index):
        return self.boxes[index]

    @property
    def z_min(self):
        """Lowest snapshot redshift."""
        return float(self.redshifts[0])

    @property
    def z_max(self):
        """Highest snapshot redshift."""
        return float(self.redshifts[-1])

    @property
    def checksums(self):
        """Checksums of the boxes, in redshift order."""
        return tuple(box.checksum for box in self.boxes)

    def serving(self, z):
        """Which boxes serve samples at redshifts ``z``: ``(index_low, index_high, weight_high)``.

        Without blending: the nearest snapshot (index_low == index_high, weight 0; at
        a midpoint the higher one). With blending: the bracketing pair, weight
        (z - z_low) / (z_high - z_low); below the first and above the last
        snapshot the end box alone.
        """
        z = np.asarray(z, dtype=float)
        if np.any(~np.isfinite(z)) or np.any(z < 0):
            raise InputError("z: expected finite redshifts >= 0")
        zs = self.redshifts
        if not self.blend or zs.size == 1:
            index = np.searchsorted(0.5 * (zs[1:] + zs[:-1]), z, side="right").astype(np.int64)
            return index, index.copy(), np.zeros(z.shape)
        high = np.clip(np.searchsorted(zs, z, side="right"), 1, zs.size - 1).astype(np.int64)
        low = high - 1
        weight = np.clip((z - zs[low]) / (zs[high] - zs[low]), 0.0, 1.0)
        return low, high, weight

    def intervals(self, z_stop):
        """``[(z_start, z_end, index), ...]`` covering [0, z_stop], one box per piece.

        Nearest snapshot in redshift, boundaries half-way between snapshot redshifts
        (also when blending: the pieces then say whose grid the ray uses).
        """
        z_stop = _number(z_stop, "z_stop")
        if not (math.isfinite(z_stop) and z_stop > 0):
            raise InputError(f"z_max: expected a positive redshift, got {z_stop!r}")
        middles = 0.5 * (self.redshifts[1:] + self.redshifts[:-1])
        lower = np.concatenate(([0.0], middles))
        upper = np.concatenate((middles, [np.inf]))
        pieces = []
        for index, (start, end) in enumerate(zip(lower, upper)):
            start, end = max(float(start), 0.0), min(float(end), z_stop)
            if end > start:
                pieces.append((start, end, index))
        return pieces

    def describe(self, z_stop=None):
        """Plain values: the boxes, their redshifts and which box serves where up to ``z_stop``
        (default: the highest snapshot redshift, or 1 for a single box at z = 0)."""
        if z_stop is None:
            z_stop = self.z_max if self.z_max > 0 else 1.0
        return {
            "n_boxes": len(self.boxes),
            "redshifts": [float(z) for z in self.redshifts],
            "blend": self.blend,
            "serving": [
                {"z_start": a, "z_end": b, "box": i} for a, b, i in self.intervals(z_stop)
            ],
            "boxes": [box.describe() for box in self.boxes],
        }


def as_series(boxes):
    """A BoxSeries from a BoxSeries, a Box, or a list or tuple of boxes."""
    if isinstance(boxes, BoxSeries):
        return boxes
    if isinstance(boxes, (Box, list, tuple)):
        return BoxSeries(boxes)
    raise InputError(f"boxes: expected a BoxSeries, a Box or a list of boxes, got {type(boxes).__name__}")


def _expand_paths(paths):
    """Files from one path, a glob, or a list of either (globs sorted by name)."""
    if isinstance(paths, (str, os.PathLike)):
        paths = [paths]
    if not isinstance(paths, (list, tuple)):
        raise InputError(f"paths (--boxes): expected a file path, a glob or a list of them, got {paths!r}")
    files = []
    for item in paths:
        text = str(require_path(item, "paths (--boxes)"))
        if any(c in text for c in _GLOB_CHARACTERS) and not Path(text).exists():
            matched = sorted(glob.glob(text))
            if not matched:
                raise InputError(f"{text}: the pattern matches no file")
            files.extend(Path(m) for m in matched)
        else:
            files.append(Path(text))
    if not files:
        raise InputError("paths: expected at least one box file, got none")
    return files


def _snapshot_datasets(path, fractions):
    """Of a file with several 3-D datasets, those that carry their own redshift attribute
    (one snapshot each; fraction datasets left out), else [None] so that load_box
    chooses or explains."""
    with _open(path) as handle:
        _, candidates = _candidates(handle, fractions)
        carrying = [name for name, node in candidates if carries_redshift(node)]
        if len(candidates) > 1 and carrying:
            return carrying
    return [None]


def load_boxes(paths, dataset=None, **load_box_arguments):
    """The boxes of several files or datasets, in the order given (see :func:`load_series`)."""
    files = _expand_paths(paths)
    sources = []
    for path in files:
        if dataset is None:
            fractions = [load_box_arguments.get(key) for key in ("ionised_fraction", "neutral_fraction")]
            names = _snapshot_datasets(path, [f for v in fractions for f in (v if isinstance(v, (list, tuple)) else [v])])
        elif isinstance(dataset, str):
            names = [dataset]
        else:
            names = list(dataset)
        sources.extend((path, name) for name in names)
    per_box = []
    for index in range(len(sources)):
        arguments = {}
        for key, value in load_box_arguments.items():
            if isinstance(value, (list, tuple)):
                if len(value) not in (1, len(sources)):
                    raise InputError(
                        f"{_supply(key)}: {len(value)} values for {len(sources)} boxes; give one for all "
                        "or one per box"
                    )
                value = value[0] if len(value) == 1 else value[index]
            arguments[key] = value
        per_box.append(arguments)
    return [load_box(path, name, **arguments) for (path, name), arguments in zip(sources, per_box)]


def load_series(paths, dataset=None, blend=False, **load_box_arguments):
    """A :class:`BoxSeries` from a list of files, a glob string, or one file with several datasets.

    One file with several 3-D datasets that each carry a 'redshift' attribute gives
    one box per dataset; ``dataset`` may name one dataset or a list of them (looked
    up in every file). Any other :func:`load_box` argument given as a list or tuple
    is distributed one per box, in the order of the files (globs sorted by name)
    and datasets.
    """
    return BoxSeries(load_boxes(paths, dataset, **load_box_arguments), blend=blend)

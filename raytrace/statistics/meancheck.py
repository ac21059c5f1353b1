"""The built-in check of every ray run: its Monte Carlo mean against the one-point-PDF mean.

In: the series a run casts through and its run record (before tracing), then
its result. Out: the result file's group ``pdf_mean`` (:func:`check_groups`: a
:class:`~raytrace.statistics.onepoint.PdfMean` over the same redshifts, made
with the file, so a finished file never changes but for its completion flag),
the result's ``pdf_check`` read back from it, :func:`mean_check` comparing the two per mass
(ratio, Monte Carlo standard error, their difference in standard errors), and
a :class:`MeanCheckWarning` names the masses where they differ by more than
3 standard errors (for a sky, the Student-t equivalent for its 11 degrees of
freedom, about 4): a sign of too few rays, or of a defect.

The Monte Carlo standard error of a sightline run is std/sqrt(n_rays) (the rays
are independent). The pixels of one sky are not: they share the structures of
one light cone, so a sky's error is that of the mean of the 12 base HEALPix
pixels (batch means over the 12 independent-looking faces; still an
underestimate where structures span faces, as they do at low redshift),
computed one map at a time. Measured over 64 skies each, the pulls of this check have a standard deviation
of 1.4-2.5 for a light cone 2.5 box lengths deep at nside 16 (tests/test_sky.py)
and 1.0-1.9 for the demo series to z = 6 at nside 8 (largest at the lowest
masses), not the 1.1 of 11 degrees of freedom: a sky may be flagged without a
defect, while the mean over independent skies agrees with the one-point mean.
"""

import json
import warnings
from dataclasses import dataclass

import numpy as np

from raytrace.boxes import as_series
from raytrace.core.errors import RaytraceWarning
from raytrace.statistics.onepoint import PDF_MEAN_DATASETS, PdfMean, pdf_mean

THRESHOLD = 3.0


class MeanCheckWarning(RaytraceWarning):
    """The Monte Carlo mean and the one-point-PDF mean differ by more than 3 standard errors."""


@dataclass(frozen=True)
class MeanCheck:
    """Per mass: the Monte Carlo mean and its standard error, the PDF mean and its error (eV)."""

    mass_eV: np.ndarray
    mc_mean: np.ndarray
    mc_error: np.ndarray
    pdf_mean: np.ndarray
    pdf_error: np.ndarray
    error_kind: str
    #: Degrees of freedom of the MC error (None: many, normal); 11 for a sky's 12 faces.
    dof: int = None
    #: What each entry is, in messages (default: its mass); the per-bin check names mass and bin.
    labels: tuple = None
    #: The |pull| (for a normal error) beyond which an entry is flagged.
    threshold: float = THRESHOLD

    def limit(self, threshold=None):
        """The |pull| beyond which a mass is flagged: ``threshold`` for a normal error; for an error from
        few batches, the Student-t value with the same two-sided tail probability (scipy.stats)."""
        threshold = self.threshold if threshold is None else threshold
        if self.dof is None:
            return float(threshold)
        from scipy import stats

        return float(stats.t.isf(stats.norm.sf(threshold), self.dof))

    def ratio(self):
        """Monte Carlo mean / PDF mean (nan where the PDF mean is 0)."""
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(self.pdf_mean > 0, self.mc_mean / self.pdf_mean, np.nan)

    def relative_error(self):
        """The Monte Carlo standard error over the PDF mean (the ratio's 1-sigma from the rays)."""
        with np.errstate(invalid="ignore", divide="ignore"):
            return np.where(self.pdf_mean > 0, self.mc_error / self.pdf_mean, np.nan)

    def pull(self):
        """(MC - PDF) / sqrt(MC error^2 + PDF error^2); 0 where both means are 0."""
        scale = np.hypot(self.mc_error, self.pdf_error)
        difference = self.mc_mean - self.pdf_mean
        with np.errstate(invalid="ignore", divide="ignore"):
            pull = np.where(scale > 0, difference / np.where(scale > 0, scale, 1.0), np.where(difference == 0, 0.0, np.inf))
        return pull

    def discrepant(self, threshold=None):
        """Indices of the masses where |pull| > threshold."""
        return np.flatnonzero(np.abs(self.pull()) > self.limit(threshold))

    def message(self, threshold=None):
        """One line naming the discrepant masses, or None when there are none."""
        bad = self.discrepant(threshold)
        if bad.size == 0:
            return None
        names = self.labels if self.labels is not None else [f"{m:.3g} eV" for m in self.mass_eV]
        shown = ", ".join(f"{names[k]} ({self.pull()[k]:+.1f})" for k in bad[:8])
        more = f" and {bad.size - 8} more" if bad.size > 8 else ""
        limit = self.limit(threshold)
        cause = ("too few rays, or a defect" if self.dof is None else
                 "a sky is one observer's light cone, a finite and correlated sample whose mean can differ from "
                 "the volume's by more than its 12-face error shows; or a defect")
        what = "masses" if self.labels is None else "masses and redshift bins"
        return (f"the Monte Carlo mean differs from the one-point-PDF mean by more than {limit:.3g} standard "
                f"errors at {bad.size} of {self.mass_eV.size} {what}: {shown}{more} (in standard errors); {cause}")

    def table(self, rows=None):
        """Text lines: mass, PDF mean, MC/PDF ratio, MC standard error / PDF, pull."""
        rows = range(self.mass_eV.size) if rows is None else rows
        ratio, relative, pull = self.ratio(), self.relative_error(), self.pull()
        lines = [f"  {'m [eV]':>11} {'<K> PDF':>11} {'MC/PDF':>8} {'MC sem':>8} {'pull':>6}"]
        for k in rows:
            lines.append(f"  {self.mass_eV[k]:11.4g} {self.pdf_mean[k]:11.4g} {_finite(ratio[k], '8.4f')} "
                         f"{_finite(relative[k], '8.4f')} {_finite(pull[k], '+6.1f')}")
        return lines


def _finite(value, spec):
    width = int(spec.lstrip("+").split(".")[0])
    return f"{value:{spec}}" if np.isfinite(value) else f"{'-':>{width}}"


def monte_carlo_error(result):
    """(standard error of the mean kernel per mass, what it is) for a sightline or sky result."""
    if hasattr(result, "face_means"):
        means = result.face_means()
        return means.std(axis=0, ddof=1) / np.sqrt(12), "batch means over the 12 base HEALPix pixels"
    kernel = result.kernel
    if kernel.shape[0] < 2:
        return np.full(kernel.shape[1], np.nan), "one ray: no standard error"
    return kernel.std(axis=0, ddof=1) / np.sqrt(kernel.shape[0]), "std / sqrt(rays)"


#: Points of a sky's check: a sky's error is that of its 12 faces (0.4-3 % of the mean on the demo
#: series, nside 16 to z = 3), which the PDF mean's at 2^22 points (0.05-0.1 %) hardly widens, at a
#: quarter of the cost of 2^24 (a sightline run's error falls with its rays: it gets up to 2^24).
SKY_CHECK_POINTS = 1 << 22


def check_points(series, most=1 << 24):
    """Points for a run's check: 64 per cell of the largest box, from 2^20 to ``most``."""
    cells = max(box.n_cells for box in series.boxes) ** 3
    return int(np.clip(64 * cells, 1 << 20, most))


def check_groups(series, plasma=None, n_jobs=1, most_points=1 << 24):
    """The result file's groups as a function of the run record (what
    :class:`~raytrace.tracing.backends.Contents` takes): ``pdf_mean``, the one-point-PDF mean of
    ``series`` over the run's redshifts at :func:`check_points` points (at most ``most_points``)."""
    series = as_series(series)
    points = check_points(series, most_points)

    def groups(run):
        # The bins of a sightline run, or the shells of a sky: the check covers each of them as well.
        edges = run.get("redshift_bin_edges") or run.get("shell_edges_z")
        pdf = pdf_mean(series, np.asarray(run["mass_eV"], dtype=float), run["z_max"],
                       include_background=run["include_background"],
                       z_boxes=run["z_boxes"] if run["include_background"] else None, plasma=plasma,
                       points=points, seed=run["seed"], n_jobs=n_jobs,
                       redshift_bins=None if edges is None else np.asarray(edges))
        return {"pdf_mean": pdf_check_group(pdf)}

    return groups


def warn_on_mismatch(result):
    """Warn (:class:`MeanCheckWarning`, naming the masses) where ``result`` differs from its check, per
    mass and per redshift bin; returns it."""
    for check in (mean_check(result), binned_mean_check(result)):
        message = None if check is None else check.message()
        if message:
            warnings.warn(MeanCheckWarning(message), stacklevel=3)
    return result


#: Fewest rows (rays, or pixels of a sky) with a kernel in a bin for the bin's mean to be checked: a
#: standard error from fewer hits is itself too uncertain (none at all from no hit) to judge a difference by.
MIN_HITS = 20


def bin_means(result):
    """(edges in z, MC mean per bin and mass, its standard error, what that error is, rows with a kernel
    there) of a result with redshift bins (a sightline run's bins, a sky's shells), or None."""
    bins = getattr(result, "redshift_bins", None)
    if bins is not None:
        return bins.edges_z, bins.bin_mean, bins.standard_error("bin"), "std / sqrt(rays)", bins.bin_hits
    shells = getattr(result, "kernel_shells", None)
    if shells is None:
        return None
    face = result.faces()
    means = np.array([shells[face == f].mean(axis=0) for f in range(12)])
    return (result.shell_edges_z, shells.mean(axis=0), means.std(axis=0, ddof=1) / np.sqrt(12),
            "batch means over the 12 base HEALPix pixels", (shells > 0).sum(axis=0))


def binned_mean_check(result):
    """The :class:`MeanCheck` per redshift bin and mass of a result with bins and a ``pdf_check`` over the
    same bins (None otherwise), over the bins with at least :data:`MIN_HITS` rows with a kernel there.
    Its threshold keeps the per-mass check's expected number of false flags: a two-sided tail of
    0.27 % / (number of bins) per entry (about 3.8 sigma for 17 bins)."""
    from scipy import stats

    pdf, means = getattr(result, "pdf_check", None), bin_means(result)
    if pdf is None or means is None or pdf.bins_boxes is None:
        return None
    edges, mc_mean, mc_error, kind, hits = means
    bin_index, mass_index = np.nonzero(hits >= MIN_HITS)
    labels = tuple(f"{result.mass_eV[k]:.3g} eV at z {edges[b]:.3g}-{edges[b + 1]:.3g}"
                   for b, k in zip(bin_index, mass_index))
    threshold = float(stats.norm.isf(stats.norm.sf(THRESHOLD) / mc_mean.shape[0]))
    return MeanCheck(result.mass_eV[mass_index], mc_mean[bin_index, mass_index], mc_error[bin_index, mass_index],
                     pdf.bins[bin_index, mass_index], pdf.bins_error[bin_index, mass_index], kind,
                     11 if hasattr(result, "nside") else None, labels, threshold)


def mean_check(result):
    """The :class:`MeanCheck` of a result that carries ``pdf_check`` (None otherwise)."""
    pdf = getattr(result, "pdf_check", None)
    if pdf is None:
        return None
    error, kind = monte_carlo_error(result)
    return MeanCheck(result.mass_eV, result.mean(), error, pdf.kernel, pdf.error, kind,
                     11 if hasattr(result, "nside") else None)


def pdf_check_group(pdf):
    """A PdfMean as the (datasets, attributes) of a result file's group ``pdf_mean``."""
    datasets = {}
    for name, (unit, description) in PDF_MEAN_DATASETS.items():
        values = getattr(pdf, name)
        if values is None:
            continue
        if not np.all(np.isfinite(values)):
            raise ValueError(f"pdf_mean/{name} would hold NaN or inf")  # a bug: pdf_mean gives finite values
        datasets[name] = (values, unit, description)
    return datasets, {"run": json.dumps(pdf.run, sort_keys=True, default=str)}


def read_pdf_check(group, mass_eV):
    """The PdfMean of a group read back, checked, from a result file (``(datasets, attributes)`` of
    :func:`raytrace.core.resultfiles.read_group`), or None without one."""
    if group is None:
        return None
    datasets, attributes = group
    return PdfMean(mass_eV, run=attributes["run"],
                   **{name: datasets[name] for name in PdfMean.ARRAYS if name in datasets})

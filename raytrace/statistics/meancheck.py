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
computed one map at a time.
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

    def limit(self, threshold=THRESHOLD):
        """The |pull| beyond which a mass is flagged: ``threshold`` for a normal error; for an error from
        few batches, the Student-t value with the same two-sided tail probability (scipy.stats)."""
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

    def discrepant(self, threshold=THRESHOLD):
        """Indices of the masses where |pull| > threshold."""
        return np.flatnonzero(np.abs(self.pull()) > self.limit(threshold))

    def message(self, threshold=THRESHOLD):
        """One line naming the discrepant masses, or None when there are none."""
        bad = self.discrepant(threshold)
        if bad.size == 0:
            return None
        shown = ", ".join(f"{self.mass_eV[k]:.3g} eV ({self.pull()[k]:+.1f})" for k in bad[:8])
        more = f" and {bad.size - 8} more" if bad.size > 8 else ""
        limit = self.limit(threshold)
        cause = ("too few rays, or a defect" if self.dof is None else
                 "a sky is one observer's light cone, a finite and correlated sample whose mean can differ from "
                 "the volume's by more than its 12-face error shows; or a defect")
        return (f"the Monte Carlo mean differs from the one-point-PDF mean by more than {limit:.3g} standard "
                f"errors at {bad.size} of {self.mass_eV.size} masses: {shown}{more} (in standard errors); {cause}")

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
        pdf = pdf_mean(series, np.asarray(run["mass_eV"], dtype=float), run["z_max"],
                       include_background=run["include_background"],
                       z_boxes=run["z_boxes"] if run["include_background"] else None, plasma=plasma,
                       points=points, seed=run["seed"], n_jobs=n_jobs)
        return {"pdf_mean": pdf_check_group(pdf)}

    return groups


def warn_on_mismatch(result):
    """Warn (:class:`MeanCheckWarning`, naming the masses) where ``result`` differs from its check; returns it."""
    check = mean_check(result)
    message = check.message() if check is not None else None
    if message:
        warnings.warn(MeanCheckWarning(message), stacklevel=3)
    return result


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
        if not np.all(np.isfinite(values)):
            raise ValueError(f"pdf_mean/{name} would hold NaN or inf")  # a bug: pdf_mean gives finite values
        datasets[name] = (values, unit, description)
    return datasets, {"run": json.dumps(pdf.run, sort_keys=True, default=str)}


def read_pdf_check(group, mass_eV):
    """The PdfMean of a group read back from a result file (``(datasets, attributes)``), or None without one."""
    if group is None:
        return None
    datasets, attributes = group
    return PdfMean(mass_eV, datasets["kernel_boxes"], datasets["kernel_background"], datasets["error"],
                   json.loads(attributes["run"]))

"""Upper limits on the kinetic mixing epsilon from the measured CMB spectrum (PHYSICS.md section 6).

In: dark-photon masses (eV), a conversion kernel K(m) per mass (eV; the mean
over sightlines, a sightline quantile, or the homogeneous background) and a
measured spectrum (:mod:`raytrace.limits.spectrum`; default the FIRAS monopole of
Fixsen et al. 1996). Out: immutable :class:`SpectralLimit` curves epsilon_max(m)
with the fit behind them, gathered by :func:`sightline_limits` in a
:class:`~raytrace.limits.limitset.LimitSet` (lines plus bands). From a sky result
(:mod:`raytrace.sky.maps`), :mod:`raytrace.limits.anisotropy` gives the limits of
its anisotropy against the measured CMB spectrum, curves of the same kind. Tables
and plots of the curves are :mod:`raytrace.limits.limitset`'s.
"""

import os
import warnings
from dataclasses import dataclass

import numpy as np
from scipy import stats

from raytrace.core.errors import InputError, float_array, require_number, require_positive_finite
from raytrace.limits.limitset import LimitBand, LimitSet
from raytrace.limits.spectrum import planck_dT_MJy_sr, planck_MJy_sr, read_spectrum
from raytrace.physics.units import CMB_TEMPERATURE_K

_TEMPERATURE_TOLERANCE = 1e-12  # relative step in T at which the blackbody fit has converged
_MAX_ITERATIONS = 50
_POOR_FIT_PROBABILITY = 1e-6  # chi^2 of the blackbody fit this unlikely means the model or the units are wrong

BOUNDARY_METHOD = (
    "one-sided profile chi^2 with the physical boundary s >= 0: s_max solves "
    "chi^2(s_max) - min_{s>=0} chi^2 = Delta chi^2"
)


class UnconstrainedMassWarning(UserWarning):
    """Some masses have K = 0 (no resonance): the spectrum does not constrain epsilon there."""


class PoorFitWarning(UserWarning):
    """The blackbody fit of the spectrum is too poor for its errors to mean anything."""


def as_spectrum(spectrum):
    """A Spectrum from a Spectrum, a table's path, or None (the shipped FIRAS table)."""
    from raytrace.limits.spectrum import Spectrum

    if spectrum is None or isinstance(spectrum, (str, os.PathLike)):
        return read_spectrum(spectrum)
    if not isinstance(spectrum, Spectrum):
        raise InputError(f"spectrum: expected a Spectrum, a table's path or None, got {spectrum!r}")
    return spectrum


def delta_chi2(confidence):
    """Delta chi^2 of a one-sided upper limit at ``confidence``: chi2.ppf(2 CL - 1, 1) = Phi^-1(CL)^2.

    2.71 at 95 %, 5.41 at 99 %.
    """
    confidence = require_number(confidence, "confidence", expected="a value between 0.5 and 1 (e.g. 0.95)")
    if not 0.5 < confidence < 1.0:
        raise InputError(f"confidence: expected a value between 0.5 and 1 (e.g. 0.95), got {confidence!r}")
    return float(stats.chi2.ppf(2.0 * confidence - 1.0, df=1))


@dataclass(frozen=True, eq=False)
class SpectralLimit:
    """epsilon_max(m) from one kernel curve and one spectrum, with the fit it came from.

    Per mass: ``kernel_eV``, ``epsilon_max``, ``s_hat`` (best-fit s = epsilon^2,
    may be negative) and ``s_sigma`` (its 1-sigma error); NaN / inf where K = 0.
    The temperature, Galaxy amplitude, ``chi2`` and ``dof`` are those of the
    no-distortion fit around which the blackbody was linearised.
    """

    name: str
    label: str
    mass_eV: np.ndarray
    kernel_eV: np.ndarray
    epsilon_max: np.ndarray
    s_hat: np.ndarray
    s_sigma: np.ndarray
    temperature_K: float
    temperature_sigma_K: float
    galaxy_amplitude: float | None
    galaxy_amplitude_sigma: float | None
    chi2: float
    dof: int
    confidence: float
    delta_chi2: float
    spectrum_source: str
    method: str = BOUNDARY_METHOD

    def __post_init__(self):
        for field in ("mass_eV", "kernel_eV", "epsilon_max", "s_hat", "s_sigma"):
            array = np.array(getattr(self, field), dtype=float)
            array.setflags(write=False)
            object.__setattr__(self, field, array)

    def __repr__(self):
        return (
            f"SpectralLimit({self.name!r}, {self.mass_eV.size} masses, CL {self.confidence:g}, "
            f"T = {self.temperature_K:.6f} K, chi2/dof = {self.chi2:.1f}/{self.dof})"
        )

    def columns(self):
        """Per-mass arrays for a table."""
        return {"kernel_eV": self.kernel_eV, "epsilon_max": self.epsilon_max,
                "s_hat": self.s_hat, "s_sigma": self.s_sigma}

    def unconstrained(self):
        """Per mass: why epsilon is not constrained there ('' where it is)."""
        return np.where(self.kernel_eV > 0, "", "no resonance at this mass (K = 0)")

    def metadata(self):
        """Scalars describing the fit, for a table's header."""
        return {
            "label": self.label, "kind": "CMB spectral distortion",
            "temperature_K": self.temperature_K, "temperature_sigma_K": self.temperature_sigma_K,
            "galaxy_amplitude": self.galaxy_amplitude, "galaxy_amplitude_sigma": self.galaxy_amplitude_sigma,
            "chi2": self.chi2, "dof": self.dof, "confidence": self.confidence,
            "delta_chi2": self.delta_chi2, "spectrum": self.spectrum_source, "method": self.method,
        }


def spectral_limit(mass_eV, kernel_eV, spectrum=None, confidence=0.95, fit_galaxy=False,
                   name="spectral", label="CMB spectrum"):
    """One-sided upper limit epsilon_max(m) from the spectrum's agreement with a blackbody.

    Model: I(nu) = B_nu(T) (1 - s K(m) / (h nu)) [+ g G(nu)], s = epsilon^2,
    G the spectrum's Galaxy template (``fit_galaxy=True``). T (and g) are free.
    B is linearised around the best fit without distortion, T0, so the model is
    linear in (dT, [g], s); with the diagonal errors of the table the weighted
    (generalised) least-squares solution gives s_hat and its error sigma_s in
    closed form. K does not depend on frequency (PHYSICS.md section 2), so the
    distortion template of every mass is K(m) times one shape -B_nu(T0)/(h nu):
    the fit is solved once for that shape, q = s K, and s_hat = q_hat / K,
    sigma_s = sigma_q / K for all masses at once. Hence epsilon_max is exactly
    proportional to 1/sqrt(K).

    Limit (the physical boundary s >= 0 handled by the profile chi^2, whose
    minimum is taken over s >= 0): chi^2(s) is the parabola
    chi^2_min + ((s - s_hat)/sigma_s)^2, and s_max solves
    chi^2(s_max) - chi^2(max(s_hat, 0)) = Delta chi^2, i.e.

    * s_hat >= 0: s_max = s_hat + sqrt(Delta chi^2) sigma_s (2.71 -> 1.645 sigma at 95 %);
    * s_hat < 0 (Delta chi^2 measured from s = 0): s_max = s_hat + sqrt(s_hat^2 + Delta chi^2 sigma_s^2).

    For a Gaussian s_hat this limit covers the true s >= 0 with probability
    >= ``confidence`` (exactly for s_true >= sqrt(Delta chi^2) sigma_s, more
    below), but a downward fluctuation makes it tighter than the sensitivity
    sqrt(Delta chi^2) sigma_s; ``s_hat`` and ``s_sigma`` are returned so another
    prescription can be applied. Delta chi^2 = chi2.ppf(2 CL - 1, 1)
    (:func:`delta_chi2`). epsilon_max = sqrt(s_max); masses with K = 0 get
    epsilon_max = inf and an :class:`UnconstrainedMassWarning` naming their range.
    A best fit (distortion free) with chi^2 probability below 1e-6 gives a :class:`PoorFitWarning`.
    """
    mass = require_positive_finite(np.atleast_1d(mass_eV), "mass_eV")
    kernel = _kernel_array(kernel_eV, mass, name)
    threshold = delta_chi2(confidence)
    spectrum = as_spectrum(spectrum)
    fit = _distortion_fit(spectrum, fit_galaxy)
    # The limit assumes the model fits; judge it with the distortion free (a real one must not warn).
    best_chi2 = fit["chi2"] - (fit["q_hat"] / fit["q_sigma"]) ** 2
    if stats.chi2.sf(best_chi2, fit["dof"] - 1) < _POOR_FIT_PROBABILITY:
        warnings.warn(
            f"spectrum {spectrum.source}: the model fits poorly (chi^2 = {best_chi2:.4g} for {fit['dof'] - 1} dof "
            "with T and the distortion free); check the units and the sigmas: the limit assumes the model fits",
            PoorFitWarning, stacklevel=2,
        )
    constrained = kernel > 0
    with np.errstate(divide="ignore", invalid="ignore"):
        s_hat = np.where(constrained, fit["q_hat"] / kernel, np.nan)
        s_sigma = np.where(constrained, fit["q_sigma"] / kernel, np.inf)
        s_max = upper_limit(s_hat, s_sigma, threshold)
    s_max = np.where(constrained, s_max, np.inf)
    if not constrained.all():
        warnings.warn(
            f"{label}: K = 0 (no resonance) for m in {_ranges(mass, ~constrained)} eV: "
            "epsilon is not constrained there (epsilon_max = inf)",
            UnconstrainedMassWarning, stacklevel=2,
        )
    return SpectralLimit(
        name=name, label=label, mass_eV=mass, kernel_eV=kernel, epsilon_max=np.sqrt(s_max),
        s_hat=s_hat, s_sigma=s_sigma, temperature_K=fit["temperature_K"],
        temperature_sigma_K=fit["temperature_sigma_K"], galaxy_amplitude=fit["galaxy"],
        galaxy_amplitude_sigma=fit["galaxy_sigma"], chi2=fit["chi2"], dof=fit["dof"],
        confidence=float(confidence), delta_chi2=threshold, spectrum_source=spectrum.source,
    )


def sightline_limits(mass_eV, mean_kernel_eV=None, spread_kernels_eV=None, spread_percent=(16, 84),
                     background_kernel_eV=None, spectrum=None, confidence=0.95, fit_galaxy=False):
    """The spectral limits of a sightline run on one plot: mean, sightline spread, homogeneous background.

    ``mean_kernel_eV``: <K>(m) over sightlines (None: no such curve).
    ``spread_kernels_eV``: a pair (K at the lower percentile, K at the upper)
    over sightlines, percentiles ``spread_percent``; drawn as a band labelled as
    the sightline spread. ``background_kernel_eV``: K of the homogeneous
    universe; None computes it with :func:`raytrace.physics.background.background_kernel`
    (CAMB, Planck 2018). Returns a :class:`LimitSet`.
    """
    mass = require_positive_finite(np.atleast_1d(mass_eV), "mass_eV")
    spectrum = as_spectrum(spectrum)
    if background_kernel_eV is None:
        from raytrace.physics.background import background_kernel

        background_kernel_eV = background_kernel(mass)
    common = dict(spectrum=spectrum, confidence=confidence, fit_galaxy=fit_galaxy)
    curves = []
    if mean_kernel_eV is not None:
        curves.append(spectral_limit(mass, mean_kernel_eV, name="mean",
                                     label="inhomogeneous universe, mean K over sightlines", **common))
    curves.append(spectral_limit(mass, background_kernel_eV, name="background",
                                 label="homogeneous universe (mean plasma only)", **common))
    bands = []
    if spread_kernels_eV is not None:
        if len(spread_kernels_eV) != 2 or len(spread_percent) != 2:
            raise InputError("spread_kernels_eV: expected a pair (K at the lower percentile, K at the upper)")
        low, high = spread_percent
        edges = [spectral_limit(mass, kernel, name=f"sightline_p{percent:g}",
                                label=f"K at the {percent:g} % sightline quantile", **common)
                 for kernel, percent in zip(spread_kernels_eV, spread_percent)]
        bands.append(LimitBand(edges[1], edges[0],
                               f"sightline spread (K at the {low:g}-{high:g} % quantiles over sightlines)"))
    return LimitSet(tuple(curves), tuple(bands))


def result_kernels(result, plasma=None):
    """The kernels :func:`sightline_limits` takes, from a :class:`~raytrace.statistics.results.SightlineResult`
    or a :class:`~raytrace.statistics.onepoint.PdfMean` (its mean only).

    Mean and 16 % / 84 % quantiles of K over the rays, and the homogeneous
    universe's K over the same z = 0 to z_max as the rays (``plasma``: a
    :class:`~raytrace.physics.background.MeanPlasma`, default CAMB with Planck 2018), so
    that the two differ only by the inhomogeneity. A dict of keyword arguments.
    """
    from raytrace.core.errors import RaytraceWarning
    from raytrace.physics.background import MeanPlasma

    plasma = MeanPlasma() if plasma is None else plasma
    used = result.run.get("ionisation")
    if used is not None and used != plasma.ionisation.description:
        warnings.warn(RaytraceWarning(
            f"the sightlines were run with the ionisation history {used!r}; the homogeneous comparison "
            f"uses {plasma.ionisation.description!r}"
        ), stacklevel=2)
    return {
        "mass_eV": result.mass_eV,
        "mean_kernel_eV": result.mean(),
        # A one-point-PDF mean (raytrace.pdf_mean) has no spread between sightlines.
        "spread_kernels_eV": tuple(result.percentiles((16.0, 84.0))) if hasattr(result, "percentiles") else None,
        "background_kernel_eV": plasma.kernel(result.mass_eV, 0.0, float(result.run["z_max"])),
    }


# -- internals ------------------------------------------------------------------


def _kernel_array(kernel_eV, mass, name):
    kernel = float_array(kernel_eV, f"{name}: kernel_eV")
    kernel = np.full(mass.shape, float(kernel)) if kernel.ndim == 0 else kernel.ravel()
    if kernel.shape != mass.shape:
        raise InputError(f"kernel_eV ({name}): expected {mass.size} values, one per mass, got {kernel.size}")
    if not np.all(np.isfinite(kernel)) or np.any(kernel < 0):
        raise InputError(f"kernel_eV ({name}): expected finite values >= 0 (K in eV)")
    return kernel


def _weighted_fit(columns, data, sigma):
    """Least squares of data ~ sum_j beta_j columns_j with diagonal errors: beta and its covariance."""
    design = np.column_stack(columns) / sigma[:, None]
    # Columns differ by ~10 orders of magnitude (K/h nu vs dB/dT): scale them before solving.
    scale = np.linalg.norm(design, axis=0)
    whitened = design / scale
    beta, *_ = np.linalg.lstsq(whitened, data / sigma, rcond=None)
    covariance = np.linalg.inv(whitened.T @ whitened) / np.outer(scale, scale)
    return beta / scale, covariance


def _distortion_fit(spectrum, fit_galaxy, shapes=None):
    """Blackbody (+ Galaxy) fit without distortion, then q = s K in the model linearised around it.

    ``shapes`` (n, frequencies): distortion templates fitted one at a time instead of the
    conversion's -B/(h nu); then q_hat and q_sigma are arrays, one per template.
    """
    nu, data, sigma = spectrum.frequency_hz, spectrum.intensity_MJy_sr, spectrum.sigma_MJy_sr
    templates = []
    if fit_galaxy:
        if spectrum.galaxy_MJy_sr is None:
            raise InputError(f"spectrum {spectrum.source}: fit_galaxy needs a Galaxy template column, it has none")
        if not np.any(spectrum.galaxy_MJy_sr):
            raise InputError(f"spectrum {spectrum.source}: fit_galaxy: the Galaxy template is zero at every frequency")
        templates = [spectrum.galaxy_MJy_sr]
    temperature = CMB_TEMPERATURE_K
    not_converging = InputError(
        f"spectrum {spectrum.source}: the blackbody fit does not converge; is it a CMB spectrum in the units stated?"
    )
    # Gauss-Newton in T (the Galaxy amplitude is linear and re-solved each step).
    for _ in range(_MAX_ITERATIONS):
        beta, covariance = _weighted_fit([planck_dT_MJy_sr(nu, temperature)] + templates,
                                         data - planck_MJy_sr(nu, temperature), sigma)
        temperature += beta[0]
        if not (np.isfinite(temperature) and temperature > 0):
            raise not_converging
        if abs(beta[0]) < _TEMPERATURE_TOLERANCE * temperature:
            break
    else:
        raise not_converging
    blackbody = planck_MJy_sr(nu, temperature)
    galaxy = beta[1] if fit_galaxy else 0.0
    residual = data - blackbody - (galaxy * templates[0] if fit_galaxy else 0.0)
    null_chi2 = float(np.sum((residual / sigma) ** 2))
    one = shapes is None
    amplitudes = []
    for shape in [-blackbody / spectrum.photon_energy_eV] if one else shapes:
        linear, linear_covariance = _weighted_fit([planck_dT_MJy_sr(nu, temperature)] + templates + [shape],
                                                  residual, sigma)
        amplitudes.append((linear[-1], np.sqrt(linear_covariance[-1, -1])))
    q_hat, q_sigma = (float(v) for v in amplitudes[0]) if one else np.array(amplitudes).reshape(-1, 2).T
    return {
        "temperature_K": float(temperature),
        "temperature_sigma_K": float(np.sqrt(covariance[0, 0])),
        "galaxy": float(galaxy) if fit_galaxy else None,
        "galaxy_sigma": float(np.sqrt(covariance[1, 1])) if fit_galaxy else None,
        "chi2": null_chi2,
        "dof": len(spectrum) - 1 - len(templates),
        "q_hat": q_hat,
        "q_sigma": q_sigma,
    }


def upper_limit(s_hat, s_sigma, threshold):
    """s_max of the one-sided profile-chi^2 limit with the boundary s >= 0 (:func:`spectral_limit`)."""
    with np.errstate(invalid="ignore"):
        from_boundary = s_hat + np.sqrt(s_hat**2 + threshold * s_sigma**2)
        return np.where(s_hat >= 0, s_hat + np.sqrt(threshold) * s_sigma, from_boundary)


def _ranges(mass, mask):
    """Text of the mass intervals (in sorted mass order) where ``mask`` holds."""
    order = np.argsort(mass)
    sorted_mass, sorted_mask = mass[order], mask[order]
    edges = np.flatnonzero(np.diff(np.concatenate(([0], sorted_mask.astype(int), [0]))))
    return ", ".join(
        f"{sorted_mass[start]:.3g}" if stop - start == 1 else f"[{sorted_mass[start]:.3g}, {sorted_mass[stop - 1]:.3g}]"
        for start, stop in zip(edges[::2], edges[1::2])
    )

"""Dark radiation into photons: what a dark-photon background becomes on the resonances (PHYSICS.md section 11).

In: a sightline result with its redshift bins, or a sky result with its shells
(:func:`kernel_profile` turns either into K between two redshifts, per row and
mass), the mixing epsilon, the transverse fraction f_T, an observer's redshift
z_obs and a source of dark photons (:class:`DecayingDarkMatter`, or a user's
emission table, :class:`TabulatedSource`). Out: :class:`ConvertedPhotons`, the
converted photons' intensity and Rayleigh-Jeans brightness temperature against
frequency at the observer, their spread between sightlines (or pixels), and
their excess over T_CMB(z_obs) (:func:`converted_photons`); a sky map at one
frequency (:func:`converted_photon_map`).

On a crossing a dark photon becomes a photon with the probability a photon has
of the reverse, p = epsilon^2 K / omega_0 per transverse state (omega_0: the photon's
energy today), so a background with a share f_T of transverse states gives photons
with probability f_T epsilon^2 K(z_obs < z_c < z_e) / omega_0, summed over the
crossings between the observer and the emission (small P: the sum, not the saturating
form). Default f_T = 2/3: three polarisation states populated alike, where the source
prefers none; the longitudinal state converts only with a further (m / omega)^2
suppression (PHYSICS.md section 11, from memory there), so it counts as none. A source
that emits transverse states only (e.g. a scalar decaying through phi F'F', whose
longitudinal amplitude vanishes as m / M -> 0) takes f_T = 1.

A photon seen today at omega_0 from a decay to two dark photons of energy M/2 left at
1 + z_e = M / (2 omega_0); per comoving volume
    dn_gamma/d omega_0 = (2 n / tau) exp(-t(z_e)/tau) / (H(z_e) omega_0) f_T epsilon^2 K(z_obs < z_c < z_e) / omega_0,
n = f_DM rho_DM,0 / M. Its intensity per unit frequency is I_nu = (c / 4 pi) omega_0 h dn/d omega_0
and T_b = I_nu c^2 / (2 k nu^2). An observer at z_obs sees the photons converted above
z_obs from dark photons emitted above z_obs, at nu_obs = (1 + z_obs) nu_0, with T_b
(1 + z_obs) times today's and I_nu (1 + z_obs)^3 times; their excess is T_b / T_CMB(z_obs),
T_CMB(z) = T_0 (1 + z). Absorption of the photons after they convert, and conversion back,
are left out (both second order in what is small here).

Between bin edges K is interpolated linearly in ln(1+z) (the boxes' part; the resolution
in frequency is the bins'); the homogeneous background's crossings are taken exactly.
"""

from dataclasses import dataclass

import numpy as np

from raytrace.physics.constants import H_PLANCK_EV_S
from raytrace.physics.darksources import DecayingDarkMatter
from raytrace.core.errors import InputError, require_number, require_positive_finite
from raytrace.physics.units import CMB_TEMPERATURE_K

DEFAULT_TRANSVERSE_FRACTION = 2.0 / 3.0
PERCENTILES = (2.5, 16.0, 50.0, 84.0, 97.5)


def _units():
    """(I_nu = (c / 4 pi) h omega_0 dn/d omega_0 in W m^-2 Hz^-1 sr^-1 per cm^-3 of omega_0 dn/d omega_0,
    T_b = I_nu c^2 / (2 k nu^2) in K per W m^-2 Hz^-1 sr^-1 over nu^2 in Hz^2), from astropy's constants."""
    import astropy.constants as const
    import astropy.units as u

    intensity = (const.c / (4 * np.pi * u.sr) * const.h / u.cm**3).to(u.W / u.m**2 / u.Hz / u.sr)
    temperature = (const.c**2 / (2 * const.k_B) * u.W / u.m**2 / u.Hz / u.sr * u.sr / u.Hz**2).to(u.K)
    return float(intensity.value), float(temperature.value)


@dataclass(frozen=True, eq=False)
class KernelProfile:
    """K between two redshifts per row and mass, from a result's bins (:func:`kernel_profile`).

    ``edges_z`` (B+1); ``boxes`` (rows, B+1, masses): the boxes' K below each edge (from the first);
    ``background``: (z, kernel, mass index) of the homogeneous background's crossings; the boxes
    serve up to ``z_boxes``, the run ends at ``z_max``; ``rows`` says what the rows are.
    """

    mass_eV: np.ndarray
    edges_z: np.ndarray
    boxes: np.ndarray
    background: tuple
    z_boxes: float
    z_max: float
    rows: str

    def between(self, z_obs, z_e):
        """K(z_obs < z_c < z_e) in eV, (rows, len(z_e), masses); z_e an array, z_obs a number."""
        z_e = np.asarray(z_e, dtype=float)
        self._check_covered(z_obs, float(z_e.max()))
        u_edges = np.log1p(self.edges_z)

        def boxes_below(z):
            """(rows, len(z), masses): linear in ln(1+z) between the edges, flat beyond the last."""
            u = np.log1p(np.clip(z, self.edges_z[0], self.edges_z[-1]))
            i = np.clip(np.searchsorted(u_edges, u, side="right") - 1, 0, u_edges.size - 2)
            f = (u - u_edges[i]) / (u_edges[i + 1] - u_edges[i])
            return self.boxes[:, i] + f[None, :, None] * (self.boxes[:, i + 1] - self.boxes[:, i])

        z_at, kernel, mass_index = self.background
        inside = (z_at[None, :] > z_obs) & (z_at[None, :] < z_e[:, None])  # (redshifts, crossings)
        weights = np.zeros((z_at.size, self.mass_eV.size))
        weights[np.arange(z_at.size), mass_index] = kernel
        background = inside.astype(float) @ weights
        boxes = np.clip(boxes_below(z_e) - boxes_below(np.full(z_e.size, float(z_obs))), 0.0, None)
        return np.where(z_e[None, :, None] > z_obs, boxes, 0.0) + background[None]

    def _check_covered(self, z_obs, z_e):
        low, high = self.edges_z[0], self.edges_z[-1]
        if z_obs < low or (z_e > high and high < min(self.z_boxes, z_e)):
            raise InputError(f"the result's bins cover z = {low:g} to {high:g} of the boxes (which serve up to "
                             f"{self.z_boxes:g}); K between z_obs = {z_obs:g} and z = {min(z_e, self.z_boxes):g} "
                             "needs bins there (--redshift-bins, --shells)")


def kernel_profile(result, plasma=None):
    """The :class:`KernelProfile` of a sightline result (bins: mean and percentile rows, or every ray where
    they were kept) or a sky result (shells: every pixel). ``plasma``: the run's MeanPlasma (default CAMB,
    Planck 2018), for the background's crossings; checked against the background the result holds."""
    from raytrace.physics.background import MeanPlasma

    plasma = MeanPlasma() if plasma is None else plasma
    run = result.run
    z_boxes, z_max = float(run["z_boxes"]), float(run["z_max"])
    end = z_max if run["include_background"] else z_boxes
    found = plasma.crossings(result.mass_eV, z_boxes, end) if end > z_boxes else None
    background = ((found.redshift, found.kernel_eV, found.mass_index) if found is not None
                  else (np.zeros(0), np.zeros(0), np.zeros(0, dtype=int)))
    total = np.bincount(background[2], weights=background[1], minlength=result.mass_eV.size)
    if not np.allclose(total, result.kernel_background, rtol=1e-9, atol=0):
        raise InputError(f"plasma: its background kernel differs from the result's (run with {run.get('ionisation')!r});"
                         " give the run's ionisation history")
    edges, boxes, rows = _profile_rows(result)
    return KernelProfile(result.mass_eV, edges, boxes, background, z_boxes, z_max, rows)


def _profile_rows(result):
    """(edges, boxes' K below each edge per row (rows, B+1, m), what the rows are) of a result's bins."""
    shells = getattr(result, "kernel_shells_boxes", None)
    if shells is not None:
        return result.shell_edges_z, _cumulative(shells), "pixels"
    bins = getattr(result, "redshift_bins", None)
    if bins is None:
        raise InputError("the result has no redshift bins (cast it with redshift_bins / --redshift-bins, or a sky "
                         "with shells_z / --shells)")
    if bins.ray_bins is not None:
        return bins.edges_z, _cumulative(bins.ray_bins - bins.background_bins[None]), "rays"
    below = np.concatenate([np.zeros((1, result.mass_eV.size)), np.cumsum(bins.background_bins, axis=0)])
    # Only the boxes' part: the background below each edge is the same on every ray.
    mean = bins.cumulative_mean - below - (bins.cumulative_mean[0] - below[0])
    quantiles = bins.cumulative_percentiles - below[None] - (bins.cumulative_mean[0] - below[0])
    return bins.edges_z, np.concatenate([mean[None], quantiles]), "mean, then the percentiles of K(z_c < edge)"


def _cumulative(per_bin):
    """(rows, B+1, m) K below each edge, from K per bin (rows, B, m)."""
    return np.concatenate([np.zeros((per_bin.shape[0], 1, per_bin.shape[2])), np.cumsum(per_bin, axis=1)], axis=1)


@dataclass(frozen=True, eq=False)
class ConvertedPhotons:
    """The converted photons' spectrum at an observer at ``z_obs``, per frequency (observer's frame) and mass.

    ``intensity_MJy_sr``, ``temperature_K`` (F, m): the mean over rows (sightlines or pixels) of I_nu and
    of the Rayleigh-Jeans brightness temperature; ``temperature_percentiles_K`` (5, F, m) at
    :data:`PERCENTILES` over rows, or None where the result cannot give them (``spread`` says why).
    """

    mass_eV: np.ndarray
    frequency_hz: np.ndarray
    z_obs: float
    epsilon: float
    transverse_fraction: float
    source: dict
    intensity_MJy_sr: np.ndarray
    temperature_K: np.ndarray
    temperature_percentiles_K: np.ndarray
    spread: str

    @property
    def cmb_temperature_K(self):
        """T_CMB at the observer, T_0 (1 + z_obs) (T_0 = 2.72548 K, Fixsen 2009)."""
        return CMB_TEMPERATURE_K * (1.0 + self.z_obs)

    def excess(self):
        """T_b / T_CMB(z_obs) per frequency and mass: the radio excess at the observer."""
        return self.temperature_K / self.cmb_temperature_K


def check_observer(epsilon, transverse_fraction, z_obs, run_z_max):
    """(epsilon, f_T, z_obs) checked: epsilon > 0, 0 < f_T <= 1, 0 <= z_obs < the run's z_max."""
    epsilon = require_number(epsilon, "epsilon (--epsilon)", above=0)
    fraction = require_number(transverse_fraction, "transverse fraction (--transverse-fraction)", above=0, at_most=1)
    z_obs = require_number(z_obs, "observer redshift (--observer-redshift)", at_least=0, expected="a redshift >= 0")
    if z_obs >= run_z_max:
        raise InputError(f"observer redshift (--observer-redshift): {z_obs:g} is not below the run's z_max = "
                         f"{run_z_max:g}; there are no crossings above it")
    return epsilon, fraction, z_obs


def observer_frequencies(source, z_obs, z_max, frequency_hz=None, count=160):
    """The observer's frequencies (Hz): ``frequency_hz`` checked against the source, or ``count`` log-spaced
    from those of dark photons emitted at the run's z_max up to the source's highest energy."""
    top = source.highest_energy_eV() / H_PLANCK_EV_S
    if frequency_hz is None:
        low = top * (1.0 + z_obs) / (1.0 + z_max) if isinstance(source, DecayingDarkMatter) else top * 1e-4
        return np.geomspace(low, top, count + 1)[:-1]
    frequency = require_positive_finite(np.atleast_1d(frequency_hz), "frequency (--frequency-range)")
    if np.any(frequency >= top):
        raise InputError(f"frequency: {frequency.max():.4g} Hz asks for photons of {H_PLANCK_EV_S * frequency.max():.4g}"
                         f" eV at the observer, but the source's dark photons have at most {top * H_PLANCK_EV_S:.4g} eV "
                         "(a decay gives M/2: the source mass is below twice the photon energy asked for)")
    return frequency


def row_temperatures(profile, source, epsilon, transverse_fraction, z_obs, frequency_hz, cosmology):
    """(I_nu in MJy/sr, T_b in K) at the observer, (rows, F, m), for the profile's rows."""
    intensity_unit, temperature_unit = _units()
    omega0 = H_PLANCK_EV_S * frequency_hz / (1.0 + z_obs)
    photons = source.dark_photons(omega0, z_obs, profile.z_max, cosmology, profile.between)
    intensity_today = intensity_unit * (omega0[None, :, None] * photons) * transverse_fraction * epsilon**2
    temperature_today = temperature_unit * intensity_today / (frequency_hz / (1.0 + z_obs))[None, :, None] ** 2
    return (1.0 + z_obs) ** 3 * intensity_today / 1.0e-20, (1.0 + z_obs) * temperature_today


def converted_photons(result, source, epsilon, transverse_fraction=DEFAULT_TRANSVERSE_FRACTION, z_obs=0.0,
                      frequency_hz=None, plasma=None, profile=None):
    """The photons ``source``'s dark photons become on ``result``'s resonances, seen at ``z_obs``.

    ``result``: a sightline result with redshift bins or a sky with shells (or give ``profile``,
    a :class:`KernelProfile`); ``frequency_hz``: the observer's frequencies (default: the source's
    whole range, 160 log-spaced). Returns :class:`ConvertedPhotons`.
    """
    profile = kernel_profile(result, plasma) if profile is None else profile
    epsilon, fraction, z_obs = check_observer(epsilon, transverse_fraction, z_obs, profile.z_max)
    frequency = observer_frequencies(source, z_obs, profile.z_max, frequency_hz)
    cosmology = (plasma.cosmology if plasma is not None else _default_cosmology())
    intensity, temperature = row_temperatures(profile, source, epsilon, fraction, z_obs, frequency, cosmology)
    warn_large_probability(profile, source, epsilon, fraction, z_obs, frequency)
    if profile.rows in ("rays", "pixels"):
        mean_i, mean_t = intensity.mean(axis=0), temperature.mean(axis=0)
        spread = np.percentile(temperature, PERCENTILES, axis=0) if temperature.shape[0] > 1 else None
        how = f"percentiles over the result's {temperature.shape[0]} {profile.rows}"
    else:
        mean_i, mean_t = intensity[0], temperature[0]
        exact = z_obs == profile.edges_z[0] or z_obs >= profile.z_boxes
        spread = temperature[1:] if exact else None
        how = ("the percentiles of K(z_c < z_e) over rays, linear in ln(1+z) between bin edges" if exact else
               "none: an observer inside the boxes' range needs every ray's bins (keep_ray_bins, --keep-ray-bins)")
    return ConvertedPhotons(profile.mass_eV, frequency, z_obs, epsilon, fraction, source.describe(), mean_i, mean_t,
                            spread, how)


def warn_large_probability(profile, source, epsilon, fraction, z_obs, frequency_hz, limit=0.1):
    """Warn where a dark photon's conversion probability f_T epsilon^2 K / omega_0 reaches ``limit``: there the
    sum over crossings overstates it (the saturating form and conversion back would matter)."""
    import warnings

    from raytrace.core.errors import RaytraceWarning

    omega0 = H_PLANCK_EV_S * frequency_hz / (1.0 + z_obs)
    z_e = source.earliest_emission(omega0, profile.z_max)
    emitted = z_e > z_obs
    if not emitted.any():
        return
    probability = fraction * epsilon**2 * profile.between(z_obs, z_e[emitted]) / omega0[emitted][None, :, None]
    if probability.max() >= limit:
        _, j, k = np.unravel_index(np.argmax(probability), probability.shape)
        warnings.warn(RaytraceWarning(
            f"dark radiation: a dark photon's conversion probability reaches {probability.max():.3g} (m = "
            f"{profile.mass_eV[k]:.3g} eV, {frequency_hz[emitted][j] / 1e9:.3g} GHz at the observer); the spectrum "
            f"sums probabilities, which overstates conversion where it is not small: take a smaller epsilon"),
            stacklevel=3)


def converted_photon_map(sky, source, epsilon, frequency_hz, mass_eV, transverse_fraction=DEFAULT_TRANSVERSE_FRACTION,
                         z_obs=0.0, plasma=None):
    """The brightness temperature (K) of the converted photons per pixel of ``sky`` (a sky with shells) at one
    observer's frequency and the grid mass nearest ``mass_eV``."""
    profile = kernel_profile(sky, plasma)
    epsilon, fraction, z_obs = check_observer(epsilon, transverse_fraction, z_obs, profile.z_max)
    frequency = observer_frequencies(source, z_obs, profile.z_max, [frequency_hz])
    cosmology = plasma.cosmology if plasma is not None else _default_cosmology()
    _, temperature = row_temperatures(profile, source, epsilon, fraction, z_obs, frequency, cosmology)
    return temperature[:, 0, sky.mass_index(mass_eV)]


def _default_cosmology():
    from raytrace.physics.cosmology import Cosmology

    return Cosmology()

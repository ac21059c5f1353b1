"""Limits on epsilon from dark radiation turned into photons (PHYSICS.md sections 6 and 11).

In: a result with redshift bins (as :func:`raytrace.darkradiation.converted_photons`
takes it), a source of dark photons, the transverse fraction, and what the added
photons are compared with: the measured CMB monopole (:func:`added_photon_limit`,
FIRAS by default) or a radio-background level (:func:`radio_limit`, the ARCADE 2
excess by default). Out: limit curves epsilon_max(m) that a
:class:`~raytrace.limitset.LimitSet` takes, so :func:`raytrace.limitset.limit_table`
writes them as CSV / HDF5 and :func:`raytrace.limitset.plot_limits` draws them;
the converted photons' spectrum as a table (:func:`photon_table`) and a figure
(:func:`plot_spectrum`).

The added photons scale as epsilon^2 while P is small, so each limit comes from
the spectrum at epsilon = 1 (a template, the mean over the rows: the monopole is
the sky's mean). Monopole: I(nu) = B_nu(T) + s I_1(nu), s = epsilon^2, T free,
the same profile-chi^2 limit with the boundary s >= 0 as the spectral limit of
:mod:`raytrace.limits`. Radio level: the photons' brightness temperature must stay
below the level at every frequency of its band, epsilon_max = min_nu
sqrt(T_level(nu) / T_1(nu)).
"""

from dataclasses import dataclass

import numpy as np

from raytrace.physics.constants import H_PLANCK_EV_S
from raytrace.limits.darkradiation import DEFAULT_TRANSVERSE_FRACTION, _default_cosmology, kernel_profile, row_temperatures
from raytrace.core.errors import InputError, require_number


@dataclass(frozen=True)
class RadioLevel:
    """A radio-background brightness temperature T(nu) = ``temperature_K`` (nu / ``reference_hz``)^``index``
    at the observer, over the band ``band_hz`` (low, high) where it was measured; ``source`` cites it."""

    temperature_K: float
    reference_hz: float
    index: float
    band_hz: tuple
    source: str

    def __post_init__(self):
        require_number(self.temperature_K, "radio level temperature (--radio-level)", above=0)
        require_number(self.reference_hz, "radio level reference frequency (--radio-level)", above=0)
        require_number(self.index, "radio level spectral index (--radio-level)")
        low, high = (require_number(v, "radio level band (--radio-band)", above=0) for v in self.band_hz)
        if not low < high:
            raise InputError(f"radio level band (--radio-band): expected low < high, got {self.band_hz}")

    def at(self, frequency_hz):
        return self.temperature_K * (np.asarray(frequency_hz) / self.reference_hz) ** self.index


#: The radio excess above the CMB reported by ARCADE 2 (Fixsen et al. 2011, ApJ 734, 5) as PHYSICS.md quotes it:
#: T_R = 24 K (nu / 310 MHz)^-2.6. FROM MEMORY, not yet checked against the paper; the band, 22 MHz to 10 GHz
#: (the surveys the power law was fitted to, with ARCADE 2's own 3-10 GHz), is from memory too.
ARCADE2_EXCESS = RadioLevel(24.0, 310.0e6, -2.6, (22.0e6, 10.0e9),
                            "ARCADE 2 excess, Fixsen et al. 2011, ApJ 734, 5 (coefficients from memory, unchecked)")


@dataclass(frozen=True, eq=False)
class PhotonLimit:
    """epsilon_max(m) from photons a dark-photon source adds: a curve a LimitSet takes (duck-typed like
    :class:`raytrace.limits.SpectralLimit`); ``kind`` says what they were compared with."""

    name: str
    label: str
    mass_eV: np.ndarray
    epsilon_max: np.ndarray
    kind: str
    details: dict

    def __post_init__(self):
        for name in ("mass_eV", "epsilon_max"):
            array = np.array(getattr(self, name), dtype=float)
            array.setflags(write=False)
            object.__setattr__(self, name, array)

    def columns(self):
        return {"epsilon_max": self.epsilon_max}

    def unconstrained(self):
        return np.where(np.isfinite(self.epsilon_max), "", "no converted photons at the compared frequencies")

    def metadata(self):
        return {"label": self.label, "kind": self.kind, **self.details}


def _templates(result, source, transverse_fraction, frequency_hz, z_obs, plasma, profile):
    """(profile, I_nu in MJy/sr, T_b in K) at epsilon = 1, the mean over rows, (F, m); zero at frequencies
    the source's dark photons do not reach."""
    profile = kernel_profile(result, plasma) if profile is None else profile
    cosmology = plasma.cosmology if plasma is not None else _default_cosmology()
    frequency = np.asarray(frequency_hz, dtype=float)
    reach = H_PLANCK_EV_S * frequency < source.highest_energy_eV()
    intensity = np.zeros((frequency.size, profile.mass_eV.size))
    temperature = np.zeros_like(intensity)
    if reach.any():
        rows_i, rows_t = row_temperatures(profile, source, 1.0, transverse_fraction, z_obs, frequency[reach],
                                          cosmology)
        # The statistics' first row is the mean; rows of rays or pixels are averaged.
        statistics = profile.rows not in ("rays", "pixels")
        intensity[reach] = rows_i[0] if statistics else rows_i.mean(axis=0)
        temperature[reach] = rows_t[0] if statistics else rows_t.mean(axis=0)
    return profile, intensity, temperature


def added_photon_limit(result, source, transverse_fraction=DEFAULT_TRANSVERSE_FRACTION, spectrum=None,
                       confidence=0.95, fit_galaxy=False, plasma=None, profile=None):
    """epsilon_max(m) from the CMB monopole (default the FIRAS table, Fixsen et al. 1996) with the
    converted photons added to a free blackbody: a :class:`PhotonLimit`."""
    from raytrace.limits.spectral import _distortion_fit, as_spectrum, delta_chi2, upper_limit

    spectrum = as_spectrum(spectrum)
    threshold = delta_chi2(confidence)
    profile, intensity, _ = _templates(result, source, transverse_fraction, spectrum.frequency_hz, 0.0, plasma,
                                       profile)
    constrained = np.any(intensity > 0, axis=0)
    fit = _distortion_fit(spectrum, fit_galaxy, shapes=intensity.T[constrained])  # a zero template fits nothing
    s_max = np.full(constrained.size, np.inf)
    s_max[constrained] = upper_limit(fit["q_hat"], fit["q_sigma"], threshold)
    details = {"source": str(source.describe()), "transverse_fraction": transverse_fraction,
               "spectrum": spectrum.source, "confidence": float(confidence), "delta_chi2": threshold,
               "temperature_K": fit["temperature_K"], "chi2": fit["chi2"], "dof": fit["dof"]}
    return PhotonLimit("monopole", "converted photons added to the CMB monopole", profile.mass_eV,
                       np.sqrt(s_max), "CMB monopole, added photons", details)


def radio_limit(result, source, transverse_fraction=DEFAULT_TRANSVERSE_FRACTION, level=ARCADE2_EXCESS, z_obs=0.0,
                points=64, plasma=None, profile=None):
    """epsilon_max(m) from a radio-background level at the observer (default the ARCADE 2 excess today):
    the photons' T_b below ``level`` at each of ``points`` log-spaced frequencies of its band."""
    frequency = np.geomspace(*level.band_hz, points)
    profile, _, temperature = _templates(result, source, transverse_fraction, frequency, z_obs, plasma, profile)
    with np.errstate(divide="ignore"):
        ratio = np.where(temperature > 0, level.at(frequency)[:, None] / np.where(temperature > 0, temperature, 1),
                         np.inf)
    details = {"source": str(source.describe()), "transverse_fraction": transverse_fraction,
               "level": level.source, "level_K_at_reference": level.temperature_K, "reference_hz": level.reference_hz,
               "index": level.index, "band_hz": str(level.band_hz), "observer_redshift": z_obs}
    return PhotonLimit("radio", f"converted photons below the radio level ({level.source.split(',')[0]})",
                       profile.mass_eV, np.sqrt(ratio.min(axis=0)), "radio background level", details)


def plot_spectrum(photons, path, masses_eV=None, level=None, overwrite=False):
    """T_b against the observer's frequency at a few masses (their spread as bands where known), with
    T_CMB(z_obs) and a radio level; written to ``path`` (PNG, PDF) atomically."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    from raytrace.core.provenance import atomic_output

    figure = Figure(figsize=(7.0, 4.8), layout="constrained")
    FigureCanvasAgg(figure)
    ax = figure.add_subplot()
    picks = _shown_masses(photons, masses_eV)
    for colour, k in enumerate(picks):
        ax.plot(photons.frequency_hz / 1e9, photons.temperature_K[:, k], color=f"C{colour}",
                label=f"m = {photons.mass_eV[k]:.3g} eV")
        if photons.temperature_percentiles_K is not None:
            ax.fill_between(photons.frequency_hz / 1e9, photons.temperature_percentiles_K[1, :, k],
                            photons.temperature_percentiles_K[3, :, k], color=f"C{colour}", alpha=0.25, lw=0)
    ax.axhline(photons.cmb_temperature_K, color="k", ls=":", label=f"T_CMB at z = {photons.z_obs:g}")
    if level is not None:
        band = np.geomspace(*level.band_hz, 32)
        ax.plot(band / 1e9, level.at(band), color="k", ls="--", label=level.source.split("(")[0].strip())
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.set_xlabel(f"frequency at the observer (z = {photons.z_obs:g}) [GHz]")
    ax.set_ylabel("brightness temperature T_b [K]")
    ax.set_title(f"converted dark radiation, epsilon = {photons.epsilon:g}, f_T = {photons.transverse_fraction:.3g}"
                 " (bands: 16-84 % of sightlines)", fontsize=9)
    ax.legend(fontsize="small")
    with atomic_output(path, overwrite) as temporary:
        figure.savefig(temporary, format=str(path).rsplit(".", 1)[-1].lower(), dpi=150)
    return path


def _shown_masses(photons, masses_eV, count=4):
    """Indices of ``masses_eV`` (nearest grid masses), or of ``count`` masses spread over those with photons."""
    if masses_eV is not None:
        return [int(np.argmin(np.abs(np.log(photons.mass_eV / m)))) for m in np.atleast_1d(masses_eV)]
    lit = np.flatnonzero(np.any(photons.temperature_K > 0, axis=0))
    if lit.size == 0:
        raise InputError("plot: no mass of the grid gives converted photons at these frequencies")
    return list(lit[np.round(np.linspace(0, lit.size - 1, min(count, lit.size))).astype(int)])


#: Columns of a spectrum table: name -> (unit, description).
PHOTON_COLUMNS = {
    "frequency_hz": ("Hz", "frequency at the observer"),
    "intensity_MJy_sr": ("MJy/sr", "mean intensity I_nu of the converted photons at the observer"),
    "temperature_K": ("K", "mean Rayleigh-Jeans brightness temperature at the observer"),
    "temperature_p16_K": ("K", "16 % percentile of the brightness temperature over the result's rows"),
    "temperature_p84_K": ("K", "84 % percentile of the brightness temperature over the result's rows"),
    "excess": ("1", "mean brightness temperature over T_CMB at the observer's redshift"),
}


def photon_table(path, photons, overwrite=False):
    """Write ``photons`` (:class:`~raytrace.darkradiation.ConvertedPhotons`) as CSV (one row per mass and
    frequency) or HDF5 (one (frequency, mass) dataset per column), atomically, with its parameters."""
    import json
    from pathlib import Path

    from raytrace.core.provenance import atomic_output, hdf5_image, provenance_json

    path = Path(path)
    kind = {".csv": "csv", ".h5": "hdf5", ".hdf5": "hdf5"}.get(path.suffix.lower())
    if kind is None:
        raise InputError(f"{path}: expected a table file ending in .csv, .h5 or .hdf5")
    spread = photons.temperature_percentiles_K
    columns = {"temperature_K": photons.temperature_K, "intensity_MJy_sr": photons.intensity_MJy_sr,
               "excess": photons.excess()}
    if spread is not None:
        columns.update(temperature_p16_K=spread[1], temperature_p84_K=spread[3])
    about = {"epsilon": photons.epsilon, "transverse_fraction": photons.transverse_fraction,
             "observer_redshift": photons.z_obs, "source": photons.source, "spread": photons.spread}
    with atomic_output(path, overwrite) as temporary:
        if kind == "csv":
            with open(temporary, "w") as handle:
                handle.write(f"# raytrace converted dark radiation: {json.dumps(about, default=str)}\n")
                handle.write(f"# provenance: {provenance_json()}\n")
                for name in ("frequency_hz", *columns):
                    handle.write(f"# {name}: {PHOTON_COLUMNS[name][1]} [{PHOTON_COLUMNS[name][0]}]\n")
                handle.write(",".join(["mass_eV", "frequency_hz", *columns]) + "\n")
                for k, mass in enumerate(photons.mass_eV):
                    for j, frequency in enumerate(photons.frequency_hz):
                        values = [mass, frequency, *(column[j, k] for column in columns.values())]
                        handle.write(",".join(f"{value:.8g}" for value in values) + "\n")
        else:
            with hdf5_image(temporary) as handle:
                handle.attrs.update(provenance=provenance_json(), parameters=json.dumps(about, default=str))
                handle["mass_eV"] = photons.mass_eV
                for name, values in (("frequency_hz", photons.frequency_hz), *columns.items()):
                    handle[name] = values
                    handle[name].attrs.update(unit=PHOTON_COLUMNS[name][0], description=PHOTON_COLUMNS[name][1])
    return path

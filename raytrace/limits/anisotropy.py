"""Upper limits on epsilon from the anisotropy of a sky map (PHYSICS.md sections 6 and 10).

In: a :class:`~raytrace.sky.maps.SkyResult` with independent splits, its
:class:`~raytrace.sky.spectra.SkySpectra`, the observed photon energy, a confidence
level. Out: :class:`AnisotropyLimit` curves epsilon_max(m) for a
:class:`~raytrace.limits.limitset.LimitSet`:

- **measured spectrum** (the test): conversion adds power uncorrelated with the
  primary anisotropy, D_l(conv) = epsilon^4 (T_0 g(x) / omega_0)^2 D_l^K, with D_l^K
  the signal spectrum of the K map (the splits' cross-spectrum, pixel window
  removed) and g(x) = (1 - e^-x)/x. Over the Planck 2018 TT bands the map
  resolves (:func:`raytrace.sky.spectra.resolved_lmax`), binned as the data are,
  Delta chi^2(q) = sum_b [(d_b - m_b - c_b q)^2 - (d_b - m_b)^2] / s_b^2 with
  q = epsilon^4, s_b the upper error (the side added power moves toward). The
  limit treats the boundary q >= 0 as the spectral limit does
  (:func:`raytrace.limits.spectral.spectral_limit`): q_max = q_hat + sqrt(T) sigma_q for
  q_hat >= 0, else q_hat + sqrt(q_hat^2 + T sigma_q^2) (then the Delta chi^2 above
  reaches T exactly), T = :func:`raytrace.limits.spectral.delta_chi2` of the confidence.
  Its band: the same with c_b one standard error (Knox 1995) up and down.
  Masses where the noise exceeds the signal in the bands that decide the limit
  (those carrying >= 10 % of sum c_b^2 / s_b^2) are marked: there the estimate
  c_b scatters about a small signal, and counting its negative values as 0 biases
  the limit tight (measured on the demo series at 1.2e-13 eV: 5.1e-7, 6.1e-7,
  9.0e-7 for 4, 16, 64 rays per pixel), so the band's upper edge is the one to
  quote. The limit assumes the conversion signal survives the component
  separation of the TT spectrum.
- **quick look**: the map's signal rms of dT/T (from the splits' covariance,
  never the raw map) below a threshold (1e-5, CMB isotropy, a fact of the trade).
- **a user's table** of C_l upper limits in (dT/T)^2: epsilon_max = min over the
  resolved l of (limit_l / C_l^signal at epsilon = 1)^(1/4).
"""

from dataclasses import dataclass, field
from pathlib import Path

import numpy as np

from raytrace.core.errors import InputError, require_positive_finite
from raytrace.physics.conversion import ANISOTROPY_FREQUENCY_GHZ, ISOTROPY_LEVEL, anisotropy_per_probability
from raytrace.physics.units import CMB_TEMPERATURE_K, frequency_label, photon_energy_of_ghz

#: The default observed photon energy of the anisotropy test (physics.conversion.ANISOTROPY_FREQUENCY_GHZ).
DEFAULT_PHOTON_ENERGY_EV = photon_energy_of_ghz(ANISOTROPY_FREQUENCY_GHZ)
#: A band decides the limit when it carries at least this share of sum c_b^2 / s_b^2.
DECIDING_SHARE = 0.1
COMPONENT_SEPARATION_CAVEAT = ("the limit from the measured spectrum assumes that the conversion signal survives the "
                               "component separation of the Planck TT spectrum (100-217 GHz channels)")


@dataclass(frozen=True, eq=False)
class AnisotropyLimit:
    """epsilon_max(m) from the anisotropy of a sky; ``test`` says which (module docstring).

    ``reasons``: per mass, why epsilon is not constrained there ('' where it is);
    ``noisy``: per mass, whether the noise exceeds the signal where it matters;
    ``extra``: further per-mass columns for a table; ``details``: scalars for its header.
    """

    name: str
    label: str
    mass_eV: np.ndarray
    epsilon_max: np.ndarray
    test: str
    omega0_eV: float
    sky: dict
    reasons: np.ndarray = None
    noisy: np.ndarray = None
    extra: dict = field(default_factory=dict)
    details: dict = field(default_factory=dict)

    def __post_init__(self):
        for name in ("mass_eV", "epsilon_max"):
            array = np.array(getattr(self, name), dtype=float)
            array.setflags(write=False)
            object.__setattr__(self, name, array)
        if self.reasons is None:
            reasons = np.where(np.isfinite(self.epsilon_max), "", "no anisotropy at this mass (flat dT/T map)")
            object.__setattr__(self, "reasons", reasons)
        if self.noisy is None:
            object.__setattr__(self, "noisy", np.zeros(self.mass_eV.size, dtype=bool))

    def __repr__(self):
        return f"AnisotropyLimit({self.name!r}, {self.mass_eV.size} masses, {self.label!r})"

    def columns(self):
        """Per-mass arrays for a table."""
        return {"epsilon_max": self.epsilon_max, **self.extra}

    def unconstrained(self):
        """Per mass: why epsilon is not constrained there ('' where it is)."""
        return np.asarray(self.reasons, dtype=str)

    def metadata(self):
        """Scalars describing the test, for a table's header."""
        return {"label": self.label, "kind": "CMB anisotropy", "test": self.test, "omega0_eV": self.omega0_eV,
                **self.sky, **self.details}


def anisotropy_limits(sky, omega0_eV=None, confidence=0.95, threshold=None, cl_limits=None, spectra=None,
                      bands=None):
    """The sky's anisotropy curves as a :class:`~raytrace.limits.limitset.LimitSet`: the measured-spectrum limit
    (name "anisotropy") with its band, the rms quick look ("anisotropy_rms"), and with ``cl_limits`` the
    table's ("anisotropy_cl"). ``omega0_eV`` default 143 GHz; ``bands``: a
    :class:`~raytrace.limits.cmbpower.BandPowers` (default Planck 2018 TT)."""
    from raytrace.limits.limitset import LimitBand, LimitSet
    from raytrace.sky.spectra import sky_spectra

    omega0 = _photon_energy(omega0_eV)
    spectra = sky_spectra(sky) if spectra is None else spectra
    measured, low, high = measured_spectrum_limit(sky, omega0, confidence, spectra, bands)
    curves = [measured, rms_limit(sky, omega0, threshold, spectra)]
    if cl_limits is not None:
        curves.append(table_limit(sky, omega0, cl_limits, spectra))
    band = LimitBand(low, high, f"{measured.label}: +-1 sigma of the signal spectrum")
    return LimitSet(tuple(curves), (band,))


def measured_spectrum_limit(sky, omega0_eV, confidence, spectra, bands=None):
    """(limit, lower edge, upper edge): the Delta chi^2 limit over the measured band powers (docstring)."""
    from raytrace.limits.cmbpower import check_frequency, planck_tt
    from raytrace.limits.spectral import delta_chi2
    from raytrace.sky.spectra import resolved_lmax

    ghz = check_frequency(omega0_eV)
    threshold = delta_chi2(confidence)
    lmax = resolved_lmax(sky.nside)
    bands = (planck_tt() if bands is None else bands).within(lmax)
    if len(bands) == 0:
        raise InputError(f"sky of nside {sky.nside}: resolves no multipole of the measured spectrum (l <= {lmax})")
    scale = (CMB_TEMPERATURE_K * 1e6 * _response(omega0_eV)) ** 2  # muK^2 per eV^2 of K, at epsilon = 1
    signal, variance = bands.bin(spectra.cross, spectra.signal_variance_per_l())
    noise, _ = bands.bin(spectra.noise)
    conversion = scale * bands.to_power(signal)
    error = scale * bands.to_power(np.sqrt(variance))
    residual, sigma = bands.power - bands.model, bands.error_high
    epsilon, q_hat, q_sigma, share = delta_chi2_limit(conversion, residual, sigma, threshold)
    deciding = share >= DECIDING_SHARE
    noisy = np.any(deciding & (noise > signal), axis=0)
    reasons = _reasons(spectra, epsilon, "the signal spectrum is not positive in any band the map resolves")
    common = dict(test="measured C_l", omega0_eV=float(omega0_eV), sky=_sky_details(sky))
    details = {"confidence": float(confidence), "delta_chi2": threshold, "spectrum": bands.source,
               "multipoles": f"{int(bands.ell_low[0])}-{int(bands.ell_high[-1])}", "caveat": COMPONENT_SEPARATION_CAVEAT}
    label = f"sky: measured TT spectrum (l {details['multipoles']}) at {ghz:.3g} GHz"
    limit = AnisotropyLimit("anisotropy", label, sky.mass_eV, epsilon, reasons=reasons, noisy=noisy,
                            extra={"q_hat": np.where(reasons == "", q_hat, 0.0),
                                   "q_sigma": np.where(reasons == "", q_sigma, 0.0),
                                   "noise_exceeds_signal": noisy.astype(float)}, details=details, **common)
    edges = []
    for sign, name in ((1, "anisotropy_low"), (-1, "anisotropy_high")):
        edge = delta_chi2_limit(conversion + sign * error, residual, sigma, threshold)[0]
        edges.append(AnisotropyLimit(name, f"{label}, signal {'+' if sign > 0 else '-'}1 sigma", sky.mass_eV, edge,
                                     reasons=_reasons(spectra, edge, "the signal spectrum minus 1 sigma is not "
                                                      "positive in any band"), **common))
    return limit, edges[0], edges[1]


def delta_chi2_limit(conversion, residual, sigma, threshold):
    """(epsilon_max, q_hat, sigma_q, share) per mass of the linear model residual = conversion q, q = epsilon^4.

    ``conversion`` (bands, masses): D_b of the conversion at epsilon = 1 (negative values, which no
    conversion spectrum has, count as 0); ``residual``, ``sigma`` (bands): data minus model and errors.
    ``share``: each band's part of sum c_b^2 / s_b^2. epsilon_max is inf where no band has c_b > 0.
    """
    c = np.clip(np.asarray(conversion, dtype=float), 0.0, None) / sigma[:, None]
    r = (residual / sigma)[:, None]
    information = (c**2).sum(axis=0)
    constrained = information > 0
    safe = np.where(constrained, information, 1.0)
    q_hat = (c * r).sum(axis=0) / safe
    q_sigma = 1.0 / np.sqrt(safe)
    q_max = np.where(q_hat >= 0, q_hat + np.sqrt(threshold) * q_sigma,
                     q_hat + np.sqrt(q_hat**2 + threshold * q_sigma**2))
    epsilon = np.where(constrained, np.clip(q_max, 0.0, None) ** 0.25, np.inf)
    return epsilon, np.where(constrained, q_hat, np.nan), np.where(constrained, q_sigma, np.inf), c**2 / safe


def rms_limit(sky, omega0_eV, threshold=None, spectra=None):
    """The quick look: epsilon_max = sqrt(threshold / signal rms of dT/T at epsilon = 1)."""
    from raytrace.sky.spectra import sky_spectra

    threshold = ISOTROPY_LEVEL if threshold is None else threshold
    if not (np.isfinite(threshold) and threshold > 0):
        raise InputError(f"threshold: expected a positive dT/T level, got {threshold!r}")
    omega0 = _photon_energy(omega0_eV)
    spectra = sky_spectra(sky) if spectra is None else spectra
    factor = _response(omega0)
    rms = spectra.rms()[0] * factor

    def limit(value):
        with np.errstate(divide="ignore"):
            return np.where(value > 0, np.sqrt(threshold / np.where(value > 0, value, 1.0)), np.inf)

    epsilon = limit(rms)
    reasons = _reasons(spectra, epsilon, "signal variance not positive (noise only)")
    return AnisotropyLimit("anisotropy_rms", f"sky quick look: signal rms < {_short(threshold)} in dT/T at "
                           f"{frequency_label(omega0)}", sky.mass_eV, epsilon, "signal rms", omega0, _sky_details(sky),
                           reasons=reasons, extra={"signal_rms_dT_T": rms},
                           details={"threshold": float(threshold)})


def table_limit(sky, omega0_eV, cl_limits, spectra=None):
    """epsilon_max = min over resolved l of (limit_l / C_l^signal)^(1/4), C_l of dT/T at epsilon = 1."""
    from raytrace.sky.spectra import resolved_lmax, sky_spectra

    omega0 = _photon_energy(omega0_eV)
    if isinstance(cl_limits, (str, Path)):
        source, table = Path(cl_limits).name, read_cl_limits(cl_limits)
    else:
        source, table = "a given table", np.asarray(cl_limits, dtype=float)
        if table.ndim != 2 or table.shape[1] != 2 or np.any(table[:, 1] <= 0) or np.any(table[:, 0] < 1):
            raise InputError("cl_limits: expected rows of (l >= 1, positive C_l limit)")
    spectra = sky_spectra(sky) if spectra is None else spectra
    ells = table[:, 0].astype(int)
    keep = ells <= min(resolved_lmax(sky.nside), spectra.lmax)
    signal = spectra.cross[ells[keep]] * _response(omega0) ** 2
    with np.errstate(divide="ignore", invalid="ignore"):
        ratio = np.where(signal > 0, table[keep, 1][:, None] / signal, np.inf)
    epsilon = np.min(ratio, axis=0, initial=np.inf) ** 0.25
    reasons = _reasons(spectra, epsilon, "the signal spectrum is not positive at any l of the table")
    return AnisotropyLimit("anisotropy_cl", f"sky: C_l limits from {source} at {frequency_label(omega0)}",
                           sky.mass_eV, epsilon, "C_l table", omega0, _sky_details(sky), reasons=reasons,
                           details={"cl_limits": source})


def read_cl_limits(path):
    """A two-column text table (l, C_l upper limit in (dT/T)^2), '#' comments."""
    path = Path(path)
    try:
        table = np.loadtxt(path, comments="#", ndmin=2)
    except FileNotFoundError:
        raise InputError(f"{path}: C_l limit table not found") from None
    except ValueError as error:
        raise InputError(f"{path}: cannot read as two columns l, C_l limit ({error})") from None
    if table.shape[1] != 2:
        raise InputError(f"{path}: expected two columns (l, C_l limit), found {table.shape[1]}")
    if not np.all(np.isfinite(table)) or np.any(table[:, 1] <= 0) or np.any(table[:, 0] < 1):
        raise InputError(f"{path}: expected l >= 1 and positive finite limits")
    return table


# -- internals ------------------------------------------------------------------


def _photon_energy(omega0_eV):
    return DEFAULT_PHOTON_ENERGY_EV if omega0_eV is None else float(require_positive_finite(omega0_eV, "omega0_eV"))


def _response(omega0_eV):
    """|dT/T| per eV of K at epsilon = 1: g(x) / omega_0 (PHYSICS.md sections 2 and 6)."""
    return anisotropy_per_probability(omega0_eV) / omega0_eV


def _reasons(spectra, epsilon, otherwise):
    from raytrace.sky.spectra import FLAT_LEVEL

    flat = f"no anisotropy at this mass (flat map: rms below {FLAT_LEVEL:g} of the mean)"
    return np.where(spectra.flat, flat, np.where(np.isfinite(epsilon), "", otherwise))


def _sky_details(sky):
    return {"nside": sky.nside, "sky_seed": int(sky.run.get("seed", 0)), "sky_z_max": float(sky.run["z_max"]),
            "rays_per_pixel": int(sky.run.get("rays_per_pixel", 1))}


def _short(value):
    """1e-05 -> 1e-5: numbers as people write them in a legend."""
    return f"{value:.3g}".replace("e-0", "e-").replace("e+0", "e+")

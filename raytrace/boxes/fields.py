"""Synthetic density fields: linear power spectrum, growth factor, Gaussian and
log-normal random fields on a periodic grid.

In: a cosmology (any astropy FLRW, default Planck18), sigma_8 and n_s, a grid
(cells per side, comoving side length in Mpc), a redshift and a seed.
Out: the linear matter power spectrum P(k, z) in Mpc^3 with the Eisenstein &
Hu (1998, ApJ 496, 605) no-wiggle transfer function, the linear growth factor
D(z) / D(0), a Gaussian random field with a given spectrum, and a log-normal
(Coles & Jones 1991, MNRAS 248, 1) overdensity n / nbar with mean 1, float32.

Conventions. k is in 1/Mpc (comoving, no h) and P in Mpc^3, with
<delta(k) delta*(k')> = (2 pi)^3 delta_D(k - k') P(k). On the grid the discrete
Fourier modes of a field of N^3 cells of volume V_cell obey
<|delta_k|^2> = N^3 P(k) / V_cell (numpy's unnormalised forward FFT).

The log-normal field 1 + delta = exp(g) / <exp(g)> is built so that its own
correlation function is the target xi(r) of the (optionally smoothed) linear
spectrum: the Gaussian field g gets xi_g = ln(1 + xi), the choice that makes
the transform exact for the two-point function (Coles & Jones 1991, whose
exp(xi_g) - 1 = xi; common practice in log-normal mocks). xi is taken on the
periodic grid itself (inverse FFT of the spectrum sampled at the grid's
wavenumbers), so the grid's own periodicity and resolution are respected.
Where ln(1 + xi) has negative Fourier power (a field too non-linear for a
log-normal model) that power is set to zero and a warning says how much of
the variance it held.

Mean: the field is divided by its own grid mean, so the box mean is 1 exactly
(the box is the region whose mean density nbar is). The textbook
exp(g - sigma_g^2 / 2) has mean 1 only on average over realisations: at z = 0
in a 100 cMpc/h box of 64^3 cells one realisation's mean is off by ~3-5 %.

Smoothing: the target spectrum is multiplied by exp(-k^2 R^2), a Gaussian
window exp(-k^2 R^2 / 2) on the field with R = smoothing_cells cell sizes.
About one cell removes the power the grid cannot resolve, which otherwise the
exponential maps into a spiky, aliased field (common practice, no source).

The white noise that sets the phases depends only on the seed and the grid, so
every redshift drawn with the same seed is the same realisation, its
fluctuations grown by D(z).
"""

import warnings
from functools import lru_cache

import numpy as np
from scipy.integrate import simpson, solve_ivp
from scipy.interpolate import CubicSpline

from raytrace.core.errors import InputError, require_positive_finite
from raytrace.physics.cosmology import Cosmology

#: Planck 2018 (Paper VI, Table 2, TT,TE,EE+lowE+lensing+BAO), from memory; the
#: same values astropy stores in Planck18.meta and CAMB gives sigma_8 = 0.8100
#: for A_s = 2.105e-9 (tests/test_fields.py).
PLANCK18_SIGMA8 = 0.8102
PLANCK18_SPECTRAL_INDEX = 0.9665

#: Highest redshift of the growth-factor table. The ODE starts at decoupling
#: (z = 1000), after which baryons fall into the dark matter's wells; starting
#: from D = a while radiation is still a third of matter costs < 0.2 % at z = 100.
GROWTH_Z_MAX = 100.0
_GROWTH_Z_START = 1000.0
_SIGMA8_RADIUS_MPC_H = 8.0


def _as_cosmology(cosmology):
    return cosmology if isinstance(cosmology, Cosmology) else Cosmology(cosmology)


# -- transfer function and power spectrum ------------------------------------------
def eh98_no_wiggle_transfer(k_per_Mpc, cosmology=None):
    """Eisenstein & Hu (1998) no-wiggle matter transfer function T(k), eqs. 26-31.

    ``k_per_Mpc``: comoving wavenumbers in 1/Mpc. Baryons suppress the power
    below the sound horizon; the acoustic oscillations are left out. Omega_0 is
    the cosmology's cold dark matter plus baryons (astropy's Om0); massive
    neutrinos do not enter the shape.
    """
    cosmology = _as_cosmology(cosmology)
    k = _check_wavenumbers(k_per_Mpc)
    astropy = cosmology.astropy
    t_cmb = float(astropy.Tcmb0.to_value("K"))
    if not t_cmb > 0:
        raise InputError(
            "cosmology: the transfer function needs the CMB temperature; the astropy "
            "cosmology has Tcmb0 = 0 (give e.g. Tcmb0=2.7255)"
        )
    h = cosmology.h
    omh2 = float(astropy.Om0) * h * h
    obh2 = float(astropy.Ob0 or 0.0) * h * h
    f_b = obh2 / omh2
    theta2 = (t_cmb / 2.7) ** 2
    sound_horizon = 44.5 * np.log(9.83 / omh2) / np.sqrt(1.0 + 10.0 * obh2**0.75)  # Mpc, eq. 26
    alpha = 1.0 - 0.328 * np.log(431.0 * omh2) * f_b + 0.38 * np.log(22.3 * omh2) * f_b**2  # eq. 31
    shape = alpha + (1.0 - alpha) / (1.0 + (0.43 * k * sound_horizon) ** 4)  # Gamma_eff / (Omega_0 h), eq. 30
    q = k * theta2 / (omh2 * shape)  # eq. 28 with k in 1/Mpc
    log_term = np.log(2.0 * np.e + 1.8 * q)
    return log_term / (log_term + (14.2 + 731.0 / (1.0 + 62.5 * q)) * q * q)  # eq. 29


def linear_power(k_per_Mpc, z=0.0, cosmology=None, sigma8=None, n_s=None):
    """Linear matter power spectrum P(k, z) in Mpc^3 at comoving k in 1/Mpc.

    P = A k^n_s T(k)^2 D(z)^2 with the no-wiggle transfer function, A fixed by
    sigma_8 (top hat of 8 Mpc/h at z = 0). ``sigma8`` and ``n_s`` default to the
    cosmology's own (astropy's ``meta``, as Planck18 carries them), else Planck
    2018's 0.8102 and 0.9665. ``z`` is a scalar in [0, GROWTH_Z_MAX].
    """
    cosmology = _as_cosmology(cosmology)
    sigma8, n_s = _spectrum_parameters(cosmology, sigma8, n_s)
    k = _check_wavenumbers(k_per_Mpc)
    growth = growth_factor(z, cosmology)
    amplitude = (sigma8 / _unit_amplitude_sigma8(cosmology, n_s)) ** 2
    return amplitude * growth**2 * _shape(k, cosmology, n_s)


def _shape(k, cosmology, n_s):
    """k^n_s T(k)^2: the spectrum for unit amplitude (zero at k = 0)."""
    return k**n_s * eh98_no_wiggle_transfer(k, cosmology) ** 2


@lru_cache(maxsize=32)
def _unit_amplitude_sigma8(cosmology, n_s):
    """sigma_8 of A = 1: sigma^2 = int dln k k^3 P W^2(kR) / (2 pi^2), W the top hat."""
    ln_k = np.linspace(np.log(1e-6), np.log(1e2), 8001)
    k = np.exp(ln_k)
    x = k * _SIGMA8_RADIUS_MPC_H / cosmology.h
    top_hat = 3.0 * (np.sin(x) - x * np.cos(x)) / x**3
    integrand = k**3 * _shape(k, cosmology, n_s) * top_hat**2 / (2.0 * np.pi**2)
    return float(np.sqrt(simpson(integrand, x=ln_k)))


def _spectrum_parameters(cosmology, sigma8, n_s):
    meta = getattr(cosmology.astropy, "meta", None) or {}
    if sigma8 is None:
        sigma8 = meta.get("sigma8", PLANCK18_SIGMA8)
    if n_s is None:
        n_s = meta.get("n", PLANCK18_SPECTRAL_INDEX)
    sigma8 = float(require_positive_finite(sigma8, "sigma8"))
    try:
        n_s = float(n_s)
    except (TypeError, ValueError):
        raise InputError(f"n_s: expected a number, got {n_s!r}") from None
    if not 0.5 < n_s < 1.5:
        raise InputError(f"n_s: expected a spectral index between 0.5 and 1.5, got {n_s!r}")
    return sigma8, n_s


def _check_wavenumbers(k_per_Mpc):
    k = np.asarray(k_per_Mpc, dtype=float)
    if np.any(~np.isfinite(k)) or np.any(k < 0):
        raise InputError("k_per_Mpc: expected finite wavenumbers >= 0 in 1/Mpc")
    return k


# -- growth factor -----------------------------------------------------------------
def growth_factor(z, cosmology=None):
    """Linear growth factor D(z) / D(0) of matter (cold dark matter plus baryons).

    Solves D'' + (2 + d ln E / d ln a) D' = (3/2) Omega_m(a) D in ln a with the
    cosmology's own E(z) (radiation, neutrinos and any dark-energy equation of
    state astropy knows), dark energy not clustering; starts from D = a at
    z = 1000. Valid for 0 <= z <= GROWTH_Z_MAX; for Planck18 within 0.2 % of
    CAMB's sigma_8(z) / sigma_8(0) up to z = 100 (3e-4 at z <= 6).
    """
    z = np.asarray(z, dtype=float)
    if np.any(~np.isfinite(z)) or np.any(z < 0) or np.any(z > GROWTH_Z_MAX):
        raise InputError(f"redshift: expected values in [0, {GROWTH_Z_MAX:g}] for the growth factor, got {z!r}")
    return _growth_table(_as_cosmology(cosmology))(np.log1p(z))


@lru_cache(maxsize=16)
def _growth_table(cosmology):
    """Cubic spline of D(z)/D(0) in u = ln(1 + z) = -ln a."""
    astropy = cosmology.astropy
    om0 = float(astropy.Om0)
    step = 1e-4  # central difference of ln E in ln a: error ~ step^2

    def ln_e(ln_a):
        return np.log(astropy.efunc(np.expm1(-ln_a)))

    def rhs(ln_a, y):
        z = np.expm1(-ln_a)
        omega_m = om0 * (1.0 + z) ** 3 / astropy.efunc(z) ** 2
        dln_e = (ln_e(ln_a + step) - ln_e(ln_a - step)) / (2.0 * step)
        return [y[1], -(2.0 + dln_e) * y[1] + 1.5 * omega_m * y[0]]

    a_start = 1.0 / (1.0 + _GROWTH_Z_START)
    u = np.linspace(0.0, np.log1p(GROWTH_Z_MAX), 801)
    solution = solve_ivp(
        rhs, (np.log(a_start), 0.0), [a_start, a_start], t_eval=-u[::-1], rtol=1e-10, atol=1e-14, method="DOP853"
    )
    growth = solution.y[0][::-1]
    return CubicSpline(u, growth / growth[0])


# -- random fields on a periodic grid ----------------------------------------------
def gaussian_field(n_cells, box_size_cMpc, power_Mpc3, seed):
    """A Gaussian random field on an n_cells^3 periodic grid, float64, mean zero.

    ``power_Mpc3`` is a callable P(k) in Mpc^3 of comoving k in 1/Mpc (e.g.
    ``lambda k: linear_power(k, 6.0)``); ``box_size_cMpc`` the comoving side.
    The k = 0 mode is zero, so the grid mean is exactly zero.
    """
    n, box = _check_grid(n_cells, box_size_cMpc)
    seed = _check_seed(seed)
    k = _grid_wavenumbers(n, box)
    power = np.asarray(power_Mpc3(k), dtype=float)
    if power.shape != k.shape or np.any(~np.isfinite(power)) or np.any(power < 0):
        raise InputError("power_Mpc3: expected a function returning finite P(k) >= 0 for an array of k")
    return _realise(_white_noise_modes(n, seed), power, (box / n) ** 3)


def lognormal_overdensity(
    n_cells, box_size_cMpc, redshift, seed, smoothing_cells=1.0, cosmology=None, sigma8=None, n_s=None
):
    """Log-normal overdensity 1 + delta = exp(g) / <exp(g)> on an n_cells^3 grid, float32.

    Its two-point function is that of the linear matter spectrum at
    ``redshift`` (a number in [0, GROWTH_Z_MAX]), smoothed by a Gaussian of
    ``smoothing_cells`` cells (see the module notes); its grid mean is 1 and
    every value is positive. The same ``seed`` gives the same realisation at
    every redshift.
    """
    n, box = _check_grid(n_cells, box_size_cMpc)
    try:
        redshift = float(redshift)
    except (TypeError, ValueError):
        raise InputError(f"redshift: expected one number, got {redshift!r}") from None
    seed = _check_seed(seed)
    smoothing_cells = float(smoothing_cells)
    if not (np.isfinite(smoothing_cells) and smoothing_cells >= 0):
        raise InputError(f"smoothing_cells: expected a number of cells >= 0, got {smoothing_cells!r}")
    cosmology = _as_cosmology(cosmology)
    cell_volume = (box / n) ** 3
    k = _grid_wavenumbers(n, box)
    radius = smoothing_cells * box / n
    target = linear_power(k, redshift, cosmology, sigma8, n_s) * np.exp(-((k * radius) ** 2))
    xi = np.fft.irfftn(target, s=(n, n, n), axes=(0, 1, 2)) / cell_volume
    if xi.min() <= -1.0:
        raise InputError(
            f"redshift {redshift:g}: the correlation function reaches {xi.min():.3f} <= -1 on this grid; "
            "no log-normal field has it (use a larger box or more smoothing_cells)"
        )
    gaussian_power = np.fft.rfftn(np.log1p(xi)).real * cell_volume
    del xi
    gaussian_power[0, 0, 0] = 0.0
    negative = np.minimum(gaussian_power, 0.0)
    variance = _full_sum(gaussian_power) / box**3
    clipped = -_full_sum(negative) / box**3
    if clipped > 1e-3 * variance:
        warnings.warn(
            f"lognormal_overdensity: {clipped / variance:.2%} of the Gaussian field's variance has negative "
            f"power at z = {redshift:g} and is set to zero; the field's spectrum falls short of the target",
            stacklevel=2,
        )
    np.maximum(gaussian_power, 0.0, out=gaussian_power)
    field = _realise(_white_noise_modes(n, seed), gaussian_power, cell_volume)
    np.exp(field, out=field)
    field /= field.mean()
    return field.astype(np.float32)


def _check_grid(n_cells, box_size_cMpc):
    if isinstance(n_cells, bool) or not isinstance(n_cells, (int, np.integer)) or n_cells < 2:
        raise InputError(f"n_cells: expected a whole number of cells per side >= 2, got {n_cells!r}")
    box = float(require_positive_finite(box_size_cMpc, "box_size_cMpc"))
    return int(n_cells), box


def _check_seed(seed):
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise InputError(f"seed: expected a whole number >= 0, got {seed!r}")
    return int(seed)


def _grid_wavenumbers(n, box):
    """|k| in 1/Mpc on the half grid of numpy's rfftn, shape (n, n, n // 2 + 1)."""
    full = 2.0 * np.pi * np.fft.fftfreq(n, d=box / n)
    half = 2.0 * np.pi * np.fft.rfftfreq(n, d=box / n)
    return np.sqrt(full[:, None, None] ** 2 + full[None, :, None] ** 2 + half[None, None, :] ** 2)


def _white_noise_modes(n, seed):
    """Fourier modes of unit white noise: Hermitian by construction, <|w_k|^2> = n^3."""
    noise = np.random.default_rng(seed).standard_normal((n, n, n))
    return np.fft.rfftn(noise)


def _realise(modes, power, cell_volume):
    """The real field whose modes are the white-noise modes times sqrt(P / V_cell)."""
    modes *= np.sqrt(power / cell_volume)
    n = modes.shape[0]
    return np.fft.irfftn(modes, s=(n, n, n), axes=(0, 1, 2))


def _full_sum(half):
    """Sum over the full Fourier grid of a Hermitian-symmetric quantity stored on the rfftn half grid."""
    n = half.shape[0]
    # Planes kz = 0 and (for even n) kz = n/2 are their own mirror images; the rest count twice.
    total = 2.0 * half.sum() - half[..., 0].sum()
    if n % 2 == 0:
        total -= half[..., -1].sum()
    return float(total)

"""Mean ionisation history x_e(z) = n_e / n_H (PHYSICS.md section 5).

In: a cosmology and either CAMB's recombination (RECFAST, Seager, Sasselov &
Scott 1999) with tanh reionisation (Lewis 2008), a user's (z, x_e) text table,
or a constant. Out: x_e(z), d ln x_e / d ln(1+z) and the helium mass fraction
Y_p, all immutable. CAMB runs once per parameter set (cached).
"""

from functools import lru_cache
from pathlib import Path

import numpy as np
from scipy.interpolate import CubicSpline

from raytrace.core.errors import InputError
from raytrace.physics.cosmology import Z_TABLE_MAX, Cosmology

#: Optical depth to reionisation of Planck 2018 (TT,TE,EE+lowE+lensing+BAO; the
#: parameter set of astropy's Planck18).
PLANCK18_OPTICAL_DEPTH = 0.0561
#: Y_p used with a table or a constant when none is given: CAMB's BBN-consistent
#: value for Omega_b h^2 = 0.0224 (common practice, no source beyond CAMB itself).
DEFAULT_HELIUM_FRACTION = 0.2454

_GRID = np.linspace(0.0, np.log1p(Z_TABLE_MAX), 12001)


class IonisationHistory:
    """x_e(z) tabulated on a grid in u = ln(1+z) and interpolated with a cubic spline.

    Build with :meth:`from_camb`, :meth:`from_table` or :meth:`constant`.
    """

    __slots__ = ("_u", "_ln_xe", "_spline", "helium_fraction", "description")

    def __init__(self, z, x_e, helium_fraction, description):
        z = np.asarray(z, dtype=float)
        x_e = np.asarray(x_e, dtype=float)
        u = np.log1p(z)
        spline = CubicSpline(u, np.log(x_e))
        for name, value in (
            ("_u", u),
            ("_ln_xe", np.log(x_e)),
            ("_spline", spline),
            ("helium_fraction", float(helium_fraction)),
            ("description", str(description)),
        ):
            object.__setattr__(self, name, value)

    def __setattr__(self, name, value):
        raise AttributeError("IonisationHistory objects are immutable")

    def __delattr__(self, name):
        raise AttributeError("IonisationHistory objects are immutable")

    def __reduce__(self):
        return (IonisationHistory, (np.expm1(self._u), np.exp(self._ln_xe), self.helium_fraction, self.description))

    def __repr__(self):
        return f"IonisationHistory({self.description})"

    @property
    def z_max(self):
        return float(np.expm1(self._u[-1]))

    def _u_of(self, z):
        z = np.asarray(z, dtype=float)
        if np.any(~np.isfinite(z)) or np.any(z < np.expm1(self._u[0]) - 1e-12) or np.any(z > self.z_max * (1 + 1e-12)):
            raise InputError(
                f"redshift: the ionisation history ({self.description}) covers "
                f"z = {np.expm1(self._u[0]):g} to {self.z_max:g}; got values outside"
            )
        return np.log1p(z)

    def x_e(self, z):
        """Free electrons per hydrogen nucleus at redshift z."""
        return np.exp(self._spline(self._u_of(z)))

    def dln_xe_dln1pz(self, z):
        """d ln x_e / d ln(1+z): the exact derivative of the interpolant."""
        return self._spline(self._u_of(z), 1)

    def tables(self):
        """``(u, ln_xe)`` on the internal grid (copies), for inspection and provenance."""
        return self._u.copy(), self._ln_xe.copy()

    # -- constructors -----------------------------------------------------------
    @classmethod
    def from_camb(
        cls,
        cosmology=None,
        optical_depth=None,
        reionisation_redshift=None,
        helium_fraction=None,
        helium_reionisation=True,
    ):
        """Recombination and tanh reionisation from CAMB.

        Give either ``optical_depth`` (default Planck 2018's 0.0561) or
        ``reionisation_redshift``; ``helium_fraction`` (Y_p) defaults to CAMB's
        BBN-consistent value; ``helium_reionisation`` switches the second helium
        reionisation (z ~ 3.5) on or off.
        """
        cosmology = cosmology if isinstance(cosmology, Cosmology) else Cosmology(cosmology)
        if optical_depth is not None and reionisation_redshift is not None:
            raise InputError("ionisation: give optical_depth or reionisation_redshift, not both")
        if optical_depth is None and reionisation_redshift is None:
            optical_depth = PLANCK18_OPTICAL_DEPTH
        if optical_depth is not None and not (0.0 < optical_depth < 0.5):
            raise InputError(f"optical_depth: expected a value in (0, 0.5), got {optical_depth!r}")
        if reionisation_redshift is not None and not (0.0 < reionisation_redshift < 50.0):
            raise InputError(f"reionisation_redshift: expected a value in (0, 50), got {reionisation_redshift!r}")
        if helium_fraction is not None and not (0.0 <= helium_fraction < 1.0):
            raise InputError(f"helium_fraction: expected Y_p in [0, 1), got {helium_fraction!r}")
        return _camb_history(
            _camb_cosmology_key(cosmology.astropy),
            None if optical_depth is None else float(optical_depth),
            None if reionisation_redshift is None else float(reionisation_redshift),
            None if helium_fraction is None else float(helium_fraction),
            bool(helium_reionisation),
        )

    @classmethod
    def from_table(cls, path, helium_fraction=DEFAULT_HELIUM_FRACTION):
        """Read a two-column text table (z, x_e); '#' starts a comment."""
        path = Path(path)
        try:
            table = np.loadtxt(path, comments="#", ndmin=2)
        except FileNotFoundError:
            raise InputError(f"{path}: ionisation table not found") from None
        except (ValueError, OSError) as error:
            raise InputError(f"{path}: cannot read as a two-column text table of z, x_e ({error})") from None
        if table.ndim != 2 or table.shape[1] != 2 or table.shape[0] < 4:
            raise InputError(
                f"{path}: expected at least 4 rows of two columns (z, x_e), got shape {table.shape}"
            )
        z, x_e = table[:, 0], table[:, 1]
        if not np.all(np.isfinite(table)):
            raise InputError(f"{path}: the table holds NaN or inf")
        if np.any(np.diff(z) <= 0) or z[0] < 0:
            raise InputError(f"{path}: redshifts must be >= 0 and strictly increasing")
        if np.any(x_e <= 0):
            raise InputError(f"{path}: x_e must be positive (the tool works with ln x_e)")
        return cls(z, x_e, helium_fraction, f"table {path.name}")

    @classmethod
    def constant(cls, x_e, helium_fraction=DEFAULT_HELIUM_FRACTION):
        """A constant ionisation fraction at every redshift."""
        if not (np.isfinite(x_e) and x_e > 0):
            raise InputError(f"x_e: expected a positive constant, got {x_e!r}")
        z = np.expm1(_GRID[::100])
        return cls(z, np.full_like(z, float(x_e)), helium_fraction, f"constant x_e = {x_e:g}")


def _camb_cosmology_key(astropy_cosmology):
    """The parameters CAMB needs, as a hashable tuple (the cache key)."""
    h = float(astropy_cosmology.h)
    m_nu = astropy_cosmology.m_nu
    mnu = float(np.sum(m_nu.to_value("eV"))) if m_nu is not None else 0.0
    Odm0 = float(astropy_cosmology.Odm0)
    return (
        100.0 * h,
        float(astropy_cosmology.Ob0) * h * h,
        Odm0 * h * h,
        mnu,
        float(astropy_cosmology.Neff),
        float(astropy_cosmology.Tcmb0.to_value("K")),
        float(astropy_cosmology.Ok0),
        str(astropy_cosmology.name),
    )


@lru_cache(maxsize=16)
def _camb_history(key, optical_depth, reionisation_redshift, helium_fraction, helium_reionisation):
    import camb

    H0, ombh2, omch2, mnu, nnu, tcmb, omk, name = key
    params = camb.CAMBparams()
    kwargs = dict(H0=H0, ombh2=ombh2, omch2=omch2, mnu=mnu, nnu=nnu, TCMB=tcmb, omk=omk)
    if helium_fraction is not None:
        kwargs["YHe"] = helium_fraction
    if optical_depth is not None:
        kwargs["tau"] = optical_depth
    else:
        kwargs["zrei"] = reionisation_redshift
    try:
        params.set_cosmology(**kwargs)
    except Exception as error:  # CAMB raises its own types for bad parameters
        raise InputError(f"ionisation: CAMB refused the parameters {kwargs} ({error})") from None
    params.Reion.include_helium_fullreion = helium_reionisation
    results = camb.get_background(params)
    z = np.expm1(_GRID)
    x_e = np.asarray(results.get_background_redshift_evolution(z, ["x_e"], format="array"))[:, 0]
    if optical_depth is not None:
        reion = f"tau = {optical_depth:g} (z_re = {results.Params.Reion.redshift:.3f})"
    else:
        reion = f"z_re = {reionisation_redshift:g}"
    description = f"CAMB {camb.__version__} for {name}, {reion}, Y_p = {params.YHe:.4f}"
    return IonisationHistory(z, x_e, params.YHe, description)

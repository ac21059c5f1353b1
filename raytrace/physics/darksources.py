"""Sources of dark photons: what a dark-radiation background is made of (PHYSICS.md section 11).

In: a decaying dark-matter species (mass, lifetime, share of the dark matter) or a
user's table of the emission rate per comoving volume, time and energy against
redshift. Out: the source's dark photons that reach an observer, per energy today,
weighted by the kernel K between the observer and their emission (the conversion
probability over f_T epsilon^2 / omega_0): :meth:`dark_photons`, which
:mod:`raytrace.darkradiation` turns into photons; :func:`read_emission_table` reads
a table from a text file whose header states its units.
"""

from dataclasses import dataclass, field

import numpy as np

from raytrace.core.errors import InputError, float_array, require_number, require_positive_finite


@dataclass(frozen=True)
class DecayingDarkMatter:
    """Dark matter of mass ``mass_eV`` (M), lifetime ``lifetime_s`` (tau) and share ``fraction`` (f_DM) of
    the dark matter, each particle decaying into two dark photons of energy M/2."""

    mass_eV: float
    lifetime_s: float
    fraction: float = 1.0

    def __post_init__(self):
        object.__setattr__(self, "mass_eV", require_number(self.mass_eV, "source mass (--source-mass)", above=0))
        object.__setattr__(self, "lifetime_s", require_number(self.lifetime_s, "lifetime (--lifetime)", above=0,
                                                              expected="a positive lifetime in s"))
        object.__setattr__(self, "fraction", require_number(self.fraction, "dark-matter fraction (--fraction)",
                                                            above=0, at_most=1, expected="a fraction in (0, 1]"))

    def describe(self):
        return {"kind": "decaying dark matter", "mass_eV": self.mass_eV, "lifetime_s": self.lifetime_s,
                "fraction": self.fraction}

    def highest_energy_eV(self):
        """The most energetic dark photon today: M/2 (emitted at z = 0)."""
        return 0.5 * self.mass_eV

    def earliest_emission(self, omega0, z_end):
        """The highest emission redshift of a dark photon seen today at ``omega0``: 1 + z_e = M / (2 omega_0)."""
        return np.minimum(self.mass_eV / (2.0 * omega0) - 1.0, z_end)

    def dark_photons(self, omega0, z_obs, z_end, cosmology, between):
        """Converted photons per comoving volume per energy today, over f_T epsilon^2: (rows, energies, masses).

        ``between(z_obs, z_e)``: K between the two redshifts (rows, energies, masses). Energies whose
        emission lies outside (z_obs, z_end] give 0.
        """
        z_e = self.mass_eV / (2.0 * omega0) - 1.0
        inside = (z_e > z_obs) & (z_e <= z_end)
        z_in = np.where(inside, z_e, z_obs)
        density = self.fraction * dark_matter_density_eV_cm3(cosmology) / self.mass_eV
        rate = 2.0 * density / self.lifetime_s * np.exp(-cosmic_time_s(cosmology, z_in) / self.lifetime_s)
        per_energy = np.where(inside, rate / (cosmology.hubble_per_s(z_in) * omega0), 0.0)
        return per_energy[None, :, None] * between(z_obs, z_in) / omega0[None, :, None]


@dataclass(frozen=True)
class TabulatedSource:
    """A user's emission of dark photons: rate per comoving volume, time and emitted energy,
    ``rate`` (redshifts, energies) in cm^-3 s^-1 eV^-1 at ``redshift`` x ``energy_eV`` (both increasing);
    bilinear in (ln(1+z), ln energy), zero outside the table."""

    redshift: np.ndarray
    energy_eV: np.ndarray
    rate: np.ndarray
    name: str = "table"
    steps: int = field(default=2048)

    def __post_init__(self):
        z = float_array(self.redshift, f"{self.name}: redshift")
        energy = require_positive_finite(self.energy_eV, f"{self.name}: energy")
        rate = float_array(self.rate, f"{self.name}: rate")
        for values, what in ((z, "redshifts"), (energy, "energies")):
            if values.ndim != 1 or values.size < 2 or np.any(np.diff(values) <= 0):
                raise InputError(f"{self.name}: the {what} must be at least two, strictly increasing")
        if z[0] < 0 or rate.shape != (z.size, energy.size) or not np.all(np.isfinite(rate)) or np.any(rate < 0):
            raise InputError(f"{self.name}: expected redshifts >= 0 and a finite rate >= 0 on the redshift x "
                             f"energy grid ({z.size} x {energy.size}), got shape {rate.shape}")
        for name, value in (("redshift", z), ("energy_eV", energy), ("rate", rate)):
            object.__setattr__(self, name, value)

    def describe(self):
        return {"kind": "emission table", "name": self.name, "redshift_range": [self.redshift[0], self.redshift[-1]],
                "energy_range_eV": [self.energy_eV[0], self.energy_eV[-1]]}

    def highest_energy_eV(self):
        return float(self.energy_eV[-1])

    def earliest_emission(self, omega0, z_end):
        return np.full(np.shape(omega0), min(z_end, float(self.redshift[-1])))

    def dark_photons(self, omega0, z_obs, z_end, cosmology, between):
        """As :meth:`DecayingDarkMatter.dark_photons`: the integral over the emission redshift z of
        S(z, omega_0 (1+z)) f_T epsilon^2 K(z_obs, z) / (H(z) omega_0), over f_T epsilon^2 (trapezoid in ln(1+z))."""
        from scipy.interpolate import RegularGridInterpolator

        top = min(z_end, float(self.redshift[-1]))
        if top <= z_obs:
            raise InputError(f"{self.name}: the table's redshifts end at {self.redshift[-1]:g}, not above the "
                             f"observer's z_obs = {z_obs:g}")
        u = np.linspace(np.log1p(max(z_obs, self.redshift[0])), np.log1p(top), self.steps)
        z = np.expm1(u)
        table = RegularGridInterpolator((np.log1p(self.redshift), np.log(self.energy_eV)), self.rate,
                                        bounds_error=False, fill_value=0.0)
        emitted = np.log(np.outer(1.0 + z, omega0))
        rate = table(np.stack([np.broadcast_to(u[:, None], emitted.shape), emitted], axis=-1))
        trapezoid = np.full(u.size, u[1] - u[0])
        trapezoid[[0, -1]] *= 0.5
        # dz = (1+z) du; K(z_obs, z) depends on z alone: once per step, then summed against every energy.
        weight = trapezoid[:, None] * rate * (1.0 + z)[:, None] / cosmology.hubble_per_s(z)[:, None] / omega0
        return np.einsum("zf,rzm->rfm", weight, between(z_obs, z))


def dark_matter_density_eV_cm3(cosmology):
    """rho_DM,0 c^2 in eV cm^-3: Omega_dm rho_crit,0 of the astropy cosmology."""
    import astropy.constants as const
    import astropy.units as u

    astropy = cosmology.astropy
    return float((astropy.Odm0 * astropy.critical_density0 * const.c**2).to_value(u.eV / u.cm**3))


def cosmic_time_s(cosmology, z):
    """Proper time since the big bang at redshift ``z``, in s: the age today less the lookback time."""
    return float(cosmology.astropy.age(0).to_value("s")) - cosmology.lookback_time_s(z)


#: The header a table of emission rates states its units in, e.g.
#: ``# columns: redshift, energy eV, rate cm^-3 s^-1 eV^-1`` (any energy or frequency unit; any rate per volume,
#: time and energy); then one row per (redshift, energy) of a full grid, in any order.
TABLE_COLUMNS = ("redshift", "energy", "rate")


def read_emission_table(path):
    """A :class:`TabulatedSource` from a three-column text table (:data:`TABLE_COLUMNS`, units in its header)."""
    import astropy.units as u

    from raytrace.core.errors import require_path

    path = require_path(path, "source table (--source-table)")
    try:
        lines = path.read_text().splitlines()
    except (OSError, UnicodeDecodeError) as error:
        raise InputError(f"{path}: cannot read the source table ({error})") from None
    header = [line.split(":", 1)[1] for line in lines if line.lstrip("# ").lower().startswith("columns:")]
    entries = [entry.strip().split(None, 1) for entry in header[0].split(",")] if len(header) == 1 else []
    if [entry[0].lower() for entry in entries] != list(TABLE_COLUMNS) or any(len(e) != 2 for e in entries[1:]):
        raise InputError(f"{path}: expected one header line '# columns: redshift, energy <unit>, rate <unit>', "
                         "e.g. '# columns: redshift, energy eV, rate cm^-3 s^-1 eV^-1'")
    try:
        energy_unit, rate_unit = (u.Unit(entry[1].replace("^", "**")) for entry in entries[1:])
        if not (energy_unit.is_equivalent(u.eV) or energy_unit.is_equivalent(u.Hz)):
            raise ValueError(f"{energy_unit} is neither an energy nor a frequency")
        to_eV = (1.0 * energy_unit).to_value(u.eV, equivalencies=u.spectral())
        to_rate = (1.0 * rate_unit).to_value(u.cm**-3 / u.s / u.eV)
    except (ValueError, u.UnitConversionError) as error:
        raise InputError(f"{path}: the header's units are not an energy and a rate per volume, time and "
                         f"energy ({error})") from None
    try:
        table = np.loadtxt(path, comments="#", delimiter=None, ndmin=2, converters=None)
    except ValueError as error:
        raise InputError(f"{path}: expected rows of three numbers ({error})") from None
    if table.shape[1] != 3:
        raise InputError(f"{path}: expected three columns, found {table.shape[1]}")
    redshift, energy = np.unique(table[:, 0]), np.unique(table[:, 1]) * to_eV
    if redshift.size * energy.size != len(table):
        raise InputError(f"{path}: the rows are not a full grid of {redshift.size} redshifts x {energy.size} energies")
    grid = np.full((redshift.size, energy.size), np.nan)
    grid[np.searchsorted(redshift, table[:, 0]), np.searchsorted(energy, table[:, 1] * to_eV)] = table[:, 2] * to_rate
    return TabulatedSource(redshift, energy, grid, name=path.name)

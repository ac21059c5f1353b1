"""Measured CMB spectra for the spectral-distortion limit (PHYSICS.md section 6).

In: a text table, either the published FIRAS monopole layout or a plain
three-column table whose header states its units. Out: an immutable
:class:`Spectrum` (frequency in Hz, photon energy in eV, intensity and 1-sigma
in MJy/sr, optional Galaxy template, a description of the source), and the
Planck function B_nu(T) in MJy/sr with its temperature derivative.

Two layouts are read, and units are never guessed:

* **Published monopole layout** (Fixsen et al. 1996, ApJ 473, 576, Table 4, as
  distributed by NASA LAMBDA; the project's copy is ``raytrace/data``): five
  columns, frequency cm^-1, monopole MJy/sr, residual kJy/sr, 1-sigma kJy/sr,
  Galaxy kJy/sr. A file is read this way when it has no ``# columns:`` line and
  its header cites Fixsen (the published table's header always does).

  The intensity used is **2.725 K blackbody + residual** (our Planck function,
  CODATA 2018 constants), not the monopole column. The residual is the figure
  the paper publishes against its 2.725 K reference blackbody; the monopole
  column was computed from it by the distributors with older constants: it
  equals B_nu(2.725 K) + residual to within the 1 kJy/sr rounding only with the
  CODATA 1986 h and k (checked in tests/test_spectrum.py), and differs from our
  B_nu(2.725 K) by up to 7.6 kJy/sr, the same as a 1.6e-5 K shift of T. The
  free temperature of the fit would absorb that shift, so no distortion limit
  depends on the choice, but the fitted T would be biased by about one
  statistical sigma.

* **Plain table**: any number of rows of three numbers (whitespace or commas
  between them), with one header line naming each column and its unit, in any
  order::

      # columns: frequency GHz, intensity MJy/sr, sigma MJy/sr

  The frequency unit is anything astropy converts to Hz with
  ``astropy.units.spectral()`` (GHz, 1/cm, mm, eV); intensity and sigma take
  any unit of spectral radiance per steradian (MJy/sr, kJy/sr, Jy/sr,
  W m^-2 Hz^-1 sr^-1). ``^`` may be written for powers (cm^-1).

Lines starting with ``#`` are comments. Every problem (file missing, no units,
wrong column count, a value that is not a number, NaN, a non-positive sigma or
frequency, fewer than :data:`MIN_ROWS` rows) raises InputError naming the file
and, where there is one, the line and column.
"""

import re
from dataclasses import dataclass
from functools import lru_cache
from importlib import resources
from pathlib import Path

import astropy.constants as _c
import astropy.units as u
import numpy as np

from raytrace.core.errors import InputError, require_path
from raytrace.physics.constants import H_PLANCK_EV_S, K_BOLTZMANN_EV_K

#: The shipped copy of the published FIRAS monopole table.
DEFAULT_SPECTRUM = "cmb_monopole_fixsen1996.txt"
#: Temperature of the reference blackbody of the published residuals (Fixsen et al. 1996, Table 4).
REFERENCE_TEMPERATURE_K = 2.725
#: Fewest rows a spectrum may have: the fit has up to three parameters (T, Galaxy, s) and needs one dof.
MIN_ROWS = 4

_INTENSITY_UNIT = u.MJy / u.sr
_KJY_SR_IN_MJY_SR = (u.kJy / u.sr).to(_INTENSITY_UNIT)
# 2 h / c^2 times 1 Hz^3, in MJy/sr: B_nu = _PLANCK_PREFACTOR nu^3 / (exp(h nu / k T) - 1).
_PLANCK_PREFACTOR = (2.0 * _c.h * u.Hz**3 / _c.c**2).to_value(u.MJy)
_PLAIN_COLUMNS = ("frequency", "intensity", "sigma")
_MONOPOLE_COLUMNS = ("frequency (cm^-1)", "monopole (MJy/sr)", "residual (kJy/sr)", "sigma (kJy/sr)", "Galaxy (kJy/sr)")
_HEADER = re.compile(r"^\s*columns\s*:(.*)$", re.IGNORECASE)


def planck_MJy_sr(frequency_hz, temperature_K):
    """Blackbody intensity B_nu(T) = 2 h nu^3 / c^2 / (exp(h nu / k T) - 1) in MJy/sr."""
    nu = np.asarray(frequency_hz, dtype=float)
    x = H_PLANCK_EV_S * nu / (K_BOLTZMANN_EV_K * np.asarray(temperature_K, dtype=float))
    return _PLANCK_PREFACTOR * nu**3 / np.expm1(x)


def planck_dT_MJy_sr(frequency_hz, temperature_K):
    """dB_nu/dT in MJy/sr/K: B_nu(T) x e^x / ((e^x - 1) T), x = h nu / k T."""
    nu = np.asarray(frequency_hz, dtype=float)
    temperature = np.asarray(temperature_K, dtype=float)
    x = H_PLANCK_EV_S * nu / (K_BOLTZMANN_EV_K * temperature)
    return planck_MJy_sr(nu, temperature) * x / (-np.expm1(-x)) / temperature


@dataclass(frozen=True, eq=False)
class Spectrum:
    """A measured spectrum: frequencies, intensities, 1-sigma errors, optional Galaxy template.

    Arrays are copied and made read-only. ``source`` says where the figures
    came from and which column is the intensity; it names the spectrum in
    every error message.
    """

    frequency_hz: np.ndarray
    intensity_MJy_sr: np.ndarray
    sigma_MJy_sr: np.ndarray
    galaxy_MJy_sr: np.ndarray | None = None
    source: str = "arrays"

    def __post_init__(self):
        fields = {"frequency_hz": self.frequency_hz, "intensity_MJy_sr": self.intensity_MJy_sr,
                  "sigma_MJy_sr": self.sigma_MJy_sr}
        if self.galaxy_MJy_sr is not None:
            fields["galaxy_MJy_sr"] = self.galaxy_MJy_sr
        size = np.size(self.frequency_hz)
        for name, values in fields.items():
            array = np.array(values, dtype=float).ravel()
            if array.size != size:
                raise InputError(f"spectrum {self.source}: {name} has {array.size} values, frequency_hz has {size}")
            if not np.all(np.isfinite(array)):
                raise InputError(f"spectrum {self.source}: {name} holds NaN or inf")
            array.setflags(write=False)
            object.__setattr__(self, name, array)
        if size < MIN_ROWS:
            raise InputError(f"spectrum {self.source}: expected at least {MIN_ROWS} frequencies, got {size}")
        for name in ("frequency_hz", "sigma_MJy_sr"):
            if np.any(getattr(self, name) <= 0):
                raise InputError(f"spectrum {self.source}: {name} must be positive")
        object.__setattr__(self, "source", str(self.source))

    def __len__(self):
        return self.frequency_hz.size

    def __repr__(self):
        return f"Spectrum({len(self)} frequencies, {self.source})"

    @property
    def photon_energy_eV(self):
        """h nu in eV."""
        return H_PLANCK_EV_S * self.frequency_hz


def read_spectrum(path=None):
    """Read a spectrum table (see the module docstring for the two layouts).

    ``path`` None reads the shipped copy of Fixsen et al. 1996, Table 4.
    """
    if path is None:
        return _shipped_spectrum()
    return _read(require_path(path, "spectrum (--spectrum)"))


@lru_cache(maxsize=1)
def _shipped_spectrum():
    # The Spectrum is immutable, so one parsed copy serves every caller.
    with resources.as_file(resources.files("raytrace") / "data" / DEFAULT_SPECTRUM) as path:
        return _read(Path(path))


def _read(path):
    try:
        lines = path.read_text().splitlines()
    except FileNotFoundError:
        raise InputError(f"{path}: spectrum file not found") from None
    except (OSError, UnicodeDecodeError) as error:
        raise InputError(f"{path}: cannot read the spectrum file as text ({error})") from None
    comments = [line.lstrip()[1:] for line in lines if line.lstrip().startswith("#")]
    headers = [match.group(1) for match in map(_HEADER.match, comments) if match]
    if len(headers) > 1:
        raise InputError(f"{path}: {len(headers)} '# columns:' lines; expected one")
    if headers:
        return _read_plain(path, lines, headers[0])
    if any("fixsen" in comment.lower() for comment in comments):
        return _read_monopole(path, lines)
    raise InputError(
        f"{path}: the units of the columns are not stated. Add a header line such as "
        "'# columns: frequency GHz, intensity MJy/sr, sigma MJy/sr', or give the five-column "
        "FIRAS monopole table of Fixsen et al. 1996 (Table 4) with its citation in the header"
    )


def _rows(path, lines, names):
    """(line numbers, float table) of the data lines, each checked to hold len(names) finite numbers."""
    numbers, table = [], []
    for number, line in enumerate(lines, start=1):
        text = line.strip()
        if not text or text.startswith("#"):
            continue
        fields = text.replace(",", " ").split()
        if len(fields) != len(names):
            raise InputError(
                f"{path}, line {number}: expected {len(names)} columns ({', '.join(names)}), found {len(fields)}"
            )
        row = []
        for column, (field, name) in enumerate(zip(fields, names), start=1):
            try:
                value = float(field)
            except ValueError:
                raise InputError(f"{path}, line {number}, column {column} ({name}): {field!r} is not a number") from None
            if not np.isfinite(value):
                raise InputError(f"{path}, line {number}, column {column} ({name}): {field!r} is not finite")
            row.append(value)
        numbers.append(number)
        table.append(row)
    if len(table) < MIN_ROWS:
        raise InputError(f"{path}: expected at least {MIN_ROWS} data rows, found {len(table)}")
    return np.asarray(numbers), np.asarray(table)


def _require_positive(path, numbers, values, column, name):
    bad = np.flatnonzero(values <= 0)
    if bad.size:
        raise InputError(
            f"{path}, line {numbers[bad[0]]}, column {column} ({name}): expected a positive value, "
            f"got {values[bad[0]]!r} ({bad.size} such rows)"
        )


def _read_monopole(path, lines):
    numbers, table = _rows(path, lines, _MONOPOLE_COLUMNS)
    wavenumber, _, residual, sigma, galaxy = table.T
    _require_positive(path, numbers, wavenumber, 1, _MONOPOLE_COLUMNS[0])
    _require_positive(path, numbers, sigma, 4, _MONOPOLE_COLUMNS[3])
    frequency = (wavenumber / u.cm).to_value(u.Hz, equivalencies=u.spectral())
    intensity = planck_MJy_sr(frequency, REFERENCE_TEMPERATURE_K) + residual * _KJY_SR_IN_MJY_SR
    return Spectrum(
        frequency, intensity, sigma * _KJY_SR_IN_MJY_SR, galaxy * _KJY_SR_IN_MJY_SR,
        source=f"{path.name}: FIRAS monopole (Fixsen et al. 1996, Table 4), intensity = "
        f"{REFERENCE_TEMPERATURE_K} K blackbody + residual column",
    )


def _read_plain(path, lines, header):
    entries = [entry.strip() for entry in header.split(",")]
    units = {}
    for entry in entries:
        name, _, unit_text = entry.partition(" ")
        name = name.lower()
        if name not in _PLAIN_COLUMNS or name in units:
            raise InputError(
                f"{path}: '# columns:' line: expected the names {', '.join(_PLAIN_COLUMNS)} once each, "
                f"each followed by its unit, got {entry!r}"
            )
        if not unit_text.strip():
            raise InputError(f"{path}: '# columns:' line: column {name!r} has no unit")
        units[name] = _column_unit(path, name, unit_text.strip())
    if len(units) != len(_PLAIN_COLUMNS):
        missing = [name for name in _PLAIN_COLUMNS if name not in units]
        raise InputError(f"{path}: '# columns:' line does not name {', '.join(missing)}")
    order = [entry.partition(" ")[0].lower() for entry in entries]
    numbers, table = _rows(path, lines, order)
    values = dict(zip(order, table.T))
    for name in ("frequency", "sigma"):
        _require_positive(path, numbers, values[name], order.index(name) + 1, name)
    frequency = (values["frequency"] * units["frequency"]).to_value(u.Hz, equivalencies=u.spectral())
    intensity = (values["intensity"] * units["intensity"]).to_value(_INTENSITY_UNIT)
    sigma = (values["sigma"] * units["sigma"]).to_value(_INTENSITY_UNIT)
    described = ", ".join(f"{name} {units[name]}" for name in order)
    return Spectrum(frequency, intensity, sigma, None, source=f"{path.name}: table ({described})")


def _column_unit(path, name, text):
    try:
        unit = u.Unit(text.replace("^", "**"))
    except ValueError:
        raise InputError(f"{path}: '# columns:' line: {text!r} (column {name}) is not a unit astropy knows") from None
    if name == "frequency":
        if not unit.is_equivalent(u.Hz, equivalencies=u.spectral()):
            raise InputError(
                f"{path}: '# columns:' line: frequency unit {text!r} is not a frequency, wavenumber, "
                "wavelength or energy (e.g. GHz, 1/cm)"
            )
    elif not unit.is_equivalent(_INTENSITY_UNIT):
        raise InputError(
            f"{path}: '# columns:' line: {name} unit {text!r} is not an intensity per steradian "
            "(e.g. MJy/sr, kJy/sr, W m^-2 Hz^-1 sr^-1)"
        )
    return unit

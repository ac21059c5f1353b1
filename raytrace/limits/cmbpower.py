"""The measured CMB temperature power spectrum, for the anisotropy test (PHYSICS.md section 10).

In: the Planck 2018 TT spectrum (Planck Collaboration 2020, A&A 641, A5; the
shipped copies in ``raytrace/data`` of the Planck Legacy Archive files
COM_PowerSpect_CMB-TT-full_R3.01 and -binned_R3.01, each citing its source in
its header), or files of the same layouts. Out: :class:`BandPowers`, one band
per row: l = 2-29 one multipole each (the low-l spectrum, asymmetric errors),
then the binned high-l spectrum (83 bins of Delta l = 30 from l = 30, the last
2490-2508), each band with its data D_b, errors and the best-fit LCDM model.

- D_l = l (l + 1) C_l / (2 pi) in muK^2. A band averages C_l with weights
  w_l = l (l + 1), its effective multipole is sum w_l l / sum w_l, and
  D_b = l_b (l_b + 1) C_b / (2 pi) (the binned file's own rule, which its header
  states and tests/test_cmbpower.py checks to the printed digits).
- The model: the binned file's best-fit LCDM column for l >= 30; below, CAMB with
  the Planck 2018 parameters (:data:`PLANCK_2018_PARAMETERS`; the file carries
  no model there), shipped as ``raytrace/data/lcdm_tt_low_ell.txt`` (written by
  scripts/write_lcdm_low_ell.py with :func:`lcdm_power`): CAMB's run would cost
  every ``limits`` and ``report`` about 145 MB for 28 numbers.
- The TT spectrum combines the 100-217 GHz channels after component separation:
  :func:`check_frequency` refuses an observed frequency outside that range.
"""

from dataclasses import dataclass, replace
from functools import lru_cache
from importlib import resources
from pathlib import Path

import numpy as np

from raytrace.physics.constants import HBAR_EV_S
from raytrace.core.errors import InputError, require_path

UNBINNED = "planck2018_tt_unbinned.txt"
BINNED = "planck2018_tt_binned.txt"
LCDM_LOW_ELL = "lcdm_tt_low_ell.txt"
#: First multipole of the binned (high-l) spectrum; below it the unbinned low-l rows serve.
HIGH_ELL_START = 30
#: Bin edges of the binned Planck 2018 TT spectrum: [30, 60), [60, 90), ..., [2460, 2490), [2490, 2509).
PLANCK_BIN_EDGES = tuple(range(HIGH_ELL_START, 2491, 30)) + (2509,)
#: LCDM parameters of Planck 2018 (A&A 641, A6, Table 2, TT,TE,EE+lowE+lensing+BAO; memory, checked in
#: tests/test_cmbpower.py against the binned file's model column: CAMB agrees with it to 0.3 %).
PLANCK_2018_PARAMETERS = {"H0": 67.66, "ombh2": 0.02242, "omch2": 0.11933, "tau": 0.0561, "ns": 0.9665,
                          "As": float(np.exp(3.047) * 1e-10), "mnu": 0.06}
#: Channels the TT spectrum combines (Planck 2020, A&A 641, A5): the frequencies where it applies, GHz.
FREQUENCY_RANGE_GHZ = (100.0, 217.0)


def bin_weights(ell):
    """w_l = l (l + 1): the weights of the binned spectrum (its header)."""
    ell = np.asarray(ell, dtype=float)
    return ell * (ell + 1.0)


@dataclass(frozen=True, eq=False)
class BandPowers:
    """Bands of a measured TT spectrum, in muK^2: per band its multipoles ``ell_low``..``ell_high``,
    effective multipole, data D_b, lower and upper 1-sigma errors, and the LCDM model D_b."""

    ell_low: np.ndarray
    ell_high: np.ndarray
    ell_effective: np.ndarray
    power: np.ndarray
    error_low: np.ndarray
    error_high: np.ndarray
    model: np.ndarray
    source: str

    def __len__(self):
        return self.power.size

    def within(self, lmax):
        """The bands that lie wholly at l <= ``lmax``."""
        keep = self.ell_high <= int(lmax)
        return replace(self, **{name: getattr(self, name)[keep] for name in
                                ("ell_low", "ell_high", "ell_effective", "power", "error_low", "error_high",
                                 "model")})

    def bin(self, spectrum, variance=None):
        """C_b of ``spectrum`` (C_l indexed by l on axis 0) with weights l (l + 1), and, given per-l
        variances of independent multipoles, the variance of each C_b."""
        spectrum = np.asarray(spectrum, dtype=float)
        binned, binned_variance = [], []
        for low, high in zip(self.ell_low, self.ell_high):
            ell = np.arange(low, high + 1)
            w = bin_weights(ell) / bin_weights(ell).sum()
            w = w.reshape((-1,) + (1,) * (spectrum.ndim - 1))
            binned.append((w * spectrum[ell]).sum(axis=0))
            if variance is not None:
                binned_variance.append((w**2 * np.asarray(variance)[ell]).sum(axis=0))
        return np.array(binned), (np.array(binned_variance) if variance is not None else None)

    def to_power(self, binned_cl):
        """D_b = l_b (l_b + 1) C_b / (2 pi) of binned C_b (bands on axis 0)."""
        factor = bin_weights(self.ell_effective) / (2 * np.pi)
        return np.asarray(binned_cl) * factor.reshape((-1,) + (1,) * (np.ndim(binned_cl) - 1))


def planck_tt(unbinned=None, binned=None):
    """The Planck 2018 TT :class:`BandPowers`: l = 2-29 from ``unbinned`` (model: CAMB's, shipped), then
    the bins of ``binned`` (model: its own column). None reads the shipped copies."""
    ell, power, low, high = read_unbinned(unbinned)
    below = ell < HIGH_ELL_START
    _, power_b, low_b, high_b, model_b = read_binned(binned)
    edges = np.array(PLANCK_BIN_EDGES)
    source = f"Planck 2018 TT ({_name(unbinned, UNBINNED)} for l < {HIGH_ELL_START}, {_name(binned, BINNED)} above)"
    return BandPowers(
        ell_low=np.concatenate([ell[below], edges[:-1]]).astype(int),
        ell_high=np.concatenate([ell[below], edges[1:] - 1]).astype(int),
        # The bins' effective multipoles computed, not read: the file prints them to 9 digits.
        ell_effective=np.concatenate([ell[below], _effective_multipoles()]),
        power=np.concatenate([power[below], power_b]),
        error_low=np.concatenate([low[below], low_b]), error_high=np.concatenate([high[below], high_b]),
        model=np.concatenate([lcdm_low_ell()[ell[below].astype(int) - 2], model_b]), source=source)


def read_unbinned(path=None):
    """(l, D_l, lower error, upper error) of an unbinned TT file: four columns, l = 2, 3, ... consecutive."""
    path, table = _table(path, UNBINNED, 4, "l, D_l, lower error, upper error (muK^2)")
    ell = table[:, 0]
    if ell[0] != 2 or np.any(np.diff(ell) != 1):
        raise InputError(f"{path}: expected consecutive multipoles l = 2, 3, ... in column 1")
    if ell[-1] < HIGH_ELL_START - 1:
        raise InputError(f"{path}: expected multipoles up to at least l = {HIGH_ELL_START - 1}, "
                         f"found up to {ell[-1]:g}")
    return ell.astype(int), table[:, 1], table[:, 2], table[:, 3]


def read_binned(path=None):
    """(effective l, D_b, lower error, upper error, model D_b) of a binned TT file in Planck's binning."""
    path, table = _table(path, BINNED, 5, "effective l, D_b, lower error, upper error, model D_b (muK^2)")
    edges = np.array(PLANCK_BIN_EDGES)
    if table.shape[0] != edges.size - 1:
        raise InputError(f"{path}: expected {edges.size - 1} bins (Planck 2018's: Delta l = 30 from l = 30, "
                         f"the last 2490-2508), found {table.shape[0]} rows")
    if not np.allclose(table[:, 0], _effective_multipoles(), rtol=1e-6, atol=0):
        raise InputError(f"{path}: column 1 is not the effective multipole of Planck 2018's bins "
                         "(weights l (l + 1), Delta l = 30 from l = 30)")
    return tuple(table[:, i] for i in range(5))


def _effective_multipoles():
    """sum w_l l / sum w_l of each of Planck's bins (:data:`PLANCK_BIN_EDGES`), w_l = l (l + 1)."""
    edges = PLANCK_BIN_EDGES
    return np.array([(bin_weights(np.arange(a, b)) * np.arange(a, b)).sum() / bin_weights(np.arange(a, b)).sum()
                     for a, b in zip(edges[:-1], edges[1:])])


def check_frequency(omega0_eV, what="frequency (--frequency)"):
    """The observed frequency (GHz) of ``omega0_eV``, refused outside the channels the TT spectrum combines."""
    ghz = float(omega0_eV) / (2 * np.pi * HBAR_EV_S) / 1e9
    low, high = FREQUENCY_RANGE_GHZ
    if not low <= ghz <= high:
        raise InputError(f"{what}: {ghz:.4g} GHz is outside the {low:g}-{high:g} GHz channels the Planck 2018 "
                         "TT spectrum combines; choose a frequency inside them")
    return ghz


def lcdm_low_ell():
    """D_l (muK^2) of LCDM at l = 2-29, index l - 2: the shipped table of :func:`lcdm_power`'s values."""
    with resources.as_file(resources.files("raytrace") / "data" / LCDM_LOW_ELL) as shipped:
        table = np.loadtxt(shipped, comments="#", ndmin=2)
    if not np.array_equal(table[:, 0], np.arange(2, HIGH_ELL_START)):  # a broken installation, not user input
        raise InputError(f"{shipped}: expected l = 2-{HIGH_ELL_START - 1} in column 1; reinstall raytrace")
    return table[:, 1]


@lru_cache(maxsize=2)
def lcdm_power(lmax):
    """D_l (muK^2, l = 0..lmax, lensed) of LCDM with :data:`PLANCK_2018_PARAMETERS`, from CAMB; read-only.

    Not run by the tool: it wrote the shipped :func:`lcdm_low_ell` table, and the tests check both."""
    import camb

    params = camb.set_params(lmax=max(int(lmax), 40), **PLANCK_2018_PARAMETERS)
    results = camb.get_results(params)
    power = np.array(results.get_cmb_power_spectra(params, CMB_unit="muK")["total"][: lmax + 1, 0])
    power.setflags(write=False)
    return power


def _name(path, default):
    return default if path is None else Path(path).name


def _table(path, default, columns, meaning):
    """(path, rows) of a whitespace table of ``columns`` finite numbers with positive errors (columns 3-4)."""
    if path is None:
        with resources.as_file(resources.files("raytrace") / "data" / default) as shipped:
            return _table(Path(shipped), default, columns, meaning)
    path = require_path(path, "CMB power spectrum file")
    try:
        text = path.read_text()
    except FileNotFoundError:
        raise InputError(f"{path}: CMB power spectrum file not found") from None
    except (OSError, UnicodeDecodeError) as error:
        raise InputError(f"{path}: cannot read the CMB power spectrum file as text ({error})") from None
    if not any(line.strip() and not line.lstrip().startswith("#") for line in text.splitlines()):
        raise InputError(f"{path}: expected {columns} columns ({meaning}), found no rows")
    try:
        table = np.loadtxt(path, comments="#", ndmin=2)
    except ValueError as error:
        raise InputError(f"{path}: cannot read as {columns} columns ({meaning}): {error}") from None
    if table.shape[1] != columns or table.shape[0] == 0:
        raise InputError(f"{path}: expected {columns} columns ({meaning}), found {table.shape[1]}")
    if not np.all(np.isfinite(table)) or np.any(table[:, 2:4] <= 0):
        raise InputError(f"{path}: expected finite numbers and positive errors in columns 3 and 4")
    return path, table

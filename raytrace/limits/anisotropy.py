"""Upper limits on epsilon from the isotropy of the CMB (PHYSICS.md section 6).

In: a :class:`~raytrace.sky.maps.SkyResult` and an observed photon energy. Out:
epsilon_max(m) from the rms of its dT/T map against an isotropy level, or from
its angular power spectrum against a table of C_l upper limits, as an
:class:`AnisotropyLimit` curve for a :class:`~raytrace.limits.limitset.LimitSet`.
"""

from dataclasses import dataclass
from pathlib import Path

import numpy as np

from raytrace.core.errors import InputError, require_positive_finite
from raytrace.physics.constants import HBAR_EV_S
from raytrace.physics.conversion import ISOTROPY_LEVEL, anisotropy_per_probability
from raytrace.physics.units import CMB_PHOTON_ENERGY_EV


def anisotropy_limit(sky, omega0_eV, threshold=ISOTROPY_LEVEL, cl_limits=None):
    """Largest epsilon per mass whose dT/T map passes the isotropy test.

    dT/T scales as epsilon^2: from the map's rms (monopole removed) against
    ``threshold``, epsilon_max = sqrt(threshold / rms_1); from an upper-limit table
    of C_l (``cl_limits``: array of (l, limit) rows, dT/T units squared),
    C_l scales as epsilon^4 and epsilon_max = min over l of (limit_l / C_l,1)^(1/4).
    The maps are read one mass at a time. Returns a dict with "mass_eV",
    "epsilon_max_rms" and, with a table, "epsilon_max_cl".
    """
    if not (np.isfinite(threshold) and threshold > 0):
        raise InputError(f"threshold: expected a positive dT/T level, got {threshold!r}")
    table = None if cl_limits is None else _checked_table(cl_limits)
    dtt = sky.columns("kernel", scale=-anisotropy_per_probability(omega0_eV) / omega0_eV)  # dT/T at epsilon = 1
    rms, best = np.zeros(dtt.n_columns), np.full(dtt.n_columns, np.inf)
    for k in range(dtt.n_columns):
        values = dtt.column(k)
        # A map whose pixels are all equal has no anisotropy; np.std's rounding would give it a tiny rms.
        if np.ptp(values) == 0:
            continue
        rms[k] = values.std()
        if table is not None:
            best[k] = _cl_limit(sky, values, table)
    with np.errstate(divide="ignore"):
        out = {"mass_eV": sky.mass_eV, "epsilon_max_rms": np.where(rms > 0, np.sqrt(threshold / np.where(rms > 0, rms, 1)), np.inf)}
    if table is not None:
        out["epsilon_max_cl"] = best
    return out


def _checked_table(cl_limits):
    table = np.asarray(cl_limits, dtype=float)
    if table.ndim != 2 or table.shape[1] != 2 or np.any(table[:, 1] <= 0) or np.any(table[:, 0] < 1):
        raise InputError("cl_limits: expected rows of (l >= 1, positive C_l limit)")
    return table


def _cl_limit(sky, dtt, table):
    """(min over the table's measured l of limit_l / C_l)^(1/4) for one dT/T map at epsilon = 1 (inf: none)."""
    ells = table[:, 0].astype(int)
    lmax = min(int(ells.max()), 3 * sky.nside - 1)
    keep = ells <= lmax
    cl = sky.angular_power(dtt, lmax=lmax)
    ratio = table[keep, 1] / np.where(cl[ells[keep]] > 0, cl[ells[keep]], np.nan)
    return np.nanmin(ratio) ** 0.25 if np.any(np.isfinite(ratio)) else np.inf


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


@dataclass(frozen=True, eq=False)
class AnisotropyLimit:
    """epsilon_max(m) from the isotropy of a sky's dT/T map (:func:`anisotropy_limit`).

    ``test`` is "rms" (map rms against ``threshold``) or "C_l" (angular power
    against the table ``cl_source``); ``omega0_eV`` the photon energy of dT/T.
    """

    name: str
    label: str
    mass_eV: np.ndarray
    epsilon_max: np.ndarray
    test: str
    threshold: float | None
    cl_source: str | None
    omega0_eV: float
    nside: int
    sky_seed: int
    sky_z_max: float

    def __post_init__(self):
        for field in ("mass_eV", "epsilon_max"):
            array = np.array(getattr(self, field), dtype=float)
            array.setflags(write=False)
            object.__setattr__(self, field, array)

    def __repr__(self):
        return f"AnisotropyLimit({self.name!r}, {self.mass_eV.size} masses, {self.label!r})"

    def columns(self):
        """Per-mass arrays for a table."""
        return {"epsilon_max": self.epsilon_max}

    def unconstrained(self):
        """Per mass: why epsilon is not constrained there ('' where it is)."""
        return np.where(np.isfinite(self.epsilon_max), "", "no anisotropy at this mass (flat dT/T map)")

    def metadata(self):
        """Scalars describing the test, for a table's header."""
        return {"label": self.label, "kind": "CMB anisotropy", "test": self.test, "threshold": self.threshold,
                "cl_limits": self.cl_source, "omega0_eV": self.omega0_eV, "nside": self.nside,
                "sky_seed": self.sky_seed, "sky_z_max": self.sky_z_max}


def anisotropy_curve(sky, omega0_eV=CMB_PHOTON_ENERGY_EV, threshold=None, cl_limits=None, name="anisotropy"):
    """The anisotropy limit of a :class:`~raytrace.sky.maps.SkyResult` as a curve for a LimitSet.

    Without ``cl_limits``: the map's rms of dT/T below ``threshold`` (default
    :data:`raytrace.physics.conversion.ISOTROPY_LEVEL`, 1e-5), epsilon_max = sqrt(threshold / rms
    at epsilon = 1). With ``cl_limits`` (a file for :func:`read_cl_limits`
    or an array of (l, C_l limit) rows): the C_l test, epsilon_max = min_l (limit_l /
    C_l at epsilon = 1)^(1/4). ``omega0_eV``: the photon energy of dT/T (default k T_0).
    """
    omega0 = float(require_positive_finite(omega0_eV, "omega0_eV"))
    frequency = f"{omega0 / (2.0 * np.pi * HBAR_EV_S) / 1e9:.3g} GHz"
    if cl_limits is None:
        threshold = ISOTROPY_LEVEL if threshold is None else threshold
        limit = anisotropy_limit(sky, omega0, threshold)
        return AnisotropyLimit(name, f"sky rms < {_short(threshold)} in dT/T at {frequency}", sky.mass_eV,
                               limit["epsilon_max_rms"], "rms", float(threshold), None, omega0, sky.nside,
                               int(sky.run["seed"]), float(sky.run["z_max"]))
    if threshold is not None:
        raise InputError("threshold: belongs to the rms test; the C_l test takes its levels from cl_limits")
    if isinstance(cl_limits, (str, Path)):
        source, cl_limits = Path(cl_limits).name, read_cl_limits(cl_limits)
    else:
        source = "a given table"
    limit = anisotropy_limit(sky, omega0, cl_limits=cl_limits)
    return AnisotropyLimit(name, f"C_l limits from {source} at {frequency}", sky.mass_eV,
                           limit["epsilon_max_cl"], "C_l", None, source, omega0, sky.nside,
                           int(sky.run["seed"]), float(sky.run["z_max"]))


def _short(value):
    """1e-05 -> 1e-5: numbers as people write them in a legend."""
    return f"{value:.3g}".replace("e-0", "e-").replace("e+0", "e+")

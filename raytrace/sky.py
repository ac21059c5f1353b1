"""Sky maps: one observer, rays along HEALPix pixels through a consistent light cone.

In: a box series, a mass grid, nside and z_max. Out: :class:`SkyResult`, the
conversion kernel per pixel and mass (HEALPix, Gorski et al. 2005, ApJ 622, 759),
its maps of P and of the CMB temperature anisotropy dT/T = -P (1 - e^-x)/x,
angular power spectra (healpy.anafast), FITS maps, Mollweide plots, and the
anisotropy limit on epsilon.

The observer sits at a seeded random point of the lattice of box copies around
it. Each copy, indexed by its integer position and by the snapshot serving its
shell, gets one random cube symmetry (about its centre) and periodic shift,
derived from (seed, snapshot, copy index) alone (blended snapshots share one
transform per copy, since they are mixed sample by sample), so every ray through a copy
sees the same structures and neighbouring directions are correlated as in a
real sky. The random transforms break the exact repetition a plain periodic
lattice would print on the sky; the box still sets the largest correlated
angle at each distance (about box size / chi), so beyond chi ~ box size / theta
the map of one copy is no longer a fair sample of larger structures.
"""

import math
from pathlib import Path

import numpy as np

from . import __version__
from .backends import MemoryBackend
from .devices import choose_device, device_record, device_tracer
from .engine import (DEFAULT_PHOTON_ENERGY_EV, Tracer, as_series, background_part, boxes_redshift_range,
                     check_background, check_masses, check_no_other_options, check_run_memory, check_seed,
                     check_trace_options, run_batches, warn_outside_probed_range)
from .errors import InputError, require_number
from .kernels.lattice import trace_lattice
from .meancheck import attach_pdf_check
from .rays import CUBE_SYMMETRIES
from .resultfiles import open_result, save_arrays
from .results import KernelRows, tangent_arrays
from .units import CMB_PHOTON_ENERGY_EV

FORMAT = "raytrace-sky-2"
ORDERINGS = ("RING", "NESTED")
#: The CMB is isotropic to about 1e-5 in dT/T (a fact of the trade, no source).
ISOTROPY_LEVEL = 1e-5

SKY_LAYOUT = {
    "kernel_boxes": (lambda r, m: (r, m), np.float64),
    "crossings": (lambda r, m: (r, m), np.float64),
    "tangent_events": (lambda r, m: (r, m), np.float64),
    "kernel_tangent": (lambda r, m: (r, m), np.float64),
    "dispersion_measure_boxes": (lambda r, m: (r,), np.float64),
}


def _healpy():
    import healpy

    return healpy


def _check_nside(nside):
    what = "nside (--nside)"
    expected = "a power of 2 (1, 2, 4, ..., 2^29)"
    nside = require_number(nside, what, whole=True, at_least=1, at_most=2**29, expected=expected)
    if nside & (nside - 1):
        raise InputError(f"{what}: expected {expected}, got {nside!r}")
    return nside


def _sub_pixel_level(rays_per_pixel):
    """rays_per_pixel = 4^k: the rays follow the centres of the pixels at nside * 2^k inside each pixel."""
    rays_per_pixel = require_number(rays_per_pixel, "rays_per_pixel", whole=True, at_least=1,
                                    expected="1, 4, 16, 64 ...")
    level = round(math.log(rays_per_pixel, 4))
    if 4**level != rays_per_pixel:
        raise InputError(f"rays_per_pixel: expected a power of 4 (1, 4, 16, 64 ...) so the rays sit at the "
                         f"centres of sub-pixels, got {rays_per_pixel}")
    return level


def observer_position(seed, box_size_cMpc):
    """The observer's seeded random point in copy (0, 0, 0) of the first box, in Mpc."""
    rng = np.random.default_rng(np.random.SeedSequence([int(seed), 0x0B5E]))
    return rng.random(3) * box_size_cMpc


class SkyTracer(Tracer):
    """What one batch of pixels needs; :meth:`trace` is a pure function of the pixel indices (NESTED)."""

    def __init__(self, series, mass_eV, nside, rays_per_pixel, z_boxes, seed, photon_energy_eV, cosmology,
                 randomise_copies=True):
        self._set_up(series, mass_eV, z_boxes, seed, photon_energy_eV, cosmology)
        self.nside = nside
        self.level = _sub_pixel_level(rays_per_pixel)
        self.randomise = bool(randomise_copies)
        self.observer = observer_position(seed, self.boxes[0].box_size_cMpc)
        # Blended snapshots share a grid and are mixed point by point: they must see the
        # same transform in each copy, or the blend would average two unrelated fields.
        self.copy_keys = [0 if series.blend else b for b in range(len(self.boxes))]

    def ray_directions(self, pixels):
        """Unit vectors of the sub-pixel centres of NESTED ``pixels``, (n_pixels * 4^level, 3)."""
        healpy = _healpy()
        children = (np.asarray(pixels, dtype=np.int64)[:, None] * 4**self.level
                    + np.arange(4**self.level)[None, :]).ravel()
        return np.ascontiguousarray(np.array(healpy.pix2vec(self.nside * 2**self.level, children, nest=True)).T)

    def trace(self, pixels):
        directions = self.ray_directions(pixels)
        out = self._outputs(directions.shape[0])
        for span in range(self.plan.n_spans):
            trace_lattice(*self._lattice_arguments(span, directions), *out.values())
        per_pixel = 4**self.level
        return {name: values.reshape((len(pixels), per_pixel) + values.shape[1:]).mean(axis=1)
                for name, values in out.items()}

    def _lattice_arguments(self, span, directions):
        """The arguments of a lattice kernel for span ``span``, all but the outputs."""
        plan = self.plan
        box = int(plan.span_box[span])
        return (*self._span_arguments(span), float(plan.span_chi_a[span]), float(plan.span_chi_b[span]), directions,
                self.observer, float(self.boxes[box].box_size_cMpc), self.seed, self.copy_keys[box], CUBE_SYMMETRIES,
                self.randomise, *self._physics_arguments())


def cast_sky(series, mass_eV, nside, z_max, seed=0, rays_per_pixel=1, n_jobs=1, include_background=True,
             z_boxes=None, ordering="RING", plasma=None, randomise_copies=True, batch_pixels=1024,
             backend=None, progress=False, executor=None, photon_energy_eV=DEFAULT_PHOTON_ENERGY_EV, device="cpu",
             **removed):
    """A HEALPix map of the conversion kernel seen by one observer out to ``z_max``.

    ``rays_per_pixel`` (1, 4, 16 ...) rays follow the centres of sub-pixels and
    are averaged (a beam average). ``ordering`` is "RING" or "NESTED" for the
    result's pixel order. ``randomise_copies=False`` leaves every copy of the
    lattice untransformed: a diagnostic that shows the replication pattern.
    Other arguments (``backend``, ``executor`` for a cluster) as in
    :func:`raytrace.cast_sightlines`, including ``photon_energy_eV`` and ``device``;
    results are bit-identical for any ``n_jobs``, ``batch_pixels`` or cluster.
    """
    check_no_other_options("cast_sky", removed)
    series = as_series(series)
    mass = check_masses(mass_eV)
    seed = check_seed(seed)
    nside = _check_nside(nside)
    level = _sub_pixel_level(rays_per_pixel)
    if not isinstance(ordering, str) or ordering not in ORDERINGS:
        raise InputError(f"ordering: expected 'RING' or 'NESTED', got {ordering!r}")
    z_max, photon_energy_eV = check_trace_options(z_max, photon_energy_eV, batch_pixels, "batch_pixels")
    check_run_memory(12 * nside * nside, mass.size, "nside and mass_eV (--nside, --mass-count)")
    plasma = check_background(plasma)
    z_boxes = boxes_redshift_range(series, plasma, z_max, z_boxes, include_background)
    device, device_note = choose_device(device, executor)
    npix = 12 * nside * nside
    run = {
        "raytrace": __version__, "nside": nside, "ordering": ordering, "rays_per_pixel": 4**level,
        "z_max": float(z_max), "z_boxes": float(z_boxes), "include_background": bool(include_background),
        "seed": int(seed), "photon_energy_eV": photon_energy_eV, "batch_pixels": int(batch_pixels),
        "randomise_copies": bool(randomise_copies),
        "blend": series.blend, "mass_eV": mass.tolist(),
        "boxes": [box.describe() for box in series.boxes], "ionisation": plasma.ionisation.description,
        "cosmology": plasma.cosmology.name, **device_record(device, device_note),
    }
    warn_outside_probed_range(series, mass, z_boxes)
    tracer, executor = device_tracer(device, "sky", SkyTracer, (series, mass, nside, 4**level, z_boxes, seed,
                                     photon_energy_eV, plasma.cosmology, randomise_copies), executor)
    kernel_background, dm_background = background_part(plasma, mass, z_boxes, z_max, include_background)
    backend = backend if backend is not None else MemoryBackend()
    # Pixels are traced in NESTED order (sub-pixels are then contiguous children) and
    # stored in that order; the result reorders to RING on request.
    arrays = run_batches(tracer, backend, mass, run, SKY_LAYOUT, FORMAT, npix, batch_pixels, n_jobs, executor,
                         progress, unit="pixel", description="sky")
    if ordering == "RING":
        ring_to_nest = _healpy().ring2nest(nside, np.arange(npix))
        for values in arrays.values():  # in place, one array at a time: no second set of maps
            values[...] = values[ring_to_nest]
    result = SkyResult(mass, arrays["kernel_boxes"], kernel_background, arrays["crossings"],
                       arrays["dispersion_measure_boxes"], dm_background, run,
                       tangent_events=arrays["tangent_events"], kernel_tangent=arrays["kernel_tangent"])
    attach_pdf_check(result, series, plasma, n_jobs)  # the built-in check (raytrace.meancheck)
    return backend.finish(result)


def photon_x(omega0_eV):
    """x = h nu / (k T_0) for an observed photon energy h nu in eV (T_0 = 2.72548 K, Fixsen 2009)."""
    return omega0_eV / CMB_PHOTON_ENERGY_EV


def anisotropy_per_probability(omega0_eV):
    """|dT/T| per unit P at observed energy omega_0: (1 - e^-x)/x, x = h nu/(k T_0) (PHYSICS.md section 6)."""
    x = photon_x(omega0_eV)
    return -np.expm1(-x) / x


class SkyResult(KernelRows):
    """Kernel maps of one observer's sky.

    ``kernel`` is (npix, n_masses) in eV, pixel order as ``ordering`` says; P = epsilon^2 K / omega_0.
    """

    def __init__(self, mass_eV, kernel_boxes, kernel_background, crossings, dispersion_measure_boxes,
                 dispersion_measure_background, run, tangent_events=None, kernel_tangent=None):
        self.mass_eV = np.asarray(mass_eV, dtype=float)
        self.kernel_boxes = np.asarray(kernel_boxes, dtype=float)
        self.kernel_background = np.asarray(kernel_background, dtype=float)
        self.crossings = np.asarray(crossings, dtype=float)
        # Per pixel: means over the pixel's rays, so fractional counts.
        self.tangent_events, self.kernel_tangent = tangent_arrays(self.kernel_boxes, tangent_events, kernel_tangent)
        self.dispersion_measure_boxes = np.asarray(dispersion_measure_boxes, dtype=float)
        self.dispersion_measure_background = float(dispersion_measure_background)
        self.run = dict(run)
        self.nside = int(self.run["nside"])
        self.ordering = self.run["ordering"]

    def __repr__(self):
        return f"SkyResult(nside {self.nside} {self.ordering}, {self._mass_range()})"

    @property
    def npix(self):
        return self.kernel_boxes.shape[0]

    def mass_index(self, mass_eV):
        """Index of the grid mass nearest (in log) to ``mass_eV``."""
        if not (np.isfinite(mass_eV) and mass_eV > 0):
            raise InputError(f"mass: expected a positive mass in eV, got {mass_eV!r}")
        return int(np.argmin(np.abs(np.log(self.mass_eV) - np.log(mass_eV))))

    def kernel_map(self, mass_eV):
        return self.kernel[:, self.mass_index(mass_eV)]

    def probability_map(self, mass_eV, epsilon, omega0_eV, saturate=False):
        from .conversion import probability_from_kernel

        return probability_from_kernel(self.kernel_map(mass_eV), epsilon, omega0_eV, saturate=saturate)

    def temperature_anisotropy(self, mass_eV, epsilon, omega0_eV):
        """dT/T = -P (1 - e^-x)/x with x = h nu/(k T_0) (PHYSICS.md section 6), mean included."""
        return -self.probability_map(mass_eV, epsilon, omega0_eV) * anisotropy_per_probability(omega0_eV)

    def angular_power(self, sky_map, lmax=None):
        """C_l of a map in this result's ordering: healpy.anafast with the monopole removed.

        The C_l include the HEALPix pixel window (and the sub-pixel ray average); they
        are not deconvolved: divide by healpy.pixwin(nside)**2 where healpy's window
        files are installed (healpy fetches them over the network on first use).
        """
        healpy = _healpy()
        ring = sky_map if self.ordering == "RING" else healpy.reorder(sky_map, n2r=True)
        lmax = 3 * self.nside - 1 if lmax is None else int(lmax)
        return healpy.anafast(ring - ring.mean(), lmax=lmax)

    # -- files ------------------------------------------------------------------------
    def save(self, path, overwrite=False):
        return save_arrays(path, FORMAT, self.mass_eV, self.run, SKY_LAYOUT, self, overwrite,
                           {"dispersion_measure_background": self.dispersion_measure_background})

    @classmethod
    def load(cls, path):
        from .meancheck import read_pdf_check

        with open_result(path, FORMAT, "sky") as handle:
            import json

            result = cls(handle["mass_eV"][...], handle["kernel_boxes"][...], handle["kernel_background"][...],
                         handle["crossings"][...], handle["dispersion_measure_boxes"][...],
                         handle.attrs["dispersion_measure_background"], json.loads(handle.attrs["run"]),
                         tangent_events=handle["tangent_events"][...], kernel_tangent=handle["kernel_tangent"][...])
            result.pdf_check = read_pdf_check(handle, result.mass_eV)
        return result

    def write_fits(self, path, masses_eV, epsilon=None, omega0_eV=None, overwrite=False, owner=None):
        """HEALPix FITS maps (healpy.write_map) of K at ``masses_eV``, and of P when ``epsilon`` is given.

        The maps come in the order of ``masses_eV``, so the first is the one
        ``healpy.read_map`` returns by default: put the shown mass first. The header
        carries nside, ordering, units, the frame (SKYFRAME: the box axes, no
        celestial COORDSYS), each map's mass, the run's seed, z range, the input
        checksums, EPSILON and OMEGA0 only with probability maps, and ``owner``
        (the run's result file, keyword RTRESULT; see :mod:`raytrace.companions`).
        """
        from .companions import FITS_KEYWORD
        from .provenance import atomic_output

        healpy = _healpy()
        if epsilon is not None and omega0_eV is None:
            raise InputError("write_fits: give omega0_eV (the observed photon energy) with epsilon")
        maps, names, units, cards = [], [], [], []
        for i, mass in enumerate(np.atleast_1d(masses_eV)):
            k = self.mass_index(float(mass))
            cards.append((f"MASS{i + 1}", float(self.mass_eV[k]), "dark-photon mass of map, eV"))
            maps.append(self.kernel[:, k])
            names.append(f"KERNEL{i + 1}")
            units.append("eV")
            if epsilon is not None:
                maps.append(self.probability_map(self.mass_eV[k], epsilon, omega0_eV))
                names.append(f"PROB{i + 1}")
                units.append("")
        if epsilon is not None:
            cards += [("EPSILON", float(epsilon), "kinetic mixing of PROB maps"),
                      ("OMEGA0", float(omega0_eV), "observed photon energy of PROB maps, eV")]
        cards += [("ZMAX", self.run["z_max"], "rays reach this redshift"),
                  ("ZBOXES", self.run["z_boxes"], "boxes serve up to this redshift"),
                  ("SEED", self.run["seed"], "random seed of the light cone"),
                  ("RAYSPIX", self.run["rays_per_pixel"], "rays averaged per pixel"),
                  ("RTVERS", __version__, "raytrace version"),
                  ("SKYFRAME", "box axes", "frame: the boxes' axes, not a celestial frame")]
        for i, box in enumerate(self.run["boxes"]):
            checksum = str(box.get("checksum", "")).replace("sha256:", "")
            # 64 hex digits fill the card: no room for a comment.
            cards.append((f"BOXSUM{i + 1}", checksum[:64]))
        if owner is not None:
            cards.append((FITS_KEYWORD, str(owner), "result file of the run"))
        # healpy names every map extension 'xtension'; its extra cards replace that.
        cards.append(("EXTNAME", "RAYTRACE_MAPS", "conversion kernel maps of a raytrace sky"))
        path = Path(path)
        with atomic_output(path, overwrite=overwrite) as temporary:
            # coord=None: healpy writes no COORDSYS, the map's frame is the box axes (SKYFRAME).
            healpy.write_map(str(temporary), maps, nest=self.ordering == "NESTED", coord=None,
                             column_names=names, column_units=units, extra_header=cards, overwrite=True,
                             dtype=np.float64)
        return path

    def plot_mollweide(self, mass_eV, path=None, epsilon=None, omega0_eV=None, overwrite=False, owner=None):
        """Mollweide view (healpy.mollview) of K, or of dT/T when ``epsilon`` is given.

        Colour-bar ticks in three significant digits (scientific notation where the
        values need it); ``owner`` marks the file as in :func:`raytrace.plots.save_figure`.
        """
        from .plots import _pyplot, save_figure

        healpy = _healpy()
        plt = _pyplot()
        if epsilon is None:
            values, label = self.kernel_map(mass_eV), "K [eV]"
        else:
            values, label = self.temperature_anisotropy(mass_eV, epsilon, omega0_eV), "dT/T"
        healpy.mollview(values, nest=self.ordering == "NESTED", unit=label, format="%.3g",
                        title=f"m = {self.mass_eV[self.mass_index(mass_eV)]:.3g} eV, z < {self.run['z_max']:g}")
        figure = plt.gcf()
        if path is not None:
            save_figure(figure, path, overwrite=overwrite, owner=owner)
            plt.close(figure)
        return figure


def anisotropy_limit(sky, omega0_eV, threshold=ISOTROPY_LEVEL, cl_limits=None):
    """Largest epsilon per mass whose dT/T map passes the isotropy test.

    dT/T scales as epsilon^2: from the map's rms (monopole removed) against
    ``threshold``, epsilon_max = sqrt(threshold / rms_1); from an upper-limit table
    of C_l (``cl_limits``: array of (l, limit) rows, dT/T units squared),
    C_l scales as epsilon^4 and epsilon_max = min over l of (limit_l / C_l,1)^(1/4).
    Returns a dict with "mass_eV", "epsilon_max_rms" and, with a table, "epsilon_max_cl".
    """
    if not (np.isfinite(threshold) and threshold > 0):
        raise InputError(f"threshold: expected a positive dT/T level, got {threshold!r}")
    shape_factor = anisotropy_per_probability(omega0_eV)
    dtt = -sky.kernel / omega0_eV * shape_factor  # dT/T at epsilon = 1, (npix, n_masses)
    # A map whose pixels are all equal has no anisotropy; np.std's rounding would give it a tiny rms.
    flat = np.ptp(dtt, axis=0) == 0
    rms = np.where(flat, 0.0, dtt.std(axis=0))
    with np.errstate(divide="ignore"):
        out = {"mass_eV": sky.mass_eV, "epsilon_max_rms": np.where(rms > 0, np.sqrt(threshold / np.where(rms > 0, rms, 1)), np.inf)}
    if cl_limits is not None:
        table = np.asarray(cl_limits, dtype=float)
        if table.ndim != 2 or table.shape[1] != 2 or np.any(table[:, 1] <= 0) or np.any(table[:, 0] < 1):
            raise InputError("cl_limits: expected rows of (l >= 1, positive C_l limit)")
        ells = table[:, 0].astype(int)
        lmax = min(int(ells.max()), 3 * sky.nside - 1)
        keep = ells <= lmax
        best = np.full(sky.mass_eV.size, np.inf)
        for k in np.flatnonzero(~flat):
            cl = sky.angular_power(dtt[:, k], lmax=lmax)
            ratio = table[keep, 1] / np.where(cl[ells[keep]] > 0, cl[ells[keep]], np.nan)
            if np.any(np.isfinite(ratio)):
                best[k] = np.nanmin(ratio) ** 0.25
        out["epsilon_max_cl"] = best
    return out


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

"""Sky maps: one observer, rays along HEALPix pixels through a consistent light cone.

In: a box series, a mass grid, nside and z_max. Out: :class:`SkyResult`, the
conversion kernel per pixel and mass (HEALPix, Gorski et al. 2005, ApJ 622, 759),
the maps of two independent splits of each pixel's rays
(:mod:`raytrace.tracing.splits`; their signal and noise: :mod:`raytrace.sky.spectra`),
its maps of P and of the CMB temperature anisotropy dT/T = -P (1 - e^-x)/x, angular
power spectra (healpy.anafast), FITS maps and Mollweide plots
(:mod:`raytrace.sky.figures`). The limits on epsilon from its anisotropy are
:mod:`raytrace.limits.anisotropy`'s.

The light cone is traced by :mod:`raytrace.tracing.lattice`, which says how
the copies of the boxes are laid out and transformed. The random transforms break the exact repetition a plain periodic
lattice would print on the sky; the box still sets the largest correlated
angle at each distance (about box size / chi), so beyond chi ~ box size / theta
the map of one copy is no longer a fair sample of larger structures.
"""


import numpy as np

from raytrace.core.errors import InputError
from raytrace.core.resultfiles import ROW_DATASETS, open_result, read_group, read_rows, save_arrays
from raytrace.physics.conversion import anisotropy_per_probability
from raytrace.statistics.meancheck import attach_pdf_check, read_pdf_check
from raytrace.statistics.onepoint import PER_MASS
from raytrace.statistics.results import KernelRows, tangent_arrays
from raytrace.tracing.checks import DEFAULT_PHOTON_ENERGY_EV
from raytrace.tracing.lattice import FORMAT, sky_layout, trace_sky
from raytrace.tracing.redshiftbins import background_by_bin


def _healpy():
    import healpy

    return healpy


class SkyResult(KernelRows):
    """Kernel maps of one observer's sky.

    ``kernel`` is (npix, n_masses) in eV, pixel order as ``ordering`` says; P = epsilon^2 K / omega_0.
    ``kernel_splits`` is (npix, 2, n_masses): the boxes' kernel of each independent
    split of the pixels' rays (:mod:`raytrace.tracing.splits`), None for a sky of one
    ray per pixel (or a file from before the splits): its noise is unknown.
    """

    def __init__(self, mass_eV, kernel_boxes, kernel_background, crossings, dispersion_measure_boxes,
                 dispersion_measure_background, run, tangent_events=None, kernel_tangent=None, kernel_splits=None):
        self.mass_eV = np.asarray(mass_eV, dtype=float)
        self.kernel_boxes = np.asarray(kernel_boxes, dtype=float)
        self.kernel_background = np.asarray(kernel_background, dtype=float)
        self.crossings = np.asarray(crossings, dtype=float)
        # Per pixel: means over the pixel's rays, so fractional counts.
        self.tangent_events, self.kernel_tangent = tangent_arrays(self.kernel_boxes, tangent_events, kernel_tangent)
        self.dispersion_measure_boxes = np.asarray(dispersion_measure_boxes, dtype=float)
        self.dispersion_measure_background = float(dispersion_measure_background)
        self.kernel_splits = None if kernel_splits is None else np.asarray(kernel_splits, dtype=float)
        self.run = dict(run)
        self.nside = int(self.run["nside"])
        self.ordering = self.run["ordering"]
        self.shell_edges_z = self.kernel_shells_boxes = self.shells_background = None

    def set_shells(self, edges_z, kernel_shells_boxes, shells_background):
        """Give the result its maps per redshift shell: edges (S+1), the boxes' maps (npix, S, n_masses)
        and the background's part of each shell (S, n_masses), the same in every pixel."""
        self.shell_edges_z = np.asarray(edges_z, dtype=float)
        self.kernel_shells_boxes = np.asarray(kernel_shells_boxes, dtype=float)
        self.shells_background = np.asarray(shells_background, dtype=float)
        if self.kernel_shells_boxes.shape != (self.npix, self.shell_edges_z.size - 1, self.mass_eV.size):
            raise InputError(f"kernel_shells_boxes: expected shape {(self.npix, self.shell_edges_z.size - 1)} + "
                             f"(masses,), got {self.kernel_shells_boxes.shape}")

    @property
    def kernel_shells(self):
        """K in eV per pixel, redshift shell and mass (boxes plus background); None without shells."""
        if self.kernel_shells_boxes is None:
            return None
        return self.kernel_shells_boxes + self.shells_background[None]

    def shell_map(self, mass_eV, shell):
        """The map of K (eV) of shell ``shell`` (index) at the grid mass nearest ``mass_eV``."""
        if self.kernel_shells_boxes is None:
            raise InputError("shell_map: this sky was cast without redshift shells (shells_z, --shells)")
        count = self.shell_edges_z.size - 1
        if not (isinstance(shell, (int, np.integer)) and 0 <= shell < count):
            raise InputError(f"shell: expected a shell index from 0 to {count - 1}, got {shell!r}")
        return self.kernel_shells[:, shell, self.mass_index(mass_eV)]

    def __repr__(self):
        return f"SkyResult(nside {self.nside} {self.ordering}, {self._mass_range()})"

    @property
    def npix(self):
        return self.kernel_boxes.shape[0]

    @property
    def split_rays(self):
        """Rays per pixel of each split, () where the sky has no splits."""
        return tuple(self.run.get("split_rays", ())) if self.kernel_splits is not None else ()

    def require_splits(self, what="the signal"):
        """Refuse, in one line, what needs the splits on a sky without them."""
        if self.kernel_splits is None:
            raise InputError(f"{what}: this sky has {self.run.get('rays_per_pixel', 1)} ray per pixel and no "
                             "independent splits, so its map's sampling noise is unknown; cast it with "
                             "rays_per_pixel >= 2 (--rays-per-pixel)")

    def mass_index(self, mass_eV):
        """Index of the grid mass nearest (in log) to ``mass_eV``."""
        if not (np.isfinite(mass_eV) and mass_eV > 0):
            raise InputError(f"mass: expected a positive mass in eV, got {mass_eV!r}")
        return int(np.argmin(np.abs(np.log(self.mass_eV) - np.log(mass_eV))))

    def kernel_map(self, mass_eV):
        return self.kernel[:, self.mass_index(mass_eV)]

    def probability_map(self, mass_eV, epsilon, omega0_eV, saturate=None):
        """P per pixel at one mass: linear, or (``saturate`` None) saturating where the sky leaves the
        linear regime (:meth:`KernelRows.saturates`)."""
        from raytrace.physics.conversion import probability_from_kernel

        saturate = self.saturates(epsilon, omega0_eV) if saturate is None else saturate
        return probability_from_kernel(self.kernel_map(mass_eV), epsilon, omega0_eV, saturate=saturate)

    def temperature_anisotropy(self, mass_eV, epsilon, omega0_eV):
        """dT/T = -P (1 - e^-x)/x with x = h nu/(k T_0) (PHYSICS.md section 6), mean included."""
        return -self.probability_map(mass_eV, epsilon, omega0_eV) * anisotropy_per_probability(omega0_eV)

    def angular_power(self, sky_map, lmax=None):
        """C_l of a map in this result's ordering: healpy.anafast with the monopole removed.

        The raw auto-spectrum: the pixel window not removed, the rays' sampling noise
        included. The signal and noise spectra are :func:`raytrace.sky.spectra.sky_spectra`'s.
        """
        healpy = _healpy()
        ring = sky_map if self.ordering == "RING" else healpy.reorder(sky_map, n2r=True)
        lmax = 3 * self.nside - 1 if lmax is None else int(lmax)
        return healpy.anafast(ring - ring.mean(), lmax=lmax)

    # -- files ------------------------------------------------------------------------
    def stored_groups(self):
        """The groups beside the per-pixel arrays: the built-in check's and the shells', where there are."""
        groups = super().stored_groups()
        if self.kernel_shells_boxes is not None:
            groups["redshift_shells"] = ({
                "edges_z": (self.shell_edges_z, "1", "edges in z of the redshift shells of kernel_shells_boxes"),
                "background": (self.shells_background, "eV", "the homogeneous background's kernel per shell and "
                               "mass, the same in every pixel")}, {})
        return groups

    def save(self, path, overwrite=False):
        layout = sky_layout(self.run.get("rays_per_pixel", 1) if self.kernel_splits is not None else 1)
        if self.kernel_shells_boxes is not None:
            layout["kernel_shells_boxes"] = None
        return save_arrays(path, FORMAT, self.mass_eV, self.run, layout, self, overwrite,
                           {"dispersion_measure_background": self.dispersion_measure_background},
                           self.stored_groups())

    @classmethod
    def load(cls, path):
        with open_result(path, FORMAT, "sky") as handle:
            splits = ("kernel_splits",) if "kernel_splits" in handle else ()
            run, mass, arrays, dm_background = read_rows(
                handle, path, ROW_DATASETS + splits,
                required=("z_max", "z_boxes", "seed", "nside", "ordering", "rays_per_pixel"), sky=True)
            result = cls(mass, arrays["kernel_boxes"], arrays["kernel_background"], arrays["crossings"],
                         arrays["dispersion_measure_boxes"], dm_background, run,
                         tangent_events=arrays["tangent_events"], kernel_tangent=arrays["kernel_tangent"],
                         kernel_splits=arrays.get("kernel_splits"))
            shells = read_group(handle, "redshift_shells", mass.size)
            if shells is not None:
                result.set_shells(shells[0]["edges_z"], handle["kernel_shells_boxes"][...], shells[0]["background"])
            result.pdf_check = read_pdf_check(read_group(handle, "pdf_mean", mass.size, PER_MASS), result.mass_eV)
        return result

    def write_fits(self, path, masses_eV, epsilon=None, omega0_eV=None, overwrite=False, owner=None, shown_eV=None):
        """HEALPix FITS maps (healpy.write_map) of K at ``masses_eV``, and of P when ``epsilon`` is given.

        The maps come in the order of ``masses_eV``; with ``shown_eV`` (the mass a
        run shows) that mass's maps come first in their own extension (HDU 1, what
        ``healpy.read_map`` returns by default) and those of ``masses_eV`` in HDU 2.
        Each header carries nside, ordering, units, the frame (SKYFRAME: the box
        axes, no celestial COORDSYS), each map's mass (MASS1 ...), SHOWMASS, the
        run's seed, z range, the input checksums, EPSILON and OMEGA0 only with
        probability maps, and ``owner`` (the run's result file, keyword RTRESULT;
        see :mod:`raytrace.core.companions`). Written by :mod:`raytrace.sky.fits`.
        """
        from raytrace.sky.fits import write_sky_fits

        return write_sky_fits(self, path, masses_eV, epsilon=epsilon, omega0_eV=omega0_eV, overwrite=overwrite,
                              owner=owner, shown_eV=shown_eV)

    def plot_mollweide(self, mass_eV, path=None, epsilon=None, omega0_eV=None, overwrite=False, owner=None):
        """Mollweide view of dT/T (mean removed) at ``epsilon`` (default 1e-7, said in the title) and
        ``omega0_eV`` (default 143 GHz) (:func:`raytrace.sky.figures.draw_map`); with its signal and noise
        spectra beside it: :func:`raytrace.report.skyfigures.sky_figure`."""
        from raytrace.core.figures import pyplot, save_figure
        from raytrace.physics.conversion import ANISOTROPY_FREQUENCY_GHZ
        from raytrace.physics.units import photon_energy_of_ghz
        from raytrace.sky.figures import draw_map, shown_epsilon

        plt = pyplot()
        epsilon, _ = shown_epsilon(None, 0, epsilon)
        omega0 = photon_energy_of_ghz(ANISOTROPY_FREQUENCY_GHZ) if omega0_eV is None else omega0_eV
        draw_map(self, self.mass_index(mass_eV), epsilon, omega0)
        figure = plt.gcf()
        if path is not None:
            save_figure(figure, path, overwrite=overwrite, owner=owner)
            plt.close(figure)
        return figure


def cast_sky(series, mass_eV, nside, z_max, seed=0, rays_per_pixel=4, n_jobs=1, include_background=True,
             z_boxes=None, ordering="RING", plasma=None, randomise_copies=True, batch_pixels=1024,
             backend=None, progress=False, executor=None, photon_energy_eV=DEFAULT_PHOTON_ENERGY_EV, shells_z=None,
             device="cpu", **removed):
    """A HEALPix map of the conversion kernel seen by one observer out to ``z_max``.

    ``rays_per_pixel`` (>= 2) rays per pixel, at random stratified positions inside
    it, form two independent splits (:mod:`raytrace.tracing.splits`); the result keeps
    the mean of all of them (the map) and each split's map, whose cross-spectrum
    is free of the sampling noise (:mod:`raytrace.sky.spectra`). ``rays_per_pixel=1``
    is a plain map, one ray at each pixel's centre, whose noise is unknown.
    ``ordering`` is "RING" or "NESTED" for the result's pixel order. ``randomise_copies=False`` leaves every copy of the
    lattice untransformed: a diagnostic that shows the replication pattern.
    Other arguments (``backend``, ``executor`` for a cluster) as in
    :func:`raytrace.cast_sightlines`, including ``photon_energy_eV`` and ``device``;
    results are bit-identical for any ``n_jobs``, ``batch_pixels`` or cluster.
    ``shells_z``: edges in z of redshift shells (or a count, as ``redshift_bins`` of
    :func:`raytrace.cast_sightlines`): the result also holds a map per shell and mass
    (``kernel_shells``), each crossing in the shell of its redshift.
    """
    traced = trace_sky(series, mass_eV, nside, z_max, seed=seed, rays_per_pixel=rays_per_pixel, n_jobs=n_jobs,
                       include_background=include_background, z_boxes=z_boxes, ordering=ordering, plasma=plasma,
                       randomise_copies=randomise_copies, batch_pixels=batch_pixels, backend=backend,
                       progress=progress, executor=executor, photon_energy_eV=photon_energy_eV, shells_z=shells_z,
                       device=device,
                       **removed)
    arrays, nside = traced.arrays, traced.run["nside"]
    if traced.run["ordering"] == "RING":
        ring_to_nest = _healpy().ring2nest(nside, np.arange(12 * nside * nside))
        for values in arrays.values():  # in place, one array at a time: no second set of maps
            values[...] = values[ring_to_nest]
    result = SkyResult(traced.mass_eV, arrays["kernel_boxes"], traced.kernel_background, arrays["crossings"],
                       arrays["dispersion_measure_boxes"], traced.dispersion_measure_background, traced.run,
                       tangent_events=arrays["tangent_events"], kernel_tangent=arrays["kernel_tangent"],
                       kernel_splits=arrays.get("kernel_splits"))
    edges = traced.run["shell_edges_z"]
    if edges is not None:
        run, plasma = traced.run, traced.plasma
        by_shell, _ = background_by_bin(plasma, traced.mass_eV, run["z_boxes"],
                                        run["z_max"] if run["include_background"] else run["z_boxes"], np.array(edges))
        result.set_shells(edges, arrays["kernel_shells_boxes"], by_shell)
    attach_pdf_check(result, traced.series, traced.plasma, n_jobs)  # the built-in check (raytrace.statistics.meancheck)
    return traced.backend.finish(result)

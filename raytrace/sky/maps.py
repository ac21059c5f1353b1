"""Sky maps: one observer, rays along HEALPix pixels through a consistent light cone.

In: a box series, a mass grid, nside and z_max. Out: :class:`SkyResult`, the
conversion kernel per pixel and mass (HEALPix, Gorski et al. 2005, ApJ 622, 759),
its maps of P and of the CMB temperature anisotropy dT/T = -P (1 - e^-x)/x,
the maps of two independent splits of each pixel's rays
(:mod:`raytrace.tracing.splits`; their signal and noise: :mod:`raytrace.sky.spectra`),
angular power spectra (healpy.anafast), FITS maps (:mod:`raytrace.sky.fits`),
Mollweide plots (:mod:`raytrace.sky.figures`) and maps per redshift shell. The
limits on epsilon from its anisotropy are :mod:`raytrace.limits.anisotropy`'s.

A sky's maps stay where its run wrote them: in its result file, or for a run
without one in the same file in memory. Everything downstream reads them one
mass at a time (:meth:`SkyResult.map`, :meth:`SkyResult.split_maps`,
:meth:`SkyResult.columns`), so memory holds one map (plus the file's page cache)
whatever nside and the number of masses; the whole arrays (``kernel``,
``crossings``, ``kernel_splits`` ...) are still there for small skies and read
every map.

The light cone is traced by :mod:`raytrace.tracing.lattice`, which says how
the copies of the boxes are laid out and transformed. The random transforms break the exact repetition a plain periodic
lattice would print on the sky; the box still sets the largest correlated
angle at each distance (about box size / chi), so beyond chi ~ box size / theta
the map of one copy is no longer a fair sample of larger structures.
"""

import numpy as np

from raytrace.core.errors import InputError
from raytrace.core.resultchecks import check_values, mass_grid, read_arrays, run_record, scalar_attribute, sky_rows
from raytrace.core.resultfiles import RowArray, open_complete, read_group, read_rows, save_rows
from raytrace.physics.conversion import anisotropy_per_probability
from raytrace.statistics.meancheck import SKY_CHECK_POINTS, check_groups, read_pdf_check, warn_on_mismatch
from raytrace.statistics.onepoint import PER_MASS
from raytrace.statistics.results import KernelRows, tangent_arrays
from raytrace.statistics.spread import Columns
from raytrace.tracing.checks import DEFAULT_PHOTON_ENERGY_EV, check_background
from raytrace.tracing.lattice import FORMAT, trace_sky
from raytrace.tracing.splits import SPLITS

#: Pixels per piece when the face of each pixel is worked out (RING order): 8 MB of indices at a time.
_FACE_PIECE = 1 << 20
#: What a sky's readers need of its run record.
_REQUIRED = ("z_max", "z_boxes", "seed", "nside", "ordering", "rays_per_pixel")
_MAPS = ("kernel_boxes", "crossings", "tangent_events", "kernel_tangent")


def _healpy():
    import healpy

    return healpy


class SkyResult(KernelRows):
    """Kernel maps of one observer's sky, in memory or in its result file.

    ``maps`` holds each per-mass array (n_masses, npix), mass-major, as numpy
    arrays or the file's datasets; :meth:`map` reads one mass's map. ``kernel``
    (npix, n_masses) in eV, pixel order as ``ordering`` says, reads them all;
    P = epsilon^2 K / omega_0. ``splits`` holds the boxes' kernel of each
    independent split of the pixels' rays (:mod:`raytrace.tracing.splits`),
    (n_masses, 2, npix), read a mass at a time by :meth:`split_maps`; None for a
    sky of one ray per pixel (or a file from before the splits): its noise is unknown.
    """

    def __init__(self, mass_eV, kernel_boxes, kernel_background, crossings, dispersion_measure_boxes,
                 dispersion_measure_background, run, tangent_events=None, kernel_tangent=None, kernel_splits=None):
        kernel_boxes = np.asarray(kernel_boxes, dtype=float)
        # Per pixel: means over the pixel's rays, so fractional counts.
        events, tangent = tangent_arrays(kernel_boxes, tangent_events, kernel_tangent)
        maps = {"kernel_boxes": kernel_boxes.T, "crossings": np.asarray(crossings, dtype=float).T,
                "tangent_events": np.asarray(events, dtype=float).T, "kernel_tangent": tangent.T}
        splits = None if kernel_splits is None else np.asarray(kernel_splits, dtype=float).transpose(2, 1, 0)
        self._set_up(mass_eV, maps, splits, kernel_background, dispersion_measure_boxes, dispersion_measure_background,
                     run)

    def _set_up(self, mass_eV, maps, splits, kernel_background, dispersion_measure_boxes,
                dispersion_measure_background, run, handle=None):
        self.mass_eV = np.asarray(mass_eV, dtype=float)
        self.maps = maps
        self.splits = splits
        self.kernel_background = np.asarray(kernel_background, dtype=float)
        self.dispersion_measure_boxes = np.asarray(dispersion_measure_boxes, dtype=float)
        self.dispersion_measure_background = float(dispersion_measure_background)
        self.run = dict(run)
        self.nside = int(self.run["nside"])
        self.ordering = self.run["ordering"]
        self.handle = handle
        self.shell_edges_z = self.kernel_shells_boxes = self.shells_background = None

    @classmethod
    def from_file(cls, handle):
        """The sky an open, complete result file holds; its maps are read from the file when asked, each
        checked as it is read, the rest checked now (:mod:`raytrace.core.resultchecks`)."""
        path = handle.filename
        sky = object.__new__(cls)
        maps = {name: item for name, item in handle.items() if int(item.attrs.get("rows_axis", 0)) >= 1}
        splits = maps.pop("kernel_splits", None)
        if maps:
            run, mass = run_record(handle, path, _REQUIRED), mass_grid(handle, path)
            npix = sky_rows(run, path)
            arrays = read_arrays(handle, path, ("kernel_background", "dispersion_measure_boxes"), mass.size, npix)
            for name, item in {**maps, **({} if splits is None else {"kernel_splits": splits})}.items():
                expected = (mass.size, npix) if name != "kernel_splits" else (mass.size, SPLITS, npix)
                if item.shape != expected:
                    raise InputError(f"{path}: dataset {name} has shape {item.shape}; expected {expected} "
                                     "(masses, [splits,] pixels): the file is damaged or cut short")
            dm_background = scalar_attribute(handle, path, "dispersion_measure_background")
        else:  # files before format version 3 hold (npix, [splits,] n_masses), rows first, and fit in memory
            run, mass, arrays, dm_background = read_rows(handle, path, required=_REQUIRED, sky=True)
            events, tangent = tangent_arrays(arrays["kernel_boxes"], arrays["tangent_events"], arrays["kernel_tangent"])
            maps = {"kernel_boxes": arrays["kernel_boxes"].T, "crossings": arrays["crossings"].astype(float).T,
                    "tangent_events": events.astype(float).T, "kernel_tangent": tangent.T}
            splits = _legacy_splits(handle, path, mass.size, sky_rows(run, path))
        sky._set_up(mass, maps, splits, arrays["kernel_background"], arrays["dispersion_measure_boxes"],
                    dm_background, run, handle)
        shells = read_group(handle, "redshift_shells", mass.size)
        if shells is not None:
            sky.set_shells(shells[0]["edges_z"], handle["kernel_shells_boxes"][...], shells[0]["background"])
        sky.pdf_check = read_pdf_check(read_group(handle, "pdf_mean", mass.size, PER_MASS), sky.mass_eV)
        return sky

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

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()

    def close(self):
        """Close the result file the maps are read from (a sky in memory has none)."""
        if self.handle is not None:
            self.handle.close()

    @property
    def npix(self):
        return self.dispersion_measure_boxes.size

    def _whole(self, name):
        return np.asarray(self.maps[name][...], dtype=float).T

    kernel_boxes = property(lambda self: self._whole("kernel_boxes"), doc="(npix, n_masses): every map, read whole")
    crossings = property(lambda self: self._whole("crossings"), doc="(npix, n_masses): every map, read whole")
    tangent_events = property(lambda self: self._whole("tangent_events"), doc="(npix, n_masses), read whole")
    kernel_tangent = property(lambda self: self._whole("kernel_tangent"), doc="(npix, n_masses), read whole")

    # -- one mass at a time ---------------------------------------------------------------
    def pixels(self, name, k, start=0, stop=None):
        """Pixels start..stop-1 of mass ``k``'s map of ``name`` (one read, checked when it comes from a file);
        "kernel" is boxes plus background."""
        if name == "kernel":
            return self.pixels("kernel_boxes", k, start, stop) + self.kernel_background[k]
        values = np.asarray(self.maps[name][k, start:self.npix if stop is None else stop], dtype=float)
        if self.handle is not None:
            check_values(values, self.handle.filename, f"dataset {name} (mass {k})")
        return values

    def map(self, name, k):
        """Mass ``k``'s whole map of ``name`` (float64, one contiguous read of the file)."""
        return self.pixels(name, k)

    def columns(self, name="kernel", masses=None, scale=1.0):
        """The maps of ``name`` at the mass indices ``masses`` (default all) times ``scale``, as
        :class:`~raytrace.statistics.spread.Columns`: read a block of pixels or one map at a time."""
        masses = list(range(self.mass_eV.size)) if masses is None else [int(k) for k in masses]
        return Columns(self.npix, len(masses),
                       lambda a, b: np.stack([self.pixels(name, k, a, b) * scale for k in masses], axis=1),
                       lambda j: self.map(name, masses[j]) * scale)

    def mean(self):
        """Mean kernel over the pixels (eV), per mass."""
        return self.columns().each(np.mean)

    def resonating_fraction(self):
        """Share of pixels with a crossing inside the boxes, per mass."""
        return self.columns("crossings").each(lambda crossings: np.count_nonzero(crossings) / crossings.size)

    def saturates(self, epsilon, omega0_eV):
        """Whether P = epsilon^2 K / omega_0 leaves the linear regime in some pixel at some mass (then P is
        given in the saturating form): the largest K of each map, one map at a time."""
        from raytrace.physics.conversion import needs_saturation

        cache = self.__dict__.setdefault("_saturation", {})
        key = (float(epsilon), float(omega0_eV))
        if key not in cache:
            cache[key] = needs_saturation(self.columns().each(np.max), epsilon, omega0_eV)
        return cache[key]

    def faces(self):
        """The base HEALPix pixel (0 to 11) of every pixel, in this sky's order (int8: npix bytes)."""
        per_face = self.nside * self.nside
        if self.ordering == "NESTED":
            return np.repeat(np.arange(12, dtype=np.int8), per_face)
        faces = np.empty(self.npix, dtype=np.int8)
        for start in range(0, self.npix, _FACE_PIECE):
            stop = min(start + _FACE_PIECE, self.npix)
            faces[start:stop] = _healpy().ring2nest(self.nside, np.arange(start, stop)) // per_face
        return faces

    def face_means(self):
        """(12, n_masses): the mean kernel over each of the 12 base pixels, one map at a time."""
        faces = self.faces()
        counts = np.bincount(faces, minlength=12)
        return self.columns().each(lambda kernel: np.bincount(faces, weights=kernel, minlength=12) / counts).T

    @property
    def split_rays(self):
        """Rays per pixel of each split, () where the sky has no splits."""
        return tuple(self.run.get("split_rays", ())) if self.splits is not None else ()

    @property
    def kernel_splits(self):
        """(npix, 2, n_masses): the boxes' kernel of each split, every mass read whole; None without splits."""
        return None if self.splits is None else np.asarray(self.splits[...], dtype=float).transpose(2, 1, 0)

    def split_maps(self, k):
        """(2, npix): mass ``k``'s boxes' kernel of split A and of split B (float64, one contiguous read of the
        file, checked when it comes from one)."""
        self.require_splits()
        return self._split_pixels(k, slice(None), 0, self.npix)

    def split_columns(self, part):
        """Split ``part``'s (0: A, 1: B) maps of every mass as :class:`~raytrace.statistics.spread.Columns`:
        read a block of pixels or one map at a time."""
        self.require_splits()
        masses = range(self.mass_eV.size)
        return Columns(self.npix, len(masses),
                       lambda a, b: np.stack([self._split_pixels(k, part, a, b) for k in masses], axis=1),
                       lambda k: self._split_pixels(k, part, 0, self.npix))

    def _split_pixels(self, k, part, start, stop):
        values = np.asarray(self.splits[k, part, start:stop], dtype=float)
        if self.handle is not None:
            check_values(values, self.handle.filename, f"dataset kernel_splits (mass {k})")
        return values

    def require_splits(self, what="the signal"):
        """Refuse, in one line, what needs the splits on a sky without them."""
        if self.splits is None:
            raise InputError(f"{what}: this sky has {self.run.get('rays_per_pixel', 1)} ray per pixel and no "
                             "independent splits, so its map's sampling noise is unknown; cast it with "
                             "rays_per_pixel >= 2 (--rays-per-pixel)")

    def mass_index(self, mass_eV):
        """Index of the grid mass nearest (in log) to ``mass_eV``."""
        if not (np.isfinite(mass_eV) and mass_eV > 0):
            raise InputError(f"mass: expected a positive mass in eV, got {mass_eV!r}")
        return int(np.argmin(np.abs(np.log(self.mass_eV) - np.log(mass_eV))))

    def kernel_map(self, mass_eV):
        return self.map("kernel", self.mass_index(mass_eV))

    def probability_map(self, mass_eV, epsilon, omega0_eV, saturate=None):
        """P per pixel at one mass: linear, or (``saturate`` None) saturating where the sky leaves the
        linear regime (:meth:`saturates`)."""
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
        """Write the sky to HDF5 atomically, one map at a time (maps in their stored precision)."""
        layout = {name: RowArray(lambda r, m: (m, r), maps.dtype, 1) for name, maps in self.maps.items()}
        layout["dispersion_measure_boxes"] = RowArray(lambda r, m: (r,), np.float64)
        if self.splits is not None:
            layout["kernel_splits"] = RowArray(lambda r, m: (m, SPLITS, r), self.splits.dtype, 2)
        if self.kernel_shells_boxes is not None:
            shells = self.kernel_shells_boxes.shape[1]
            layout["kernel_shells_boxes"] = RowArray(lambda r, m: (r, shells, m), np.float64)

        def fill(handle):
            for name, maps in {**self.maps, **({} if self.splits is None else {"kernel_splits": self.splits})}.items():
                for k in range(self.mass_eV.size):
                    handle[name][k] = maps[k]
            handle["dispersion_measure_boxes"][...] = self.dispersion_measure_boxes
            if self.kernel_shells_boxes is not None:
                handle["kernel_shells_boxes"][...] = self.kernel_shells_boxes

        return save_rows(path, overwrite, FORMAT, self.mass_eV, self.run, layout, self.npix,
                         {"kernel_background": self.kernel_background},
                         {"dispersion_measure_background": self.dispersion_measure_background}, self.stored_groups(),
                         fill)

    @classmethod
    def load(cls, path):
        """The sky of a result file, its maps read from the file when asked (close it, or use ``with``)."""
        return cls.from_file(open_complete(path, FORMAT, "sky"))

    def write_fits(self, path, masses_eV, epsilon=None, omega0_eV=None, overwrite=False, owner=None, shown_eV=None):
        """HEALPix FITS maps of K at ``masses_eV``, and of P when ``epsilon`` is given, streamed a block of
        pixels at a time (:func:`raytrace.sky.fits.write_sky_fits`).

        The maps come in the order of ``masses_eV``; with ``shown_eV`` (the mass a
        run shows) that mass's maps come first in their own extension (HDU 1, what
        ``healpy.read_map`` returns by default) and those of ``masses_eV`` in HDU 2.
        Each header carries nside, ordering, units, the frame (SKYFRAME: the box
        axes, no celestial COORDSYS), each map's mass (MASS1 ...), SHOWMASS, the
        run's seed, z range, the input checksums, EPSILON and OMEGA0 only with
        probability maps, and ``owner`` (the run's result file, keyword RTRESULT;
        see :mod:`raytrace.core.companions`).
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


def _legacy_splits(handle, path, n_masses, npix):
    """(n_masses, 2, npix) of a file before format version 3 that holds kernel_splits (npix, 2, n_masses), or
    None."""
    if "kernel_splits" not in handle:
        return None
    values = handle["kernel_splits"][...]
    if values.shape != (npix, SPLITS, n_masses):
        raise InputError(f"{path}: dataset kernel_splits has shape {values.shape}; expected "
                         f"{(npix, SPLITS, n_masses)} (pixels, splits, masses): the file is damaged or cut short")
    check_values(values, path, "dataset kernel_splits")
    return values.transpose(2, 1, 0)


def cast_sky(series, mass_eV, nside, z_max, seed=0, rays_per_pixel=4, n_jobs=1, include_background=True,
             z_boxes=None, ordering="RING", plasma=None, randomise_copies=True, batch_pixels=1024,
             backend=None, progress=False, executor=None, photon_energy_eV=DEFAULT_PHOTON_ENERGY_EV,
             map_precision="float64", shells_z=None, device="cpu", **removed):
    """A HEALPix map of the conversion kernel seen by one observer out to ``z_max``.

    ``rays_per_pixel`` (>= 2) rays per pixel, at random stratified positions inside
    it, form two independent splits (:mod:`raytrace.tracing.splits`); the result keeps
    the mean of all of them (the map) and each split's map, whose cross-spectrum
    is free of the sampling noise (:mod:`raytrace.sky.spectra`). ``rays_per_pixel=1``
    is a plain map, one ray at each pixel's centre, whose noise is unknown.
    ``ordering`` is "RING" or "NESTED" for the result's pixel order. ``randomise_copies=False`` leaves every copy of the
    lattice untransformed: a diagnostic that shows the replication pattern.
    ``map_precision`` "float32" stores the maps per mass in single precision
    (half the file; see :data:`raytrace.tracing.lattice.PRECISIONS`).
    Other arguments (``backend``, ``executor`` for a cluster) as in
    :func:`raytrace.cast_sightlines`, including ``photon_energy_eV`` and ``device``;
    results are bit-identical for any ``n_jobs``, ``batch_pixels`` or cluster. With an
    :class:`~raytrace.tracing.backends.HDF5Backend` the maps (and each split's maps)
    go batch by batch to the result file and the returned sky reads them from there.
    ``shells_z``: edges in z of redshift shells (or a count, as ``redshift_bins`` of
    :func:`raytrace.cast_sightlines`): the result also holds a map per shell and mass
    (``kernel_shells``), each crossing in the shell of its redshift.
    """
    from raytrace.boxes import as_series

    series = as_series(series)
    plasma = check_background(plasma)
    traced = trace_sky(series, mass_eV, nside, z_max, n_jobs=n_jobs, backend=backend, progress=progress,
                       executor=executor, groups=check_groups(series, plasma, n_jobs, SKY_CHECK_POINTS), seed=seed,
                       rays_per_pixel=rays_per_pixel, include_background=include_background, z_boxes=z_boxes,
                       ordering=ordering, plasma=plasma, randomise_copies=randomise_copies,
                       batch_pixels=batch_pixels, photon_energy_eV=photon_energy_eV, map_precision=map_precision,
                       shells_z=shells_z, device=device, **removed)
    # The built-in check (raytrace.statistics.meancheck), per mass and per shell.
    return warn_on_mismatch(SkyResult.from_file(traced.backend.finish()))

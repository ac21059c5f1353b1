"""Signal and noise of a sky map, from its two independent splits (PHYSICS.md section 10).

In: a :class:`~raytrace.sky.maps.SkyResult` with splits (two or more rays per pixel).
Out: :class:`SkySpectra`, per multipole and mass (K maps, eV^2, pixel window
removed): the signal spectrum C_l^AB (the cross-spectrum of the splits A and B),
the noise spectrum of the map, the auto-spectra, and the map's signal variance
(the covariance of A and B over pixels) with the noise variance beside it;
their errors; band averages; and the line that says where the noise exceeds the
signal and how many rays per pixel would bring it below.

- The noise of A and B is independent (:mod:`raytrace.tracing.splits`), so
  E[C_l^AB] = W_l^2 C_l(signal). The map (the mean of all N rays) carries the
  noise N_l of white sampling noise of variance sigma_sub^2 / N per pixel,
  measured without the signal by the difference map d = (A - B) sqrt(n_A n_B) / N
  (its pixel variance is sigma_sub^2 / N exactly, for any split sizes).
- Every spectrum is divided by W_l^2 (:func:`raytrace.sky.pixelwindow.pixel_window`),
  the noise too, so that signal and noise compare as they enter a spectrum
  compared with data.
- Errors per multipole, Gaussian (Knox 1995, PRD 52, 4307; full sky, Delta l = 1):
  var(C_l^AB) = ((C_l^AB)^2 + C_l^AA C_l^BB) / (2l + 1) in all (the sky's own sample
  variance plus the rays' noise); of that, the noise's part, what more rays
  remove, is (C_l^AA C_l^BB - (C_l^AB)^2) / (2l + 1); var(N_l) = 2 N_l^2 / (2l + 1).
  Bands add the variances of their multipoles.
- The signal variance's interval is a seeded bootstrap over pixels (Efron &
  Tibshirani 1993): the sampling noise is independent between pixels, which the
  bootstrap measures, heavy tails included; the signal's correlations between
  pixels it does not see (a lower bound on the sky's sample variance).
- A map that varies by less than :data:`FLAT_LEVEL` of its mean is flat: in a
  uniform box the engine's kernel agrees between directions to ~2e-6 (test_sky),
  so below 1e-5 there is no anisotropy to speak of; its spectra are zero.
"""

import math
from dataclasses import dataclass

import numpy as np

from raytrace.statistics.spread import LEVEL, N_RESAMPLES, percentile_interval, resample_blocks

#: A map whose pixels differ by less than this share of their mean (rms) is flat: no anisotropy.
FLAT_LEVEL = 1e-5
#: Multipole bands of the tables: 2-9, 10-29, 30-49, 50-99, ... up to the map's largest l.
BAND_EDGES = (2, 10, 30, 50, 100, 200, 500, 1000, 2000, 3000, 5000)


def resolved_lmax(nside):
    """The largest multipole a map of ``nside`` resolves: 2 nside (common practice, no source: the
    pixel window is ~0.82 there and the power of smaller scales aliased into it is still small)."""
    return 2 * int(nside)


@dataclass(frozen=True, eq=False)
class SkySpectra:
    """Per multipole l = 0..lmax and mass: spectra of the K maps in eV^2, pixel window removed.

    ``cross`` is the signal spectrum C_l^AB; ``noise`` the map's noise spectrum;
    ``auto_a``, ``auto_b``, ``full``: the auto-spectra of the splits and of the map.
    ``variance``: the map's signal variance (eV^2, covariance of the splits over
    pixels) with its bootstrap ``variance_low``, ``variance_high`` (at ``level``)
    and standard error ``variance_error``; ``noise_variance`` the map's, with its bootstrap standard
    error ``noise_variance_error`` (the noise is independent between pixels). ``mean``:
    the map's mean K; ``flat``: masses whose map has no anisotropy.
    """

    mass_eV: np.ndarray
    nside: int
    rays_per_pixel: int
    split_rays: tuple
    window: np.ndarray
    mean: np.ndarray
    cross: np.ndarray
    auto_a: np.ndarray
    auto_b: np.ndarray
    full: np.ndarray
    noise: np.ndarray
    variance: np.ndarray
    variance_error: np.ndarray
    variance_low: np.ndarray
    variance_high: np.ndarray
    noise_variance: np.ndarray
    noise_variance_error: np.ndarray
    flat: np.ndarray
    n_resamples: int
    level: float
    seed: int

    @property
    def lmax(self):
        return self.cross.shape[0] - 1

    @property
    def ell(self):
        return np.arange(self.lmax + 1)

    def signal_variance_per_l(self, noise_only=False):
        """Gaussian variance of C_l^AB per l (Knox 1995): all of it, or the rays' noise part alone."""
        modes = (2 * self.ell + 1.0)[:, None]
        product = self.auto_a * self.auto_b
        return ((product - self.cross**2) if noise_only else (product + self.cross**2)) / modes

    def band(self, low, high, weights=None):
        """Averages over l = low..high (``weights`` per l, default equal) per mass, in eV^2: a dict of
        signal, signal_error, signal_noise_error, noise, noise_error, full (all l-weighted alike)."""
        high = min(int(high), self.lmax)
        low = max(int(low), 2)
        ell = np.arange(low, high + 1)
        w = np.ones(ell.size) if weights is None else np.asarray(weights(ell), dtype=float)
        w = (w / w.sum())[:, None]
        noise_variance = 2 * self.noise[ell] ** 2 / (2 * ell + 1.0)[:, None]
        return {
            "signal": (w * self.cross[ell]).sum(axis=0),
            "signal_error": np.sqrt((w**2 * self.signal_variance_per_l()[ell]).sum(axis=0)),
            "signal_noise_error": np.sqrt((w**2 * self.signal_variance_per_l(True)[ell]).sum(axis=0)),
            "noise": (w * self.noise[ell]).sum(axis=0),
            "noise_error": np.sqrt((w**2 * noise_variance).sum(axis=0)),
            "full": (w * self.full[ell]).sum(axis=0),
        }

    def bands(self, lmax=None):
        """(low, high) of the table bands (:data:`BAND_EDGES`) up to ``lmax`` (default the map's)."""
        top = self.lmax if lmax is None else min(int(lmax), self.lmax)
        edges = [edge for edge in BAND_EDGES if edge <= top] + [top + 1]
        return [(a, b - 1) for a, b in zip(edges[:-1], edges[1:]) if b - 1 >= a]

    def rms(self):
        """(signal rms, low, high) of the map per mass, eV: sqrt of the signal variance (0 where it is <= 0)."""
        return tuple(np.sqrt(np.clip(value, 0.0, None)) for value in
                     (self.variance, self.variance_low, self.variance_high))

    def relative(self, values):
        """``values`` (eV^2, per mass in the last axis) as a share of the mean squared: C_l of K/<K>."""
        with np.errstate(divide="ignore", invalid="ignore"):
            return np.where(self.mean > 0, values / np.where(self.mean > 0, self.mean, 1.0) ** 2, 0.0)


def sky_spectra(sky, lmax=None, n_resamples=N_RESAMPLES, seed=None, level=LEVEL):
    """The :class:`SkySpectra` of a sky with splits (lmax default 3 nside - 1; seed default the sky's)."""
    import healpy

    from raytrace.sky.pixelwindow import pixel_window

    sky.require_splits("the signal and noise spectra")
    lmax = 3 * sky.nside - 1 if lmax is None else int(lmax)
    seed = int(sky.run.get("seed", 0)) if seed is None else seed
    n_a, n_b = sky.split_rays
    total = n_a + n_b
    window2 = pixel_window(sky.nside, lmax) ** 2
    ring = (lambda m: m) if sky.ordering == "RING" else (lambda m: healpy.reorder(m, n2r=True))
    # One mass's maps at a time, read from the sky's result file: memory holds a few maps whatever the masses.
    # Each mass's map read once for its mean and its spread (one map is 400 MB at nside 2048).
    mean, spread = sky.columns().each(lambda kernel: (kernel.mean(), kernel.std())).T
    flat = ~(spread > FLAT_LEVEL * np.abs(mean))
    spectra = {name: np.zeros((lmax + 1, sky.mass_eV.size)) for name in ("cross", "auto_a", "auto_b")}
    split = [sky.split_columns(part) for part in (0, 1)]
    centre = np.zeros((2, sky.mass_eV.size))  # the split maps' means, kept for their moments (flat masses: unused)
    for k in np.flatnonzero(~flat):
        # One split's map at a time (with healpy's work arrays, a few maps), then its alm (lmax^2 / 2 complex).
        alm_a, alm_b = (_centred_alm(columns, part, k, centre, ring, lmax) for part, columns in enumerate(split))
        for name, (one, two) in (("cross", (alm_a, alm_b)), ("auto_a", (alm_a, alm_a)), ("auto_b", (alm_b, alm_b))):
            spectra[name][:, k] = healpy.alm2cl(one, two, lmax=lmax) / window2
    # C_l is bilinear and symmetric in the alm of real maps, so the map (n_a A + n_b B) / N and the difference
    # map (A - B) sqrt(n_a n_b) / N have their spectra from these three, without their own alm.
    spectra["full"] = (n_a**2 * spectra["auto_a"] + n_b**2 * spectra["auto_b"]
                       + 2 * n_a * n_b * spectra["cross"]) / total**2
    spectra["noise"] = n_a * n_b * (spectra["auto_a"] + spectra["auto_b"] - 2 * spectra["cross"]) / total**2
    moments = _split_moments(split, centre, sky.split_rays, flat, n_resamples, seed, level)
    return SkySpectra(sky.mass_eV, sky.nside, int(total), (n_a, n_b), np.sqrt(window2), mean, **spectra, **moments,
                      flat=flat, n_resamples=int(n_resamples), level=float(level), seed=int(seed))


def _centred_alm(columns, part, k, centre, ring, lmax):
    """The alm of split ``part``'s map of mass ``k`` less its mean, which goes to ``centre[part, k]``."""
    import healpy

    values = columns.column(k)
    centre[part, k] = values.mean()
    centred = values - centre[part, k]
    del values  # healpy's transform holds a few maps of its own
    return healpy.map2alm(ring(centred), lmax=lmax, iter=3)


def _split_moments(split, centre, split_rays, flat, n_resamples, seed, level):
    """Per mass: the covariance over pixels of the two split maps (``split``, as columns; ``centre``: their
    means) with its bootstrap error and interval (the signal variance), and the variance of the difference map
    (the noise) with its bootstrap error. The maps are read a block of pixels at a time, every mass at once,
    so each resample is drawn once for all masses (:func:`raytrace.statistics.spread.resample_blocks`) and
    memory holds a block, whatever nside. Flat masses' values are 0."""
    n_a, n_b = split_rays
    scale = math.sqrt(n_a * n_b) / (n_a + n_b)
    n, n_masses = split[0].n_rows, split[0].n_columns
    sums = {name: np.zeros((n_resamples, n_masses)) for name in ("ab", "a", "b", "dd", "d")}
    totals = {name: np.zeros(n_masses) for name in ("ab", "dd")}
    for start, stop, weights in resample_blocks(n, n_resamples, seed):
        a, b = (columns.block(start, stop) - middle for columns, middle in zip(split, centre))
        d = (a - b) * scale
        for name, values in (("ab", a * b), ("a", a), ("b", b), ("dd", d * d), ("d", d)):
            sums[name] += weights @ values
        totals["ab"] += (a * b).sum(axis=0)
        totals["dd"] += (d * d).sum(axis=0)
    samples = np.stack([sums["ab"] / n - (sums["a"] / n) * (sums["b"] / n), sums["dd"] / n - (sums["d"] / n) ** 2])
    low, high = percentile_interval(samples[0], level)
    # a and b are centred, so the difference map's mean is 0: its variance is its mean square.
    values = {"variance": totals["ab"] / n, "variance_error": samples[0].std(axis=0, ddof=1),
              "variance_low": low, "variance_high": high, "noise_variance": totals["dd"] / n,
              "noise_variance_error": samples[1].std(axis=0, ddof=1)}
    return {name: np.where(flat, 0.0, value) for name, value in values.items()}


def rays_for_noise_below_signal(spectra, signal, noise, signal_error):
    """Rays per pixel (rounded up) that would bring the noise below the signal (noise goes as 1/N),
    and whether that is a lower bound (the signal is not detected, below 2 of its noise errors)."""
    detected = signal > 2 * signal_error
    reference = np.where(detected, signal, np.clip(signal, 0.0, None) + 2 * signal_error)
    with np.errstate(divide="ignore", invalid="ignore"):
        needed = np.ceil(spectra.rays_per_pixel * noise / reference)
    return needed, ~detected


def noise_excess_line(spectra, lmax=None, most=6):
    """One line naming the masses and l bands where the noise exceeds the signal, with the rays per pixel
    that would bring it below; or the line saying that it does nowhere."""
    cells = []
    for k in np.flatnonzero(~spectra.flat):
        worst, ranges = None, []
        for low, high in spectra.bands(lmax):
            band = spectra.band(low, high)
            needed, bound = rays_for_noise_below_signal(spectra, band["signal"][k], band["noise"][k],
                                                        band["signal_noise_error"][k])
            if band["noise"][k] > band["signal"][k]:
                ranges.append(f"{low}-{high}")
                worst = max(worst or (0, False), (needed, bool(bound)))
        if ranges:
            prefix = "> " if worst[1] else "~"
            rays = (f"{prefix}{worst[0]:.0f} rays/pixel" if np.isfinite(worst[0])
                    else "no signal measured to say how many rays")
            cells.append(f"{spectra.mass_eV[k]:.3g} eV (l {', '.join(ranges)}; {rays})")
    if not cells:
        return (f"signal above noise in every band at every mass with anisotropy "
                f"({spectra.rays_per_pixel} rays per pixel)")
    more = f" and {len(cells) - most} more masses" if len(cells) > most else ""
    return (f"noise exceeds signal ({spectra.rays_per_pixel} rays per pixel: more rays needed) at "
            f"{len(cells)} of {spectra.mass_eV.size} masses: " + "; ".join(cells[:most]) + more)


def signal_noise_lines(spectra, rows, lmax=None, most=6):
    """Text lines: per mass of ``rows`` the map's signal and noise rms and, per l band, the signal spectrum
    with its errors beside the noise spectrum (C_l of K/<K>, pixel window removed)."""
    level = f"{100 * spectra.level:.0f}%"
    n_a, n_b = spectra.split_rays
    lines = [f"signal and noise of the map ({n_a} + {n_b} rays per pixel in two independent splits): rms of K/<K> "
             f"(signal: the splits' covariance, {level} bootstrap of the pixels); per band C_l of K/<K>, pixel window "
             "removed: signal +- Gaussian error (Knox 1995; its noise part), noise +- error"]
    rms, low, high = spectra.rms()
    for k in rows:
        relative = spectra.relative
        if spectra.flat[k]:
            lines.append(f"  m = {spectra.mass_eV[k]:.4g} eV: flat map (rms below {FLAT_LEVEL:g} of the mean), "
                         "no anisotropy")
            continue
        scale = spectra.mean[k]
        lines.append(f"  m = {spectra.mass_eV[k]:.4g} eV: signal rms {rms[k] / scale:.3g} ({low[k] / scale:.3g}-"
                     f"{high[k] / scale:.3g}), noise rms {np.sqrt(spectra.noise_variance[k]) / scale:.3g}")
        for band_low, band_high in spectra.bands(lmax):
            band = {name: relative(values)[k] for name, values in spectra.band(band_low, band_high).items()}
            flag = "   noise > signal" if band["noise"] > band["signal"] else ""
            lines.append(f"      l {band_low:>4}-{band_high:<4} signal {band['signal']:10.3e} +- "
                         f"{band['signal_error']:9.3e} ({band['signal_noise_error']:9.3e})   noise "
                         f"{band['noise']:9.3e} +- {band['noise_error']:8.2e}{flag}")
    lines.append(noise_excess_line(spectra, lmax, most))
    return lines

"""How well the spread between sightlines (or sky pixels) is determined.

In: per-row kernels (rows: rays or pixels; columns: masses), a number of
resamples and a seed. Out: bootstrap intervals of std/mean (and, for a sky, of
the rms of dT/T and of the anisotropy limit), the share of the variance carried
by the top 1 % of rows, the tail index from the Hill estimator, and robust
spreads (16-84 % half-width, median absolute deviation).

The variance of K is carried by a heavy tail: a few rows with K of many times
the mean. A spread quoted without these numbers may be set by a handful of rays.

- Bootstrap: ``n_resamples`` resamples of the rows with replacement (Efron &
  Tibshirani 1993, "An Introduction to the Bootstrap"), the percentile interval
  at the stated level; the resamples come from numpy's generator seeded with
  (seed, 0xB007), so an interval is the same on every run. The pixels of one sky
  are correlated, so a sky's bootstrap interval is a lower bound on its width.
- Hill estimator (Hill 1975, Ann. Stat. 3, 1163): with the k largest of n values
  X_(1) >= ... >= X_(k+1), alpha = k / sum_{i<=k} ln(X_(i) / X_(k+1)), standard
  error alpha / sqrt(k); k = floor(sqrt(n)) unless given (common practice, no
  source). A tail P(K > x) ~ x^-alpha with alpha <= 2 has no finite variance.
"""

from dataclasses import dataclass

import numpy as np

from raytrace.core.errors import InputError
from raytrace.physics.conversion import ISOTROPY_LEVEL, anisotropy_per_probability
from raytrace.tracing.checks import check_seed

N_RESAMPLES = 1000
LEVEL = 0.68
TOP_FRACTION = 0.01
#: Warn when the top 1 % of rows carry more than this share of the variance.
TOP_SHARE_WARNING = 0.5
_CHUNK = 64  # resamples per matrix product: bounds memory at 64 x n_rows counts


def _rng(seed):
    return np.random.default_rng(np.random.SeedSequence([check_seed(seed), 0xB007]))


def _rows(kernel, what="kernel"):
    kernel = np.asarray(kernel, dtype=float)
    if kernel.ndim == 1:
        kernel = kernel[:, None]
    if kernel.ndim != 2 or kernel.shape[0] < 2:
        raise InputError(f"{what}: expected at least 2 rows (rays or pixels) to measure a spread, got shape "
                         f"{kernel.shape}")
    return kernel


def bootstrap_moments(kernel, n_resamples=N_RESAMPLES, seed=0):
    """(mean, std) per resample and mass, each (n_resamples, n_masses), of rows resampled with replacement."""
    kernel = _rows(kernel)
    if isinstance(n_resamples, bool) or not isinstance(n_resamples, (int, np.integer)) or n_resamples < 10:
        raise InputError(f"n_resamples: expected a whole number >= 10, got {n_resamples!r}")
    n = kernel.shape[0]
    rng = _rng(seed)
    # Centred and scaled first, so the second moment loses no digits.
    centre, scale = kernel.mean(axis=0), kernel.std(axis=0)
    scale = np.where(scale > 0, scale, 1.0)
    unit = (kernel - centre) / scale
    means, stds = np.empty((n_resamples, kernel.shape[1])), np.empty((n_resamples, kernel.shape[1]))
    for start in range(0, n_resamples, _CHUNK):
        count = min(_CHUNK, n_resamples - start)
        weights = rng.multinomial(n, np.full(n, 1.0 / n), size=count).astype(float)
        first = weights @ unit / n
        second = weights @ unit**2 / n
        means[start:start + count] = centre + scale * first
        stds[start:start + count] = scale * np.sqrt(np.maximum(second - first**2, 0.0) * n / (n - 1))
    return means, stds


def percentile_interval(samples, level=LEVEL):
    """(low, high) per column: the central ``level`` percentile interval of bootstrap samples."""
    if not 0 < level < 1:
        raise InputError(f"level: expected a confidence level between 0 and 1, got {level!r}")
    tail = 50.0 * (1.0 - level)
    samples = np.asarray(samples, dtype=float)
    low, high = np.full((2,) + samples.shape[1:], np.nan)
    some = ~np.all(np.isnan(samples), axis=0)  # columns without one number (K = 0) have no interval
    low[some], high[some] = np.nanpercentile(samples[:, some], [tail, 100.0 - tail], axis=0)
    return low, high


def relative_spread_interval(kernel, n_resamples=N_RESAMPLES, seed=0, level=LEVEL):
    """(std/mean, low, high) per mass; nan where the mean is 0."""
    kernel = _rows(kernel)
    means, stds = bootstrap_moments(kernel, n_resamples, seed)
    with np.errstate(invalid="ignore", divide="ignore"):
        value = kernel.std(axis=0, ddof=1) / kernel.mean(axis=0)
        low, high = percentile_interval(np.where(means > 0, stds / means, np.nan), level)
    return value, low, high


def top_share(kernel, fraction=TOP_FRACTION):
    """Share of the variance sum (K - mean)^2 carried by the top ``fraction`` of rows (largest K), per mass."""
    kernel = _rows(kernel)
    n = kernel.shape[0]
    top = max(1, int(np.ceil(fraction * n)))
    squares = (kernel - kernel.mean(axis=0)) ** 2
    largest = np.sort(kernel, axis=0)[n - top:]
    total = squares.sum(axis=0)
    # Rows equal but for rounding (the background alone) have no spread to share.
    total = np.where(np.ptp(kernel, axis=0) > 1e-12 * np.abs(kernel).max(axis=0), total, 0.0)
    carried = ((largest - kernel.mean(axis=0)) ** 2).sum(axis=0)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(total > 0, carried / total, np.nan)


def hill_index(values, k=None):
    """(alpha, standard error, k) of the upper tail of positive ``values`` (Hill 1975; module docstring)."""
    values = np.asarray(values, dtype=float).ravel()
    values = np.sort(values[np.isfinite(values) & (values > 0)])[::-1]
    n = values.size
    if k is None:
        k = int(np.floor(np.sqrt(n)))
    if isinstance(k, bool) or not isinstance(k, (int, np.integer)) or not 2 <= k < n:
        raise InputError(f"k: the Hill estimator needs 2 <= k < {n} positive values, got k = {k!r}")
    logs = np.log(values[:k] / values[k])
    total = logs.sum()
    alpha = k / total if total > 0 else np.inf
    return float(alpha), float(alpha / np.sqrt(k)), int(k)


def robust_spread(kernel):
    """(16-84 % half-width, median absolute deviation) per mass, in the kernel's units."""
    kernel = _rows(kernel)
    q16, q84 = np.percentile(kernel, [16.0, 84.0], axis=0)
    median = np.median(kernel, axis=0)
    return 0.5 * (q84 - q16), np.median(np.abs(kernel - median), axis=0)


@dataclass(frozen=True)
class Spread:
    """Per mass: how the spread between rows stands and how well it is known.

    relative, relative_low, relative_high : std/mean and its bootstrap interval.
    top_share : share of the variance in the top 1 % of rows.
    tail_index, tail_error, tail_k : Hill estimator of the upper tail and the k used.
    half_width, mad : 16-84 % half-width and median absolute deviation (eV).
    n_resamples, level, seed : of the bootstrap.
    """

    mass_eV: np.ndarray
    relative: np.ndarray
    relative_low: np.ndarray
    relative_high: np.ndarray
    top_share: np.ndarray
    tail_index: np.ndarray
    tail_error: np.ndarray
    tail_k: np.ndarray
    half_width: np.ndarray
    mad: np.ndarray
    n_resamples: int
    level: float
    seed: int

    def heavy(self, threshold=TOP_SHARE_WARNING):
        """Indices of the masses where the top 1 % of rows carry more than ``threshold`` of the variance."""
        return np.flatnonzero(np.nan_to_num(self.top_share) > threshold)

    def warning(self, threshold=TOP_SHARE_WARNING):
        """One line naming the masses with a variance carried by the top 1 %, or None."""
        bad = self.heavy(threshold)
        if bad.size == 0:
            return None
        shown = ", ".join(f"{self.mass_eV[k]:.3g} eV ({100 * self.top_share[k]:.0f} %)" for k in bad[:6])
        more = f" and {bad.size - 6} more" if bad.size > 6 else ""
        return (f"the top 1 % of rows carry more than {100 * threshold:.0f} % of the variance at {bad.size} of "
                f"{self.mass_eV.size} masses: {shown}{more}; the variance there is set by a few rows, quote the "
                "robust spreads")

    def table(self, rows, kernel=None, row="row"):
        """Text lines for the masses ``rows`` ('-' where a number does not exist; with the per-row ``kernel``,
        a mass that resonates on no row says so)."""
        from raytrace.core.textcells import cell, no_resonance

        level = f"{100 * self.level:.0f}%"
        lines = [f"  {'m [eV]':>11} {'std/mean':>9} {level + ' interval':>19} {'top 1%':>7} "
                 f"{'tail index':>12} {'16-84 hw':>10} {'MAD':>10}"]
        for k in rows:
            empty = None if kernel is None else no_resonance(kernel[:, k], row)
            if empty:
                lines.append(f"  {self.mass_eV[k]:11.4g} {empty}")
                continue
            interval = (f"{self.relative_low[k]:.3g}-{self.relative_high[k]:.3g}"
                        if np.isfinite(self.relative_low[k]) else "-")
            tail = (f"{self.tail_index[k]:.2f}+-{self.tail_error[k]:.2f}" if np.isfinite(self.tail_index[k]) else "-")
            lines.append(f"  {self.mass_eV[k]:11.4g} {cell(self.relative[k], '.3g', 9)} {interval:>19} "
                         f"{cell(100 * self.top_share[k], '.1f', 6)}% {tail:>12} "
                         f"{self.half_width[k]:10.3g} {self.mad[k]:10.3g}")
        lines.append(f"  bootstrap: {self.n_resamples} resamples, seed {self.seed}; tail index: Hill estimator on the "
                     f"k = {int(np.max(self.tail_k))} largest values (k = floor(sqrt(rows)))")
        return lines


def spread(kernel, mass_eV, n_resamples=N_RESAMPLES, seed=0, level=LEVEL):
    """The :class:`Spread` of per-row kernels (n_rows, n_masses)."""
    kernel = _rows(kernel)
    relative, low, high = relative_spread_interval(kernel, n_resamples, seed, level)
    tails = np.full((3, kernel.shape[1]), np.nan)
    for m in range(kernel.shape[1]):
        positive = kernel[:, m][kernel[:, m] > 0]
        if positive.size >= 9 and np.ptp(positive) > 0:
            tails[:, m] = hill_index(positive)
    half_width, mad = robust_spread(kernel)
    return Spread(np.asarray(mass_eV, dtype=float), relative, low, high, top_share(kernel), tails[0], tails[1],
                  np.nan_to_num(tails[2]).astype(int), half_width, mad, int(n_resamples), float(level), int(seed))


def sky_rms_interval(sky, omega0_eV, n_resamples=N_RESAMPLES, seed=0, level=LEVEL, threshold=None):
    """Bootstrap over pixels of the rms of dT/T at epsilon = 1 and of the rms anisotropy limit.

    Returns a dict of per-mass arrays: "rms", "rms_low", "rms_high" (dT/T at
    epsilon = 1; it scales as epsilon^2) and "epsilon_max", "epsilon_low",
    "epsilon_high" (epsilon_max = sqrt(threshold / rms); a larger rms gives a lower
    epsilon, so the interval's ends swap). The pixels of one sky are correlated:
    the interval is a lower bound on the true uncertainty.
    """
    threshold = ISOTROPY_LEVEL if threshold is None else float(threshold)
    factor = anisotropy_per_probability(omega0_eV) / omega0_eV
    dtt = sky.kernel * factor  # |dT/T| per pixel at epsilon = 1 (the sign does not change an rms)
    _, stds = bootstrap_moments(dtt, n_resamples, seed)
    n = dtt.shape[0]
    stds *= np.sqrt((n - 1) / n)  # the map's rms is the population std (raytrace.limits.anisotropy.anisotropy_limit)
    rms = dtt.std(axis=0)
    low, high = percentile_interval(stds, level)
    with np.errstate(divide="ignore", invalid="ignore"):
        def limit(value):
            return np.where(value > 0, np.sqrt(threshold / np.where(value > 0, value, 1.0)), np.inf)

        return {"rms": rms, "rms_low": low, "rms_high": high, "epsilon_max": limit(rms),
                "epsilon_low": limit(high), "epsilon_high": limit(low), "threshold": threshold,
                "n_resamples": int(n_resamples), "level": float(level), "seed": int(seed)}

"""How well the spread between sightlines (or sky pixels) is determined.

In: per-row kernels (rows: rays or pixels; columns: masses) as an array or as
:class:`Columns` (read a block of rows or one column at a time: a sky's maps
stay in its file, one map in memory at a time), a number of resamples and a
seed. Out: bootstrap intervals of std/mean (a sky's signal and noise are
:mod:`raytrace.sky.spectra`'s), the share of the variance carried
by the top 1 % of rows, the tail index from the Hill estimator, and robust
spreads (16-84 % half-width, median absolute deviation).

The variance of K is carried by a heavy tail: a few rows with K of many times
the mean. A spread quoted without these numbers may be set by a handful of rays.

- Bootstrap: ``n_resamples`` resamples of the rows with replacement (Efron &
  Tibshirani 1993, "An Introduction to the Bootstrap"), the percentile interval
  at the stated level; the resamples come from numpy's generator seeded with
  (seed, 0xB007), so an interval is the same on every run. A resample's counts
  (multinomial: n draws over n rows) are drawn block by block of rows, each
  block's share binomial and its rows' counts multinomial within it, the same
  distribution in memory of a block whatever the rows. The pixels of one sky
  are correlated, so a sky's bootstrap interval is a lower bound on its width.
- Hill estimator (Hill 1975, Ann. Stat. 3, 1163): with the k largest of n values
  X_(1) >= ... >= X_(k+1), alpha = k / sum_{i<=k} ln(X_(i) / X_(k+1)), standard
  error alpha / sqrt(k); k = floor(sqrt(n)) unless given (common practice, no
  source). A tail P(K > x) ~ x^-alpha with alpha <= 2 has no finite variance.
"""

from dataclasses import dataclass

import numpy as np

from raytrace.core.errors import InputError
from raytrace.tracing.checks import check_seed

N_RESAMPLES = 1000
LEVEL = 0.68
TOP_FRACTION = 0.01
#: Warn when the top 1 % of rows carry more than this share of the variance.
TOP_SHARE_WARNING = 0.5
_BLOCK_VALUES = 1 << 20  # values of a block (resamples x rows of counts, or rows x columns of data): 8 MB


def _rng(seed):
    return np.random.default_rng(np.random.SeedSequence([check_seed(seed), 0xB007]))


@dataclass(frozen=True, eq=False)
class Columns:
    """Values of rows (rays or pixels) by columns (masses), read a block of rows or a whole column at a
    time: an array in memory (:meth:`of`), or a sky's maps in its file (``SkyResult.columns``).

    ``block(start, stop)`` gives the (stop - start, n_columns) values of those rows, ``column(j)`` the
    (n_rows,) values of column j.
    """

    n_rows: int
    n_columns: int
    block: object
    column: object

    @classmethod
    def of(cls, values):
        """An (n_rows, n_columns) array (one column: (n_rows,)) as columns."""
        values = np.asarray(values, dtype=float)
        values = values[:, None] if values.ndim == 1 else values
        if values.ndim != 2:
            raise InputError(f"kernel: expected rows by masses, got shape {values.shape}")
        return cls(values.shape[0], values.shape[1], lambda a, b: values[a:b], lambda j: values[:, j])

    def each(self, function):
        """``function`` of each column, as an array (one column in memory at a time)."""
        return np.array([function(self.column(j)) for j in range(self.n_columns)])

    def blocks(self):
        """(start, stop) of blocks of rows of at most 8 MB of values."""
        rows = max(1, _BLOCK_VALUES // max(1, self.n_columns))
        return ((start, min(start + rows, self.n_rows)) for start in range(0, self.n_rows, rows))


def _rows(kernel, what="kernel"):
    columns = kernel if isinstance(kernel, Columns) else Columns.of(kernel)
    if columns.n_rows < 2:
        raise InputError(f"{what}: expected at least 2 rows (rays or pixels) to measure a spread, got "
                         f"{columns.n_rows}")
    return columns


def moments(kernel):
    """(mean, std with ddof 0) per column, in one pass over blocks of rows (sums about a first estimate)."""
    columns = _rows(kernel)
    blocks = list(columns.blocks())
    shift = columns.block(*blocks[0]).mean(axis=0)
    total, squares = np.zeros(columns.n_columns), np.zeros(columns.n_columns)
    for start, stop in blocks:
        deviation = columns.block(start, stop) - shift
        total += deviation.sum(axis=0)
        squares += (deviation * deviation).sum(axis=0)
    offset = total / columns.n_rows
    return shift + offset, np.sqrt(np.maximum(squares / columns.n_rows - offset**2, 0.0))


def bootstrap_moments(kernel, n_resamples=N_RESAMPLES, seed=0):
    """(mean, std) per resample and mass, each (n_resamples, n_masses), of rows resampled with replacement."""
    columns = _rows(kernel)
    n = columns.n_rows
    blocks = resample_blocks(n, n_resamples, seed)
    # Centred and scaled first, so the second moment loses no digits.
    centre, scale = moments(columns)
    scale = np.where(scale > 0, scale, 1.0)
    first, second = np.zeros((n_resamples, columns.n_columns)), np.zeros((n_resamples, columns.n_columns))
    for start, stop, weights in blocks:
        unit = (columns.block(start, stop) - centre) / scale
        first += weights @ unit
        second += weights @ unit**2
    first, second = first / n, second / n
    return centre + scale * first, scale * np.sqrt(np.maximum(second - first**2, 0.0) * n / (n - 1))


def resample_blocks(n_rows, n_resamples=N_RESAMPLES, seed=0):
    """(start, stop, weights (n_resamples, stop - start)) for blocks of rows: how often each row is drawn, with
    replacement, in each bootstrap resample; the same for a given seed on every run. Each resample's counts
    (multinomial: n draws over n rows) come block by block, the block's share binomial and its rows' counts
    multinomial within it: the same distribution in a block's memory (8 MB), whatever the rows."""
    if isinstance(n_resamples, bool) or not isinstance(n_resamples, (int, np.integer)) or n_resamples < 10:
        raise InputError(f"n_resamples: expected a whole number >= 10, got {n_resamples!r}")
    rng = _rng(seed)  # checked here, before any resample is drawn

    def blocks():
        draws_left, rows_left = np.full(n_resamples, n_rows), n_rows
        rows = max(1, _BLOCK_VALUES // n_resamples)
        for start in range(0, n_rows, rows):
            size = min(rows, n_rows - start)
            counts = draws_left if size == rows_left else rng.binomial(draws_left, size / rows_left)
            yield start, start + size, rng.multinomial(counts, np.full(size, 1.0 / size)).astype(float)
            draws_left, rows_left = draws_left - counts, rows_left - size

    return blocks()


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
    columns = _rows(kernel)
    means, stds = bootstrap_moments(columns, n_resamples, seed)
    mean, std = moments(columns)
    n = columns.n_rows
    with np.errstate(invalid="ignore", divide="ignore"):
        value = std * np.sqrt(n / (n - 1)) / mean
        low, high = percentile_interval(np.where(means > 0, stds / means, np.nan), level)
    return value, low, high


def _top_share(values, fraction):
    n = values.size
    top = max(1, int(np.ceil(fraction * n)))
    mean = values.mean()
    # Rows equal but for rounding (the background alone) have no spread to share.
    if not np.ptp(values) > 1e-12 * np.abs(values).max():
        return np.nan
    total = ((values - mean) ** 2).sum()
    carried = ((np.partition(values, n - top)[n - top:] - mean) ** 2).sum()
    return carried / total if total > 0 else np.nan


def top_share(kernel, fraction=TOP_FRACTION):
    """Share of the variance sum (K - mean)^2 carried by the top ``fraction`` of rows (largest K), per mass."""
    return _rows(kernel).each(lambda values: _top_share(values, fraction))


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


def _robust_spread(values):
    q16, q84 = np.percentile(values, [16.0, 84.0])
    return 0.5 * (q84 - q16), np.median(np.abs(values - np.median(values)))


def robust_spread(kernel):
    """(16-84 % half-width, median absolute deviation) per mass, in the kernel's units."""
    spreads = _rows(kernel).each(_robust_spread)
    return spreads[:, 0], spreads[:, 1]


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
        """Text lines for the masses ``rows`` ('-' where a number does not exist; with the per-row ``kernel``
        (:class:`Columns`), a mass that resonates on no row says so)."""
        from raytrace.core.textcells import cell, no_resonance

        level = f"{100 * self.level:.0f}%"
        lines = [f"  {'m [eV]':>11} {'std/mean':>9} {level + ' interval':>19} {'top 1%':>7} "
                 f"{'tail index':>12} {'16-84 hw':>10} {'MAD':>10}"]
        for k in rows:
            empty = None if kernel is None else no_resonance(kernel.column(k), row)
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


def _tail(values):
    positive = values[values > 0]
    return hill_index(positive) if positive.size >= 9 and np.ptp(positive) > 0 else (np.nan,) * 3


def spread(kernel, mass_eV, n_resamples=N_RESAMPLES, seed=0, level=LEVEL):
    """The :class:`Spread` of per-row kernels: an (n_rows, n_masses) array or :class:`Columns`."""
    columns = _rows(kernel)
    relative, low, high = relative_spread_interval(columns, n_resamples, seed, level)
    tails = columns.each(_tail).T
    half_width, mad = robust_spread(columns)
    return Spread(np.asarray(mass_eV, dtype=float), relative, low, high, top_share(columns), tails[0], tails[1],
                  np.nan_to_num(tails[2]).astype(int), half_width, mad, int(n_resamples), float(level), int(seed))

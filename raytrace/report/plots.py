"""Figures people would rather look at than read.

In: a SightlineResult (and optionally epsilon and omega_0), or a SkyResult. Out:
matplotlib figures: the mean kernel (or P) versus mass with the 68 % and 95 %
sightline bands, and the homogeneous-background part for comparison; and the
one rule (:func:`shown_mass_index`) that picks the mass a sky figure, the first
FITS map and the report show.
"""

import numpy as np

from raytrace.core.figures import pyplot


def kernel_bands(result, ax=None, epsilon=None, omega0_eV=None):
    """Mean over sightlines with 68 % and 95 % bands, versus mass, on log-log axes."""
    plt = pyplot()
    if ax is None:
        _, ax = plt.subplots(figsize=(6.4, 4.4))
    if epsilon is None:
        to_plotted, rows = (lambda k: k), result.kernel
    else:  # P per ray (saturating where it must be: result.saturates), its percentiles and mean
        saturate = result.saturates(epsilon, omega0_eV)
        to_plotted = (lambda k: result_probability(k, epsilon, omega0_eV, saturate))
        rows = result.probability(epsilon, omega0_eV, saturate)
    q = np.percentile(rows, (2.5, 16.0, 50.0, 84.0, 97.5), axis=0)
    mean = rows.mean(axis=0)
    m = result.mass_eV
    ax.fill_between(m, q[0], q[4], color="C0", alpha=0.18, lw=0, label="95 % of sightlines")
    ax.fill_between(m, q[1], q[3], color="C0", alpha=0.35, lw=0, label="68 % of sightlines")
    ax.plot(m, mean, color="C0", lw=2, label=f"mean over {result.n_rays} sightlines")
    ax.plot(m, q[2], color="C0", lw=1, ls=":", label="median")
    if np.any(result.kernel_background > 0):
        ax.plot(m, to_plotted(result.kernel_background), color="k", lw=1, ls="--",
                label=f"homogeneous part, z > {result.run.get('z_boxes', 0):g}")
    ax.set_xscale("log")
    fit_log_limits(ax, mean, q[0], q[4], to_plotted(result.kernel_background))
    ax.set_xlabel("dark-photon mass m [eV]")
    if epsilon is None:
        ax.set_ylabel(r"conversion kernel $K$ [eV]  ($P = \epsilon^2 K/\omega_0$)")
    else:
        form = ", saturating form" if result.saturates(epsilon, omega0_eV) else ""
        ax.set_ylabel(rf"conversion probability $P$ ($\epsilon$ = {epsilon:g}, $\omega_0$ = {omega0_eV:.3g} eV{form})")
    ax.set_title(f"z = 0 to {result.run.get('z_max'):g}, boxes to z = {result.run.get('z_boxes'):g}", fontsize=10)
    ax.legend(fontsize=8, loc="best")
    return ax


def fit_log_limits(ax, *curves, margin=1.5):
    """A log y axis spanning the positive values of ``curves`` (a factor ``margin`` beyond each end), or linear."""
    values = np.concatenate([np.ravel(curve) for curve in curves])
    positive = values[np.isfinite(values) & (values > 0)]
    if positive.size:
        ax.set_yscale("log")
        low, high = positive.min(), positive.max()
        ax.set_ylim(low / margin, high * margin if high > low else low * margin**2)


def shown_mass_index(sky, mass_eV=None):
    """Index of the grid mass a sky figure, the first FITS map and the report show.

    ``mass_eV`` given (``--mass``): the grid mass nearest to it. Otherwise the
    masses resonating (a crossing inside the boxes) in the most pixels are the
    candidates, and the middle one of them is shown: a mass at the edge of the
    probed range resonates in few pixels and shows an almost empty sky. Without
    any resonance, the middle of the grid.
    """
    if mass_eV is not None:
        return sky.mass_index(float(mass_eV))
    resonating = sky.resonating_fraction()
    if not np.any(resonating > 0):
        return sky.mass_eV.size // 2
    candidates = np.flatnonzero(resonating == resonating.max())
    return int(candidates[candidates.size // 2])


def result_probability(kernel, epsilon, omega0_eV, saturate=False):
    from raytrace.physics.conversion import probability_from_kernel

    return probability_from_kernel(kernel, epsilon, omega0_eV, saturate=saturate)

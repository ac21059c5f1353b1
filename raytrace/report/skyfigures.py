"""Figures of a sky beside the measured CMB spectrum: its dT/T map and its D_l spectra in muK^2.

In: a :class:`~raytrace.sky.maps.SkyResult` and its
:class:`~raytrace.sky.spectra.SkySpectra`, a mass, epsilon and the observed photon
energy omega_0. Out: the signal and noise spectra D_l = l (l + 1) C_l / 2 pi of
Delta T = T_0 dT/T in muK^2 at that epsilon, pixel window removed, the signal with
its Gaussian errors (Knox 1995), beside the 1-sigma errors of the Planck 2018 TT
band powers (where the signal reaches those, the measured spectrum notices it);
and a figure file of the dT/T map (:mod:`raytrace.sky.figures`) with them.
"""

import numpy as np

from raytrace.physics.conversion import anisotropy_per_probability
from raytrace.physics.units import CMB_TEMPERATURE_K, frequency_label
from raytrace.sky.figures import draw_map


def draw_spectra(ax, spectra, index, epsilon, omega0_eV, bands=None):
    """Signal (with errors) and noise D_l of Delta T in muK^2 at ``epsilon``, beside the measured spectrum's
    1-sigma errors (``bands``: a :class:`~raytrace.limits.cmbpower.BandPowers`, default Planck 2018 TT)."""
    from matplotlib import ticker

    from raytrace.limits.cmbpower import planck_tt
    from raytrace.sky.spectra import resolved_lmax

    scale = (epsilon**2 * CMB_TEMPERATURE_K * 1e6 * anisotropy_per_probability(omega0_eV) / omega0_eV) ** 2
    ell = spectra.ell[2:]
    to_power = scale * ell * (ell + 1) / (2 * np.pi)
    signal = to_power * spectra.cross[2:, index]
    error = to_power * np.sqrt(spectra.signal_variance_per_l()[2:, index])
    noise = to_power * spectra.noise[2:, index]
    positive = signal > 0
    ax.errorbar(ell[positive], signal[positive], yerr=np.minimum(error[positive], 0.999 * signal[positive]),
                fmt="o", ms=3, color="C3", lw=1, label="signal (split cross-spectrum) with Gaussian errors")
    ax.errorbar(ell[~positive], error[~positive], fmt="v", ms=3, color="C3", alpha=0.5, lw=0,
                label="signal < 0: 1 sigma shown as upper limit" if (~positive).any() else "_nolegend_")
    ax.plot(ell, np.where(noise > 0, noise, np.nan), color="0.4", lw=1.5, ls="--",
            label=f"noise of the map ({spectra.rays_per_pixel} rays per pixel)")
    bands = (planck_tt() if bands is None else bands).within(spectra.lmax)
    if len(bands):
        ax.step(bands.ell_effective, bands.error_high, where="mid", color="k", lw=1.2,
                label="Planck 2018 TT: 1 sigma error of each band")
    resolved = resolved_lmax(spectra.nside)
    if resolved < spectra.lmax:
        ax.axvspan(resolved + 0.5, spectra.lmax + 0.5, color="0.9", zorder=0,
                   label=f"l > 2 nside = {resolved}: not used by the limit")
    ax.set_xscale("log")
    ax.set_yscale("log")
    ax.xaxis.set_major_locator(ticker.LogLocator(subs=(1.0, 2.0, 5.0)))
    ax.xaxis.set_major_formatter(ticker.FormatStrFormatter("%d"))
    ax.xaxis.set_minor_formatter(ticker.NullFormatter())
    ax.set_xlabel("multipole l")
    ax.set_ylabel(r"$l(l+1)\,C_l / 2\pi$ of $\Delta T$ [$\mu$K$^2$], pixel window removed", fontsize=9)
    ax.set_title(f"spectra at m = {spectra.mass_eV[index]:.3g} eV, epsilon = {epsilon:.3g}, "
                 f"{frequency_label(omega0_eV)}", fontsize=10)
    ax.grid(True, which="major", alpha=0.3)
    ax.legend(fontsize=7, loc="best")
    return ax


def sky_figure(path, sky, index, epsilon, omega0_eV, spectra=None, overwrite=False, owner=None):
    """A figure file with the dT/T map and, for a sky with splits, its signal and noise spectra beside it."""
    from raytrace.core.figures import pyplot, save_figure

    plt = pyplot()
    wide = spectra is not None
    figure = plt.figure(figsize=(13.0 if wide else 8.5, 4.8))
    # sub=(1, 1, 1) spans the figure; the margins (figure fractions) keep the right part for the spectra.
    draw_map(sky, index, epsilon, omega0_eV, sub=(1, 1, 1), margins=(0.01, 0.05, 0.47, 0.05) if wide else None)
    if wide:
        draw_spectra(figure.add_axes([0.58, 0.13, 0.40, 0.76]), spectra, index, epsilon, omega0_eV)
    try:
        return save_figure(figure, path, overwrite=overwrite, owner=owner)
    finally:
        plt.close(figure)

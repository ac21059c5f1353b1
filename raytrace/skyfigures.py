"""Figures of a sky as a CMB physicist reads them: dT/T maps and D_l spectra in muK^2.

In: a :class:`~raytrace.sky.SkyResult`, a mass, epsilon and the observed photon
energy omega_0 (and its :class:`~raytrace.skyspectra.SkySpectra`). Out: a
Mollweide view of the temperature anisotropy dT/T = -g(x) epsilon^2 K / omega_0
with its mean removed (a conversion monopole is a spectral distortion, not an
anisotropy), its colours symmetric about 0 up to the larger size of the 2nd and
98th percentiles of the pixels (said in the title); and the signal and noise spectra D_l = l (l + 1) C_l / 2 pi of
Delta T = T_0 dT/T in muK^2 at that epsilon, pixel window removed, signal with
its Gaussian errors (Knox 1995), beside the 1-sigma errors of the Planck 2018 TT
band powers: where the signal reaches those, the measured spectrum notices it.
"""

import numpy as np

from .units import CMB_TEMPERATURE_K

#: Percentiles of the pixels that the colour range of a map spans.
COLOUR_PERCENTILES = (2.0, 98.0)


def anisotropy_map(sky, index, epsilon, omega0_eV):
    """dT/T at ``epsilon`` and ``omega0_eV`` of mass ``index``, mean removed, in the sky's ordering."""
    from .sky import anisotropy_per_probability

    kernel = sky.kernel[:, index]
    return -(epsilon**2) * anisotropy_per_probability(omega0_eV) / omega0_eV * (kernel - kernel.mean())


def draw_map(sky, index, epsilon, omega0_eV, sub=None, margins=None, title=None):
    """healpy.mollview of :func:`anisotropy_map` on pyplot's current figure; the colour range is stated."""
    import healpy

    from .anisotropy import frequency_label

    values = anisotropy_map(sky, index, epsilon, omega0_eV)
    # Symmetric about 0, so that white is no anisotropy: the larger of the two percentiles' sizes.
    reach = np.max(np.abs(np.percentile(values, COLOUR_PERCENTILES))) or 1e-30  # a flat map: one colour
    head = title or f"m = {sky.mass_eV[index]:.3g} eV, z < {sky.run['z_max']:g}"
    title = (f"{head}\ndT/T at epsilon = {epsilon:.3g}, {frequency_label(omega0_eV)}, mean removed (colours to "
             f"+-the larger of the {COLOUR_PERCENTILES[0]:g} and {COLOUR_PERCENTILES[1]:g} % points)")
    options = {key: value for key, value in (("sub", sub), ("margins", margins)) if value is not None}
    healpy.mollview(values, nest=sky.ordering == "NESTED", unit="dT/T", format="%.2g", min=-reach, max=reach,
                    title=title, cmap="RdBu_r", **options)


def draw_spectra(ax, spectra, index, epsilon, omega0_eV, bands=None):
    """Signal (with errors) and noise D_l of Delta T in muK^2 at ``epsilon``, beside the measured spectrum's
    1-sigma errors (``bands``: a :class:`~raytrace.cmbpower.BandPowers`, default Planck 2018 TT)."""
    from matplotlib import ticker

    from .anisotropy import frequency_label
    from .cmbpower import planck_tt
    from .sky import anisotropy_per_probability
    from .skyspectra import resolved_lmax

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


def shown_epsilon(limit, index, epsilon=None):
    """The epsilon a sky figure shows: the one given, else the measured-spectrum limit at that mass (the
    largest anisotropy allowed), else 1e-7; with the words that say which."""
    if epsilon is not None:
        return float(epsilon), "as given"
    if limit is not None and np.isfinite(limit.epsilon_max[index]):
        return float(limit.epsilon_max[index]), "the anisotropy limit at this mass"
    return 1e-7, "no anisotropy limit at this mass"


def sky_figure(path, sky, index, epsilon, omega0_eV, spectra=None, overwrite=False, owner=None):
    """A figure file with the dT/T map and, for a sky with splits, its signal and noise spectra beside it."""
    from .plots import _pyplot, save_figure

    plt = _pyplot()
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

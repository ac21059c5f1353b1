"""The report's lines on how far a result can be trusted: the built-in mean check and the spread.

In: a sightline result (and optionally a sky result with its signal and noise
spectra, :mod:`raytrace.sky.spectra`), the masses to show. Out: text lines (per
mass: the MC/PDF ratio with the Monte Carlo standard error and the pull;
std/mean with its bootstrap interval, the top-1 % variance share, the Hill tail
index and robust spreads; at the sky's shown mass its signal and noise side by
side, and where the noise exceeds the signal; warnings naming masses) and the
warnings to show beside them.
"""

import numpy as np

from raytrace.statistics.spread import N_RESAMPLES, spread


def trust_lines(result, rows, sky=None, sky_index=None, spectra=None, n_resamples=N_RESAMPLES):
    """(lines, warnings) for the masses ``rows`` of ``result`` (sky: its ``spectra`` at its mass ``sky_index``)."""
    lines, warned = [], []
    check = result.mean_check()
    found = (spread(result.kernel, result.mass_eV, n_resamples, int(result.run.get("seed", 0)))
             if result.kernel.shape[0] >= 2 else None)
    lines.append("trust: MC/PDF = <K> over rays / the one-point-PDF mean of the same boxes, with the MC standard "
                 "error (sem) and the difference in standard errors (pull); std/mean with its "
                 f"{n_resamples}-resample bootstrap 68 % interval, the variance share of the top 1 % of rays, the "
                 "Hill tail index, the 16-84 % half-width and median absolute deviation in eV")
    ratio, relative, pull = ((check.ratio(), check.relative_error(), check.pull()) if check is not None
                             else (np.full(result.mass_eV.size, np.nan),) * 3)
    for k in rows:
        cells = [f"  at m = {result.mass_eV[k]:.4g} eV:", f"MC/PDF {_number(ratio[k], '.4f')}",
                 f"sem {_number(relative[k], '.4f')}", f"pull {_number(pull[k], '+.1f')}"]
        if found is not None:
            cells += [f"std/mean {found.relative[k]:.3g} ({found.relative_low[k]:.3g}-{found.relative_high[k]:.3g})",
                      f"top 1 % {100 * found.top_share[k]:.0f} %",
                      f"tail {_number(found.tail_index[k], '.2f')}+-{_number(found.tail_error[k], '.2f')}",
                      f"hw {found.half_width[k]:.3g}", f"MAD {found.mad[k]:.3g}"]
        lines.append(cells[0] + " " + ", ".join(cells[1:]))
    if check is None:
        lines.append("  this result carries no one-point-PDF mean (made before the check existed)")
    for message in ([check.message()] if check is not None else []) + ([found.warning()] if found else []):
        if message:
            warned.append(message)
            lines.append(f"  WARNING: {message}")
    if sky is not None and sky_index is not None:
        from raytrace.sky.spectra import signal_noise_lines

        found = signal_noise_lines(spectra, [sky_index], most=3)
        lines += ["sky: " + found[0], *found[1:-1], "  " + found[-1]]
        sky_check = sky.mean_check()
        if sky_check is not None and sky_check.message():
            warned.append("sky: " + sky_check.message())
            lines.append(f"  WARNING (sky): {sky_check.message()}")
    return lines, warned


def _number(value, spec):
    return f"{value:{spec}}" if np.isfinite(value) else "-"

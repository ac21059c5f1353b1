"""The report's lines on how far a result can be trusted: the built-in mean check and the spread.

In: a sightline result (and optionally a sky result), the masses to show, the
photon energy and isotropy threshold of the anisotropy limit. Out: text lines
(per mass: the MC/PDF ratio with the Monte Carlo standard error and the pull;
std/mean with its bootstrap interval, the top-1 % variance share, the Hill tail
index and robust spreads; the sky's rms anisotropy limit with its bootstrap
interval; warnings naming masses) and the warnings to show beside them.
"""

import numpy as np

from raytrace.statistics.spread import N_RESAMPLES, sky_rms_interval, spread


def trust_lines(result, rows, sky=None, sky_index=None, omega0_eV=None, threshold=None, n_resamples=N_RESAMPLES):
    """(lines, warnings) for the masses ``rows`` of ``result`` (sky: at its mass ``sky_index``)."""
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
        interval = sky_rms_interval(sky, omega0_eV, n_resamples, int(sky.run.get("seed", 0)), threshold=threshold,
                                    masses=[sky_index])
        interval = {key: value[0] if isinstance(value, np.ndarray) else value for key, value in interval.items()}
        k = sky_index
        if interval["rms"] > 0:
            lines.append(f"sky at m = {sky.mass_eV[k]:.3g} eV: rms dT/T {interval['rms']:.3g} at epsilon = 1 "
                         f"(68 % bootstrap over pixels {interval['rms_low']:.3g} to {interval['rms_high']:.3g}); "
                         f"rms anisotropy limit epsilon_max = {interval['epsilon_max']:.3g} "
                         f"({interval['epsilon_low']:.3g} to {interval['epsilon_high']:.3g}); correlated "
                         "pixels: a lower bound on the interval's width")
        else:
            lines.append(f"sky at m = {sky.mass_eV[k]:.3g} eV: a flat map (no resonance or no anisotropy), no limit")
        sky_check = sky.mean_check()
        if sky_check is not None and sky_check.message():
            warned.append("sky: " + sky_check.message())
            lines.append(f"  WARNING (sky): {sky_check.message()}")
    return lines, warned


def _number(value, spec):
    return f"{value:{spec}}" if np.isfinite(value) else "-"

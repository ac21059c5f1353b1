"""The report's lines on how far a result can be trusted: the built-in mean check and the spread.

In: a sightline result (and optionally a sky result), the masses to show, the
photon energy and isotropy threshold of the anisotropy limit. Out: text lines
(the MC/PDF ratio with the Monte Carlo standard error and the masses off by more
than 3 standard errors; std/mean with its bootstrap interval, the top-1 %
variance share, the Hill tail index and robust spreads; the sky's rms anisotropy
limit with its bootstrap interval) and warnings to print beside them.
"""

import numpy as np

from .spread import N_RESAMPLES, sky_rms_interval, spread


def trust_lines(result, rows, sky=None, sky_index=None, omega0_eV=None, threshold=None, n_resamples=N_RESAMPLES):
    """(lines, warnings) for the masses ``rows`` of ``result`` (sky: at its mass ``sky_index``)."""
    lines, warned = [], []
    check = result.mean_check()
    if check is None:
        lines.append("mean check: this result carries no one-point-PDF mean (made before the check existed)")
    else:
        lines.append(f"mean check: <K> over rays against the one-point-PDF mean of the same boxes; MC sem: "
                     f"{check.error_kind}")
        lines += check.table(rows)
        message = check.message()
        warned += [message] if message else []
        lines.append("  all masses within 3 standard errors" if not message else f"  WARNING: {message}")
    if result.kernel.shape[0] >= 2:
        found = spread(result.kernel, result.mass_eV, n_resamples, int(result.run.get("seed", 0)))
        lines.append("spread between rays: std/mean with its bootstrap interval, the variance share of the top 1 % "
                     "of rays, the tail index (P(K > x) ~ x^-alpha; alpha <= 2: no finite variance), robust spreads [eV]")
        lines += found.table(rows)
        message = found.warning()
        warned += [message] if message else []
        if message:
            lines.append(f"  WARNING: {message}")
    if sky is not None and sky_index is not None:
        interval = sky_rms_interval(sky, omega0_eV, n_resamples, int(sky.run.get("seed", 0)), threshold=threshold)
        k = sky_index
        lines.append(f"sky at m = {sky.mass_eV[k]:.3g} eV: rms dT/T at epsilon = 1 {interval['rms'][k]:.3g} "
                     f"({100 * interval['level']:.0f} % bootstrap over pixels {interval['rms_low'][k]:.3g} to "
                     f"{interval['rms_high'][k]:.3g}); rms anisotropy limit epsilon_max = "
                     f"{interval['epsilon_max'][k]:.3g} ({interval['epsilon_low'][k]:.3g} to "
                     f"{interval['epsilon_high'][k]:.3g}); {n_resamples} resamples; pixels are correlated, so the "
                     "interval is a lower bound on the width")
        sky_check = sky.mean_check()
        if sky_check is not None and sky_check.message():
            lines.append(f"  WARNING (sky): {sky_check.message()}")
            warned.append("sky: " + sky_check.message())
    return lines, warned

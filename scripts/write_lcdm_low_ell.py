"""Write raytrace/data/lcdm_tt_low_ell.txt: the LCDM model D_l below l = 30 of the anisotropy test.

The binned Planck 2018 TT file carries its best-fit LCDM model from l = 30 up; below that the band
powers' model is CAMB's lensed D_l with :data:`raytrace.limits.cmbpower.PLANCK_2018_PARAMETERS`.
Running CAMB for 28 numbers costs every `raytrace limits` and `raytrace report` about 145 MB and a
few seconds, so the numbers ship as a table; tests/test_cmbpower.py recomputes them with CAMB.

Remake the shipped file with:
    python scripts/write_lcdm_low_ell.py
"""

import argparse
from pathlib import Path

import numpy as np

from raytrace.limits.cmbpower import HIGH_ELL_START, LCDM_LOW_ELL, PLANCK_2018_PARAMETERS, lcdm_power

DEFAULT_OUTPUT = Path(__file__).resolve().parents[1] / "raytrace" / "data" / LCDM_LOW_ELL


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--output", type=Path, default=DEFAULT_OUTPUT, help="where to write the table")
    output = parser.parse_args(argv).output
    import camb

    ell = np.arange(2, HIGH_ELL_START)
    parameters = [f"{name} = {value:.8g}" for name, value in PLANCK_2018_PARAMETERS.items()]
    header = "\n".join([
        "Lensed CMB TT power of LCDM, D_l = l (l + 1) C_l / (2 pi) in muK^2, l = 2-29: the model of the",
        "low-l band powers in raytrace's anisotropy test (the binned Planck 2018 file gives it from l = 30).",
        f"Computed with CAMB {camb.__version__} (Lewis, Challinor & Lasenby 2000, ApJ 538, 473), camb.set_params",
        "with the Planck 2018 parameters (A&A 641, A6, Table 2):",
        ", ".join(parameters) + ";",
        "by scripts/write_lcdm_low_ell.py (raytrace.limits.cmbpower.lcdm_power); checked against CAMB in",
        "tests/test_cmbpower.py.",
        "col 1: l; col 2: D_l (muK^2)",
    ])
    np.savetxt(output, np.column_stack([ell, lcdm_power(HIGH_ELL_START - 1)[ell]]), fmt=["%4d", "%.10e"],
               header=header)
    print(f"wrote {output}")


if __name__ == "__main__":
    main()

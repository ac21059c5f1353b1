"""The subcommands of the trust checks end to end: onepoint-mean, spread-check, limits on a PDF mean.

Sources: the values each prints are those of the library functions tested in
test_onepoint.py and test_resolution_spread.py (checked there against independent
calculations); here the independent fact is the file written by the library itself
on the same inputs, and the one-line, exit-2 error convention (DEVELOPERS.md).
"""

import numpy as np
import pytest

from raytrace.boxes import load_series
from raytrace.cli import main
from raytrace.statistics.onepoint import PdfMean, pdf_mean


def test_onepoint_mean_writes_what_the_library_computes(tmp_path, demo_dir, capsys):
    output = tmp_path / "mean.h5"
    arguments = ["onepoint-mean", "--boxes", str(demo_dir / "demo_z0.h5"), str(demo_dir / "demo_z1.h5"),
                 "--z-max", "2", "--mass-min", "1e-14", "--mass-max", "1e-13", "--mass-count", "6",
                 "--points", "65536", "--output", str(output), "--plot", str(tmp_path / "mean.png")]
    assert main(arguments) == 0
    saved = PdfMean.load(output)
    series = load_series([demo_dir / "demo_z0.h5", demo_dir / "demo_z1.h5"])
    expected = pdf_mean(series, np.geomspace(1e-14, 1e-13, 6), 2.0, points=65536)
    np.testing.assert_array_equal(saved.kernel, expected.kernel)  # same seed, same points: same bits
    assert (tmp_path / "mean.png").stat().st_size > 0
    assert main(["limits", "--result", str(output)]) == 0
    assert "eps_mean" in capsys.readouterr().out  # the compact table names epsilon_max of the mean curve so


def rays_file(path, demo_dir, n_rays, mass):
    """A sightline result through the demo box at z = 0, written by the library."""
    import warnings

    from raytrace import cast_sightlines
    from raytrace.statistics.meancheck import MeanCheckWarning

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", MeanCheckWarning)  # a few rays: the check may find them too few
        result = cast_sightlines(load_series(demo_dir / "demo_z0.h5"), mass, n_rays, 0.5, include_background=False)
    return result.save(path)


def test_spread_check_of_a_sightline_result(tmp_path, demo_dir, capsys):
    output = rays_file(tmp_path / "rays.h5", demo_dir, 64, np.geomspace(1e-14, 5e-14, 4))
    assert main(["spread-check", str(output), "--resamples", "100"]) == 0
    out = capsys.readouterr().out
    assert "68% interval" in out and "Hill estimator" in out


@pytest.mark.parametrize("arguments, flag", [
    (["--resamples", "3"], "--resamples"),
    (["--level", "1.5"], "--level"),
])
def test_spread_check_refuses_bad_flags(tmp_path, demo_dir, capsys, arguments, flag):
    output = rays_file(tmp_path / "rays.h5", demo_dir, 8, np.array([1e-14, 2e-14]))
    assert main(["spread-check", str(output), *arguments]) == 2
    error = capsys.readouterr().err.strip().splitlines()
    assert len(error) == 1 and flag in error[0]


def test_spread_check_refuses_a_file_that_is_no_result(tmp_path, capsys):
    assert main(["spread-check", str(tmp_path / "missing.h5")]) == 2
    assert "result file not found" in capsys.readouterr().err

"""Numerical robustness of the engines and of the result files (issue 7 item 4).

Boxes of extreme dynamic range, with empty regions, and masses outside what the
boxes probe must give finite results (zeros where nothing crosses) and a warning
naming the probed range; no NaN or inf may reach a result file.

References: numpy's isfinite; the NRL Plasma Formulary's plasma frequency,
m = 3.71e-11 eV sqrt(n_e / cm^-3) (PHYSICS.md section 1), with n_e = (1+z)^3 times
the comoving density (section 3); the result-file contract of raytrace.statistics.results
(a write that would hold NaN or inf raises InputError and leaves no file).
"""

import re
import warnings

import numpy as np
import pytest

import raytrace
from raytrace.boxes import Box
from raytrace.core.errors import InputError, ProbedRangeWarning
from raytrace.physics.background import MeanPlasma
from raytrace.physics.ionisation import IonisationHistory
from raytrace.sky.maps import cast_sky
from raytrace.statistics.results import SightlineResult

# Mean comoving electron density today, fully ionised (PHYSICS.md section 3).
MEAN_DENSITY = 2.2e-7
Z_BOXES = 0.05  # the boxes serve z = 0 to 0.05, the homogeneous background 0.05 to Z_MAX
Z_MAX = 1.0
CELLS = 16


def nrl_mass(n_e):
    """Plasma mass in eV of a physical electron density in cm^-3 (NRL; PHYSICS.md section 1)."""
    return 3.71e-11 * np.sqrt(n_e)


def log_uniform(low, high, seed):
    values = MEAN_DENSITY * 10.0 ** np.random.default_rng(seed).uniform(np.log10(low), np.log10(high), (CELLS,) * 3)
    values.flat[:2] = MEAN_DENSITY * low, MEAN_DENSITY * high  # the extremes are in the box
    return values


def zero_slab(seed):
    values = MEAN_DENSITY * np.random.default_rng(seed).lognormal(0.0, 1.0, (CELLS,) * 3)
    values[:, :, : CELLS // 3] = 0.0
    return values


# n_e,comoving in cm^-3: 1e-6 to 1e6 times the mean; a narrower range; a third of the box empty.
BOXES = {
    "dynamic range 1e-6 to 1e6": log_uniform(1e-6, 1e6, seed=1),
    "dynamic range 1e-2 to 1e2": log_uniform(1e-2, 1e2, seed=2),
    "zero slab": zero_slab(seed=3),
}


def probed_range(values):
    """Masses the engine can cross in a box served from z = 0 to Z_BOXES.

    It solves the trilinear interpolant of the cells, which spans the lowest to the
    highest cell (zero where cells are empty); densities scale by (1+z)^3, so the
    lowest at z = 0, the highest at Z_BOXES.
    """
    values = values.astype(np.float32).astype(np.float64)  # what the box stores
    return nrl_mass(values.min()), nrl_mass(values.max() * (1 + Z_BOXES) ** 3)


def mass_grid(values):
    """Masses inside the probed range and, 3 and 30 times beyond it, outside on both sides (below the
    lowest non-empty cell where cells are empty: those masses are inside, and resonate in the gaps)."""
    low, high = probed_range(values)
    bottom = low if low > 0 else nrl_mass(values[values > 0].min())
    inside = np.geomspace(bottom * 1.05, high / 1.05, 12)
    return np.concatenate(([bottom / 30, bottom / 3], inside, [high * 3, high * 30])), low, high


@pytest.fixture(scope="module")
def plasma():
    return MeanPlasma(None, IonisationHistory.constant(1.08))


@pytest.fixture(scope="module", params=[(name, engine) for name in BOXES for engine in ("sightlines", "sky")],
                ids=lambda p: f"{p[0]}-{p[1]}")
def run(request, plasma):
    name, engine = request.param
    values = BOXES[name]
    box = Box.from_array(values, "20 cMpc", 0.0, quantity="n_e_comoving")
    mass, low, high = mass_grid(values)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        if engine == "sightlines":
            result = raytrace.cast_sightlines(box, mass, 48, Z_MAX, z_boxes=Z_BOXES, plasma=plasma, seed=4)
        else:
            result = cast_sky(box, mass, 2, Z_MAX, z_boxes=Z_BOXES, plasma=plasma, seed=4)
    return result, mass, low, high, caught


def test_results_are_finite_with_zeros_where_nothing_crosses(run):
    result = run[0]
    # numpy's isfinite is the reference: no NaN or inf anywhere in what a run returns.
    for name in ("kernel", "kernel_boxes", "kernel_background", "crossings", "dispersion_measure"):
        assert np.all(np.isfinite(getattr(result, name))), name
    assert np.all(result.kernel_boxes >= 0) and np.all(result.crossings >= 0)
    # A kernel is a sum over crossings and near misses (PHYSICS.md sections 2 and 9): zero exactly
    # where there is neither.
    assert np.all((result.kernel_boxes > 0) == ((result.crossings > 0) | (result.tangent_events > 0)))
    assert result.crossings.sum() > 0  # the rays did cross, so the checks above had something to check
    # Every sightline crosses gas inside the boxes (a third of the zero-slab box is empty, not all of it).
    assert np.all(result.dispersion_measure_boxes > 0)


def test_masses_outside_the_probed_range_get_zeros_and_a_warning_naming_it(run):
    result, mass, low, high, caught = run
    outside = (mass < low) | (mass > high)
    # Nothing the warning calls outside resonates in the boxes; something inside does.
    assert np.all(result.kernel_boxes[:, outside] == 0) and np.all(result.crossings[:, outside] == 0)
    crossed = result.crossings.sum(axis=0) > 0
    assert crossed[~outside].any()
    warned = [w for w in caught if issubclass(w.category, ProbedRangeWarning)]
    assert len(warned) == 1
    message = str(warned[0].message)
    found = re.search(r"(\d+) of (\d+) masses .*\(([-+.e\d]+) to ([-+.e\d]+) eV for z = 0 to ([-+.e\d]+)\)", message)
    assert found, message
    assert (int(found[1]), int(found[2])) == (outside.sum(), mass.size)
    # 3 significant digits in the message, 3 in the NRL constant: 1 %.
    assert float(found[3]) == pytest.approx(low, rel=0.01, abs=0)
    assert float(found[4]) == pytest.approx(high, rel=0.01, abs=0)
    assert float(found[5]) == Z_BOXES


def finite_result(n_rays=3, n_masses=4):
    rng = np.random.default_rng(0)
    direction = rng.normal(size=(n_rays, 3))
    return dict(
        mass_eV=np.geomspace(1e-14, 1e-13, n_masses),
        kernel_boxes=rng.uniform(0, 1e5, (n_rays, n_masses)),
        kernel_background=rng.uniform(0, 1e5, n_masses),
        crossings=rng.integers(0, 3, (n_rays, n_masses)),
        dispersion_measure_boxes=rng.uniform(10, 100, n_rays),
        dispersion_measure_background=500.0,
        direction=direction / np.linalg.norm(direction, axis=1, keepdims=True),
        run={"seed": 0, "z_max": 1.0},
    )


def test_a_finite_result_is_written_and_read_back(tmp_path):
    # The control for the refusals below: the same arrays without NaN or inf are written.
    arrays = finite_result()
    path = SightlineResult(**arrays).save(tmp_path / "result.h5")
    loaded = SightlineResult.load(path)
    np.testing.assert_array_equal(loaded.kernel_boxes, arrays["kernel_boxes"])
    assert loaded.dispersion_measure_background == arrays["dispersion_measure_background"]


@pytest.mark.parametrize("bad", [np.nan, np.inf, -np.inf])
@pytest.mark.parametrize("name", ["kernel_boxes", "kernel_background", "dispersion_measure_boxes", "direction",
                                  "dispersion_measure_background"])
def test_a_result_holding_nan_or_inf_is_refused_and_leaves_no_file(tmp_path, name, bad):
    arrays = finite_result()
    if np.ndim(arrays[name]):
        arrays[name].flat[1] = bad
    else:
        arrays[name] = bad
    path = tmp_path / "result.h5"
    with pytest.raises(InputError) as caught:
        SightlineResult(**arrays).save(path)
    # The contract: the message names the file and what would hold NaN or inf.
    assert str(path) in str(caught.value) and name in str(caught.value) and "NaN or inf" in str(caught.value)
    assert list(tmp_path.iterdir()) == []  # neither the result nor its temporary file

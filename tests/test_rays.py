"""Ray geometry: cube symmetries, sample coverage, per-ray streams.

Sources: the symmetry group of the cube (the hyperoctahedral group B3, order 48:
rotations and reflections, every element a signed permutation matrix; common
practice, no source); comoving distances from astropy.
"""

import numpy as np
import pytest
from astropy.cosmology import Planck18

from raytrace.boxes import Box, BoxSeries
from raytrace.cosmology import Cosmology
from raytrace.errors import InputError
from raytrace.rays import CUBE_SYMMETRIES, draw_rays, plan_samples


def test_the_48_transforms_are_the_symmetries_of_the_cube():
    assert CUBE_SYMMETRIES.shape == (48, 3, 3)
    for matrix in CUBE_SYMMETRIES:
        np.testing.assert_array_equal(matrix @ matrix.T, np.eye(3))  # orthogonal
        assert abs(round(np.linalg.det(matrix))) == 1
        # a signed permutation: one +-1 per row and column, zeros elsewhere
        assert np.all(np.sort(np.abs(matrix), axis=1) == [0, 0, 1])
        assert np.all(np.abs(matrix).sum(axis=0) == 1)
    distinct = {m.astype(int).tobytes() for m in CUBE_SYMMETRIES}
    assert len(distinct) == 48
    # closed under composition: a group
    products = {(a @ b).astype(int).tobytes() for a in CUBE_SYMMETRIES for b in CUBE_SYMMETRIES}
    assert products == distinct
    # a cube symmetry maps the cube's vertices onto its vertices
    vertices = np.array([[x, y, z] for x in (-1, 1) for y in (-1, 1) for z in (-1, 1)])
    for matrix in CUBE_SYMMETRIES:
        assert {tuple(v) for v in (vertices @ matrix.T).astype(int)} == {tuple(v) for v in vertices}


def series_of(redshifts, sizes, cells, blend=False):
    return BoxSeries([Box.from_array(np.ones((n,) * 3, np.float32), f"{size} cMpc", z) for z, size, n
                      in zip(redshifts, sizes, cells)], blend=blend)


@pytest.mark.parametrize("blend", [False, True])
def test_samples_cover_the_whole_ray_without_gaps(blend):
    cosmology = Cosmology()
    redshifts, sizes, cells = [0.0, 0.5, 1.0, 2.0], [100.0, 150.0, 150.0, 80.0], [32, 48, 48, 16]
    if blend:
        sizes, cells = [100.0] * 4, [32] * 4
    plan = plan_samples(cosmology, series_of(redshifts, sizes, cells, blend), z_stop=2.5, step_cells=0.5)
    chi_end = Planck18.comoving_distance(2.5).to_value("Mpc")
    assert plan.chi[0] == 0.0
    assert plan.chi[-1] == pytest.approx(chi_end, rel=1e-9)  # astropy
    steps = np.diff(plan.chi)
    largest_cell = max(s / c for s, c in zip(sizes, cells))
    assert np.all(steps > 0)
    assert steps.max() <= 0.5 * largest_cell * (1 + 1e-9)
    # segments tile the samples in order, each at most one box length long
    assert plan.segment_first[0] == 0 and plan.segment_stop[-1] == plan.n_samples
    np.testing.assert_array_equal(plan.segment_first[1:], plan.segment_stop[:-1])
    for first, stop, box in zip(plan.segment_first, plan.segment_stop, plan.segment_box):
        assert plan.chi[stop - 1] - plan.chi[first] < sizes[box]
        assert np.all(plan.local_cells[first:stop] * sizes[box] / cells[box] < sizes[box] + 1e-9)
    # every sample is served with total weight 1
    np.testing.assert_allclose(plan.weights.sum(axis=0), 1.0)
    # u = ln(1+z) of each sample against astropy's distance
    z = np.expm1(plan.u[::500])
    np.testing.assert_allclose(Planck18.comoving_distance(z).to_value("Mpc"), plan.chi[::500], rtol=1e-6, atol=1e-6)


def test_each_ray_has_its_own_fixed_stream():
    cosmology = Cosmology()
    plan = plan_samples(cosmology, series_of([0.0], [100.0], [32]), z_stop=1.0, step_cells=0.5)
    together = draw_rays(4, [16, 17, 18], plan, [32])
    alone = draw_rays(4, [17], plan, [32])
    # Ray 17's geometry does not depend on which other rays share its batch.
    for batch, single in zip(together, alone):
        np.testing.assert_array_equal(batch[1], single[0])
    assert not np.array_equal(together[0][0], together[0][1])
    assert not np.array_equal(draw_rays(5, [17], plan, [32])[0], alone[0])
    direction, starts, directions, symmetries = alone
    np.testing.assert_allclose(directions[0], CUBE_SYMMETRIES[symmetries[0]] @ direction[0])
    assert np.all((starts >= 0) & (starts < 32))
    # with ~ (chi(1)=3396 Mpc)/(100 Mpc) = 34 segments, the symmetries are not all the same
    assert plan.n_segments >= 34 and len(set(symmetries[0])) > 5


def test_copy_symmetries_and_shifts_are_uniform():
    # Over many rays and segments each of the 48 symmetries is equally likely (chi^2 test,
    # scipy.stats.chisquare) and each start coordinate is uniform in the box (Kolmogorov-Smirnov,
    # scipy.stats.kstest); p > 1e-3 (common practice, no source).
    from scipy import stats

    plan = plan_samples(Cosmology(), series_of([0.0], [100.0], [32]), z_stop=1.0, step_cells=0.5)
    _, starts, _, symmetries = draw_rays(11, np.arange(400), plan, [32])
    counts = np.bincount(symmetries.ravel(), minlength=48)
    assert stats.chisquare(counts).pvalue > 1e-3
    for axis in range(3):
        assert stats.kstest(starts[..., axis].ravel() / 32, "uniform").pvalue > 1e-3


def test_bad_plan_input():
    cosmology = Cosmology()
    series = series_of([0.0], [100.0], [32])
    with pytest.raises(InputError, match="step"):
        plan_samples(cosmology, series, z_stop=1.0, step_cells=0.0)
    with pytest.raises(InputError, match="z_max"):
        plan_samples(cosmology, series, z_stop=-1.0, step_cells=0.5)

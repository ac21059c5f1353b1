"""Ray geometry: cube symmetries, coverage of the ray by pieces, per-ray streams.

Sources: the symmetry group of the cube (the hyperoctahedral group B3, order 48:
rotations and reflections, every element a signed permutation matrix; common
practice, no source); comoving distances from astropy.
"""

import numpy as np
import pytest
from astropy.cosmology import Planck18

from raytrace.boxes import Box, BoxSeries
from raytrace.core.errors import InputError
from raytrace.physics.cosmology import Cosmology
from raytrace.tracing.rays import CUBE_SYMMETRIES, draw_rays, plan_rays


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
def test_pieces_cover_the_whole_ray_without_gaps(blend):
    cosmology = Cosmology()
    redshifts, sizes, cells = [0.0, 0.5, 1.0, 2.0], [100.0, 150.0, 150.0, 80.0], [32, 48, 48, 16]
    if blend:
        sizes, cells = [100.0] * 4, [32] * 4
    series = series_of(redshifts, sizes, cells, blend)
    plan = plan_rays(cosmology, series, z_stop=2.5)
    chi = lambda z: Planck18.comoving_distance(z).to_value("Mpc")  # noqa: E731 (astropy, the reference)
    assert plan.piece_chi_a[0] == 0.0
    assert plan.chi_end == pytest.approx(chi(2.5), rel=1e-9)
    # pieces tile [0, chi_end] in order, each inside one segment of at most one box length
    np.testing.assert_array_equal(plan.piece_chi_a[1:], plan.piece_chi_b[:-1])
    assert np.all(plan.piece_chi_b > plan.piece_chi_a)
    for segment, a, b in zip(plan.piece_segment, plan.piece_chi_a, plan.piece_chi_b):
        start, box = plan.segment_chi0[segment], plan.segment_box[segment]
        assert start - 1e-9 <= a and b <= start + sizes[box] * (1 + 1e-12)
    # a box's interval starts a new segment half-way between snapshot redshifts (nearest serves)
    middles = [chi(0.5 * (z0 + z1)) for z0, z1 in zip(redshifts[:-1], redshifts[1:])]
    for middle in middles:
        assert np.any(np.isclose(plan.segment_chi0, middle, rtol=1e-9))
    # spans: one box, or with blending the bracketing pair, cut at every snapshot redshift
    for span in range(plan.n_spans):
        z_mid = float(np.interp(0.5 * (plan.span_chi_a[span] + plan.span_chi_b[span]),
                                chi(np.linspace(0, 2.5, 2501)), np.linspace(0, 2.5, 2501)))
        low, high = plan.span_low[span], plan.span_high[span]
        if blend:
            assert redshifts[low] <= z_mid <= redshifts[high] or (high == 3 and z_mid > 2.0)
        else:
            assert low == high == int(np.argmin(np.abs(np.array(redshifts) - z_mid)))
    if blend:
        for z in redshifts[1:]:
            assert np.any(np.isclose(plan.span_chi_b, chi(z), rtol=1e-9))
    # the tables: 1+z and H/c against astropy at their own spacing (<= a quarter of the finest cell)
    assert plan.chi_step <= 0.25 * min(s / c for s, c in zip(sizes, cells)) * (1 + 1e-9)
    grid = plan.chi_step * np.arange(plan.one_plus_z.size - 1)
    z_table = plan.one_plus_z[:-1] - 1
    np.testing.assert_allclose(chi(z_table[::200]), grid[::200], rtol=1e-6, atol=1e-6)
    np.testing.assert_allclose(plan.hubble_over_c[::200], Planck18.H(z_table[::200]).to_value("km/(s Mpc)")
                               / 299792.458, rtol=1e-9)


def test_each_ray_has_its_own_fixed_stream():
    cosmology = Cosmology()
    plan = plan_rays(cosmology, series_of([0.0], [100.0], [32]), z_stop=1.0)
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

    plan = plan_rays(Cosmology(), series_of([0.0], [100.0], [32]), z_stop=1.0)
    _, starts, _, symmetries = draw_rays(11, np.arange(400), plan, [32])
    counts = np.bincount(symmetries.ravel(), minlength=48)
    assert stats.chisquare(counts).pvalue > 1e-3
    for axis in range(3):
        assert stats.kstest(starts[..., axis].ravel() / 32, "uniform").pvalue > 1e-3


def test_bad_plan_input():
    cosmology = Cosmology()
    series = series_of([0.0], [100.0], [32])
    for bad in (-1.0, 0.0, float("nan"), "1", True):
        with pytest.raises(InputError, match="z_max"):
            plan_rays(cosmology, series, z_stop=bad)

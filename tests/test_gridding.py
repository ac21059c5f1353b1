"""Particles to grid: CIC and SPH deposits, units, bad input, the written box file."""

import argparse
import hashlib
import json
import math

import astropy.constants as const
import astropy.units as u
import h5py
import numpy as np
import pytest
from scipy import integrate

from raytrace.boxes.gridding import grid_particles, write_gridded_box
from raytrace.cli import grid as grid_cli
from raytrace.core.errors import InputError
from raytrace.kernels.deposit import cubic_spline, deposit_cic, deposit_sph

# Reference values straight from astropy (CODATA 2018, IAU 2015), not from raytrace.
PROTON_MASS_G = const.m_p.to_value(u.g)
MPC_CM = (1 * u.Mpc).to_value(u.cm)
MSUN_G = (1 * u.Msun).to_value(u.g)


def write_particles(path, **datasets):
    with h5py.File(path, "w") as handle:
        for name, values in datasets.items():
            handle.create_dataset(name, data=values)
    return path


def cic_axis_weights(x, n):
    """CIC weights of the n cells along one axis for a particle at x (cell units), periodic.

    Hockney & Eastwood (1988), section 5-3: the assignment function of a cloud one
    cell wide is W(d) = 1 - |d| for |d| < 1, d the distance to the cell centre i + 1/2;
    images at +-n make the grid periodic.
    """
    weights = np.zeros(n)
    for i in range(n):
        for image in (-n, 0, n):
            weights[i] += max(0.0, 1.0 - abs(x - (i + 0.5 + image)))
    return weights


# -- the kernels ------------------------------------------------------------------------
def test_cubic_spline_is_normalised_over_its_support():
    # Monaghan (1992, ARA&A 30, 543): the 3-D M4 kernel with sigma = 1/pi integrates to 1 over r < 2h.
    total, _ = integrate.quad(lambda q: 4 * math.pi * q * q * cubic_spline(q), 0.0, 2.0, points=[1.0])
    assert total == pytest.approx(1.0, abs=1e-10)
    # Compact support at 2h and the central value sigma / h^3 = 1/pi (same source).
    assert cubic_spline(2.0) == 0.0 and cubic_spline(3.7) == 0.0
    assert cubic_spline(0.0) == pytest.approx(1.0 / math.pi, rel=1e-15)
    # The two pieces meet at q = 1 (the M4 spline is twice differentiable): 1 - 3/2 + 3/4 = (2 - 1)^3 / 4.
    assert cubic_spline(1.0 - 1e-9) == pytest.approx(cubic_spline(1.0 + 1e-9), rel=1e-8)


def test_cic_one_particle_by_hand():
    # Particle at (0.2, 2.75, 3.9) on a periodic 4^3 grid; weights 1 - |d| to the two nearest
    # centres along each axis (Hockney & Eastwood 1988), worked out by hand:
    # x: centres 3.5 (image -0.5, d 0.7) -> 0.3 and 0.5 (d 0.3) -> 0.7
    # y: centres 2.5 (d 0.25) -> 0.75 and 3.5 (d 0.75) -> 0.25
    # z: centres 3.5 (d 0.4) -> 0.6 and 0.5 (image 4.5, d 0.6) -> 0.4
    grid = deposit_cic(np.array([[0.2, 2.75, 3.9]]), np.array([1.0]), True, np.zeros((4, 4, 4)))
    by_hand = {}
    for i, wx in ((3, 0.3), (0, 0.7)):
        for j, wy in ((2, 0.75), (3, 0.25)):
            for k, wz in ((3, 0.6), (0, 0.4)):
                by_hand[(i, j, k)] = wx * wy * wz
    assert by_hand[(0, 2, 3)] == pytest.approx(0.315)
    for cell, weight in by_hand.items():
        assert grid[cell] == pytest.approx(weight, abs=1e-14)
    assert set(zip(*np.nonzero(grid))) == set(by_hand)


def test_three_particles_land_where_the_cic_weights_say(tmp_path):
    # Box of 4 cMpc, 4 cells of 1 cMpc; masses chosen so that the particles carry 1, 2 and 3 electrons.
    positions = np.array([[1.5, 1.5, 1.5], [0.2, 2.75, 3.9], [2.0, 0.5, 1.25]])
    electrons = np.array([1.0, 2.0, 3.0])
    hydrogen_fraction = 0.76
    masses_g = electrons * PROTON_MASS_G / hydrogen_fraction
    path = write_particles(tmp_path / "three.h5", pos=positions, mass=masses_g)
    result = grid_particles(
        path, 4, positions="pos", position_unit="cMpc", box_size="4 cMpc", redshift=0.5,
        masses="mass", mass_unit="g", electron_abundance=1.0, hydrogen_fraction=hydrogen_fraction,
    )
    expected = np.zeros((4, 4, 4))
    for position, count in zip(positions, electrons):
        wx, wy, wz = (cic_axis_weights(x, 4) for x in position)
        expected += count * np.einsum("i,j,k->ijk", wx, wy, wz)
    assert expected[1, 1, 1] == pytest.approx(1.0)  # the first sits on a cell centre
    np.testing.assert_allclose(result.density * MPC_CM**3, expected, rtol=1e-12, atol=1e-14)
    assert result.method == "cic" and result.n_particles == 3
    assert result.electrons_read == pytest.approx(6.0, rel=1e-12)


def test_sph_weights_follow_the_kernel():
    # A particle on a cell centre with h = 3 cells: ratios between cells are ratios of Monaghan's
    # w(q) (renormalisation keeps them), w(1/3) = 1 - 1.5/9 + 0.75/27 by hand; and since cell
    # centres sample the smooth kernel finely, the centre cell holds about W(0) = 1/(pi h^3).
    grid = np.zeros((32, 32, 32))
    fallbacks = deposit_sph(np.array([[16.5, 16.5, 16.5]]), np.array([1.0]), np.array([3.0]), True, grid)
    assert fallbacks == 0
    assert grid[17, 16, 16] / grid[16, 16, 16] == pytest.approx(1 - 1.5 / 9 + 0.75 / 27, rel=1e-12)
    assert grid[16, 16, 16] == pytest.approx(1 / (math.pi * 27), rel=0.01)
    assert grid[16 + 6, 16, 16] == 0.0  # q = 2: the edge of the support
    assert grid.sum() == pytest.approx(1.0, rel=1e-14)


def test_sph_under_one_cell_falls_back_to_cic():
    cells = np.array([[3.3, 0.1, 7.9]])
    sph = np.zeros((8, 8, 8))
    fallbacks = deposit_sph(cells, np.array([5.0]), np.array([0.2]), True, sph)
    cic = deposit_cic(cells, np.array([5.0]), True, np.zeros((8, 8, 8)))
    assert fallbacks == 1
    np.testing.assert_array_equal(sph, cic)


# -- conservation -----------------------------------------------------------------------------
def random_particles(rng, n, box, periodic):
    """Positions (in the box's unit) with a share on and across its faces, and masses, abundances."""
    if periodic:
        positions = rng.uniform(-box, 2 * box, (n, 3))
        positions[:40] = rng.choice([0.0, box, -1e-9 * box, box * (1 - 1e-12), 3 * box], (40, 3))
    else:
        positions = rng.uniform(0, box, (n, 3))
        positions[:40] = rng.choice([0.0, 1e-9 * box, box * (1 - 1e-12)], (40, 3))
    return positions, rng.uniform(0.5, 2.0, n), rng.uniform(0.0, 1.2, n)


@pytest.mark.parametrize("periodic", [True, False])
@pytest.mark.parametrize("smoothing", [False, True])
def test_total_electron_number_is_conserved(tmp_path, periodic, smoothing):
    rng = np.random.default_rng(2024)
    n, box_ckpc_h, hubble_h = 3000, 20000.0, 0.7
    positions, masses, abundance = random_particles(rng, n, box_ckpc_h, periodic)
    # Smoothing lengths from a twentieth of a cell to a quarter of the box (32 cells: 625 ckpc/h each).
    smoothing_lengths = np.exp(rng.uniform(math.log(30.0), math.log(box_ckpc_h / 4), n))
    path = write_particles(tmp_path / "gas.h5", **{
        "PartType0/Coordinates": positions, "PartType0/Masses": masses,
        "PartType0/ElectronAbundance": abundance, "PartType0/SmoothingLength": smoothing_lengths,
    })
    result = grid_particles(
        path, 32, positions="PartType0/Coordinates", position_unit="ckpc/h", box_size="20 cMpc/h",
        redshift=2.0, hubble_h=hubble_h, masses="PartType0/Masses", mass_unit="1e10 Msun/h",
        electron_abundance="PartType0/ElectronAbundance",
        smoothing_lengths="PartType0/SmoothingLength" if smoothing else None, kernel_support=2.0,
        periodic=periodic,
    )
    # Electrons = M X_H / m_p * n_e/n_H, with 1e10 Msun/h and m_p from astropy.
    expected = np.sum(masses * 1e10 * MSUN_G / hubble_h * 0.76 / PROTON_MASS_G * abundance)
    cell_cm = 20.0 / hubble_h / 32 * MPC_CM
    on_grid = result.density.sum() * cell_cm**3
    assert result.method == ("sph" if smoothing else "cic")
    assert result.electrons_read == pytest.approx(expected, rel=1e-10)
    assert abs(on_grid - expected) / expected < 1e-6
    assert abs(result.relative_difference) < 1e-6
    assert np.all(np.isfinite(result.density)) and np.all(result.density >= 0)
    if smoothing:
        assert 0 < result.kernel_fallbacks < n  # both branches were exercised


def test_periodic_images_deposit_identically(tmp_path):
    # A periodic box cannot tell a particle from its image one box length away (common practice, no source).
    rng = np.random.default_rng(7)
    positions = rng.uniform(0, 10.0, (500, 3))
    shifted = positions + 10.0 * rng.integers(-2, 3, (500, 3))
    lengths = rng.uniform(0.1, 3.0, 500)
    grids = []
    for index, where in enumerate((positions, shifted)):
        path = write_particles(tmp_path / f"p{index}.h5", pos=where, m=np.ones(500), hsml=lengths)
        grids.append(grid_particles(
            path, 16, positions="pos", position_unit="cMpc", box_size="10 cMpc", redshift=0.0,
            masses="m", mass_unit="Msun", electron_abundance=1.0, smoothing_lengths="hsml", kernel_support=2,
        ).density)
    np.testing.assert_allclose(grids[1], grids[0], rtol=1e-9, atol=1e-12 * grids[0].max())


# -- units ---------------------------------------------------------------------------------
def test_the_same_gas_in_different_units_gives_the_same_grid(tmp_path):
    rng = np.random.default_rng(3)
    hubble_h, redshift = 0.68, 1.5
    positions_cMpc = rng.uniform(0, 10 / hubble_h, (400, 3))
    masses_g = rng.uniform(1, 2, 400) * 1e40
    common = dict(redshift=redshift, electron_abundance=1.08)
    described = [
        dict(pos=positions_cMpc, m=masses_g, position_unit="cMpc", box_size=f"{10 / hubble_h!r} cMpc", mass_unit="g"),
        dict(pos=positions_cMpc * 1e3 * hubble_h, m=masses_g / MSUN_G * hubble_h / 1e10,
             position_unit="ckpc/h", box_size="10 cMpc/h", mass_unit="1e10 Msun/h", hubble_h=hubble_h),
        # proper lengths are comoving ones divided by 1 + z
        dict(pos=positions_cMpc * 1e3 / (1 + redshift), m=masses_g / MSUN_G, position_unit="pkpc",
             box_size=f"{10 / hubble_h / (1 + redshift) * 1e3!r} pkpc", mass_unit="Msun"),
    ]
    grids = []
    for index, options in enumerate(described):
        path = write_particles(tmp_path / f"u{index}.h5", pos=options.pop("pos"), m=options.pop("m"))
        grids.append(grid_particles(path, 8, positions="pos", masses="m", **common, **options).density)
    for other in grids[1:]:
        np.testing.assert_allclose(other, grids[0], rtol=1e-9, atol=1e-12 * grids[0].max())


def test_fully_ionised_hydrogen_and_helium(tmp_path):
    # Fully ionised H and He, metals neglected: electrons per proton mass = X + Y/2 = (1 + X)/2
    # (the mean molecular weight per electron, 1/mu_e; Kippenhahn & Weigert, from memory).
    path = write_particles(tmp_path / "ion.h5", pos=np.array([[0.5, 0.5, 0.5]]), rho=np.array([3.0]),
                           vol=np.array([2.0]), x=np.array([1.0]))
    result = grid_particles(
        path, 2, positions="pos", position_unit="cMpc", box_size="1 cMpc", redshift=0.0,
        densities="rho", volumes="vol", mass_unit="g", hydrogen_ionised_fraction="x", helium_electrons=2,
        hydrogen_fraction=0.75,
    )
    assert result.electrons_read == pytest.approx(6.0 / PROTON_MASS_G * (1 + 0.75) / 2, rel=1e-12)


# -- bad input ------------------------------------------------------------------------------
@pytest.fixture
def particle_file(tmp_path):
    rng = np.random.default_rng(0)
    return write_particles(
        tmp_path / "gas.h5", **{"PartType0/Coordinates": rng.uniform(0, 5, (50, 3)),
                                "PartType0/Masses": np.ones(50), "PartType0/Short": np.ones(49),
                                "PartType0/Flat": np.ones((50, 2)), "PartType0/Hsml": np.full(50, 1.0)},
    )


GOOD = dict(positions="PartType0/Coordinates", position_unit="cMpc", box_size="5 cMpc", redshift=1.0,
            masses="PartType0/Masses", mass_unit="Msun", electron_abundance=1.0)


@pytest.mark.parametrize("change, expected", [
    (dict(positions="PartType0/Position"), r"no dataset 'PartType0/Position'.*PartType0/Coordinates \(50, 3\)"),
    (dict(masses="Masses"), r"masses \(--masses\).*datasets present.*PartType0/Masses"),
    (dict(positions="PartType0/Flat"), r"'PartType0/Flat'.*shape \(50, 2\); expected \(N, 3\)"),
    (dict(masses="PartType0/Short"), r"'PartType0/Short'.*shape \(49,\); expected \(50,\)"),
    (dict(position_unit=None), r"the positions' unit: give position_unit \(--position-unit\)"),
    (dict(position_unit="Mpc"), r"position_unit.*'Mpc' not understood"),
    (dict(mass_unit=None), r"the masses' unit: give mass_unit \(--mass-unit\)"),
    (dict(mass_unit="1e10 km"), r"mass_unit.*not a mass"),
    (dict(mass_unit="1e10 Msun/h"), r"hubble_h \(--hubble-h\)"),
    (dict(box_size=None), r"the box size: give box_size \(--box-size\)"),
    (dict(box_size="5"), r"box_size.*number and a unit"),
    (dict(box_size="5 Mpc/h"), r"box_size.*not understood"),
    (dict(redshift=None), r"redshift \(--redshift\)"),
    (dict(masses=None), r"masses \(--masses\), or both densities"),
    (dict(densities="PartType0/Masses"), r"not both"),
    (dict(hydrogen_ionised_fraction=0.5), r"exactly one of electron_abundance.*both were given"),
    (dict(electron_abundance=None, hydrogen_ionised_fraction=0.5), r"helium_electrons \(--helium-electrons\)"),
    (dict(electron_abundance=-1.0), r"electron_abundance.*50 values are not finite and in \[0, inf\] \(first: -1.0\)"),
    (dict(smoothing_lengths="PartType0/Hsml"), r"kernel_support \(--kernel-support\)"),
    (dict(method="sph"), r"'sph' needs smoothing_lengths"),
    (dict(smoothing_lengths="PartType0/Hsml", kernel_support=20), r"kernel wider than the box"),
    (dict(box_size="4 cMpc", periodic=False), r"outside the box \[0, 4 cMpc\).*not periodic"),
])
def test_bad_input_is_named(particle_file, change, expected):
    with pytest.raises(InputError, match=expected):
        grid_particles(particle_file, 4, **{**GOOD, **change})


def test_negative_masses_are_refused(tmp_path):
    path = write_particles(tmp_path / "neg.h5", pos=np.full((3, 3), 0.5), m=np.array([1.0, -1.0, 1.0]))
    with pytest.raises(InputError, match=r"neg.h5: dataset 'm' \(masses \(--masses\)\)"):
        grid_particles(path, 2, **{**GOOD, "positions": "pos", "masses": "m"})


def test_missing_and_foreign_files(tmp_path):
    with pytest.raises(InputError, match="nothing.h5: particle file not found"):
        grid_particles(tmp_path / "nothing.h5", 4, **GOOD)
    text = tmp_path / "notes.h5"
    text.write_text("not hdf5")
    with pytest.raises(InputError, match="notes.h5: not a readable HDF5 file"):
        grid_particles(text, 4, **GOOD)


# -- the box file --------------------------------------------------------------------------------
def test_written_box_carries_the_schema(particle_file, tmp_path):
    result = grid_particles(particle_file, 4, hubble_h=0.7, **GOOD)
    out = result.write(tmp_path / "box.h5")
    with h5py.File(out, "r") as handle:
        dataset = handle["electron_density"]
        np.testing.assert_array_equal(dataset[()], result.density.astype(np.float32))
        for attrs in (dataset.attrs, handle.attrs):
            assert attrs["quantity"] == "n_e_comoving"
            assert attrs["box_size"] == pytest.approx(5.0) and attrs["box_size_unit"] == "cMpc"
            assert attrs["redshift"] == 1.0 and attrs["hubble_h"] == 0.7
            provenance = json.loads(attrs["provenance"])
            assert provenance["source_checksum"] == "sha256:" + hashlib.sha256(particle_file.read_bytes()).hexdigest()
            assert provenance["datasets"]["positions"] == "PartType0/Coordinates"
            assert provenance["n_cells"] == 4 and provenance["method"] == "cic"
            assert "numpy" in provenance["versions"]
    before = out.read_bytes()
    with pytest.raises(InputError, match="output exists"):
        write_gridded_box(out, np.ones((2, 2, 2)), 1.0, 0.0)
    assert out.read_bytes() == before
    write_gridded_box(out, np.ones((2, 2, 2)), 1.0, 0.0, overwrite=True)
    with h5py.File(out, "r") as handle:
        assert handle["electron_density"].shape == (2, 2, 2) and "hubble_h" not in handle.attrs


# 50 particles in a 5 cMpc box are far from the cosmic mean: the plausibility warning is not the subject.
@pytest.mark.filterwarnings("ignore::raytrace.boxes.meanings.PlausibilityWarning")
def test_written_box_loads_without_flags(particle_file, tmp_path):
    boxes = pytest.importorskip("raytrace.boxes")
    result = grid_particles(particle_file, 4, **GOOD)
    box = boxes.load_box(result.write(tmp_path / "box.h5"))
    assert box.quantity == "n_e_comoving" and box.redshift == 1.0 and box.n_cells == 4
    assert box.box_size_cMpc == pytest.approx(5.0, rel=1e-12)
    # Physical density at the snapshot is (1 + z)^3 times the comoving one (PHYSICS.md section 3).
    np.testing.assert_allclose(box.physical_electron_density(1.0), result.density * 8.0, rtol=1e-6)


# -- command line --------------------------------------------------------------------------------
def parse(argv):
    parser = argparse.ArgumentParser()
    grid_cli.add_arguments(parser)
    return parser.parse_args(argv)


def test_command_line_writes_a_box(particle_file, tmp_path, capsys):
    out = tmp_path / "cli.h5"
    argv = [str(particle_file), "--cells", "4", "--positions", "PartType0/Coordinates", "--position-unit", "cMpc",
            "--box-size", "5 cMpc", "--redshift", "1", "--masses", "PartType0/Masses", "--mass-unit", "Msun",
            "--hydrogen-ionised-fraction", "1", "--helium-electrons", "1", "--smoothing-lengths", "PartType0/Hsml",
            "--kernel-support", "2", "--output", str(out)]
    assert grid_cli.run(parse(argv)) == 0
    printed = capsys.readouterr().out
    assert "50 particles" in printed and "deposit sph" in printed and "relative difference" in printed
    with h5py.File(out, "r") as handle:
        assert handle["electron_density"].shape == (4, 4, 4)
        assert json.loads(handle.attrs["provenance"])["datasets"]["electrons_per_hydrogen"] == "constant 1.0"
    with pytest.raises(InputError, match="output exists"):
        grid_cli.run(parse(argv))
    with pytest.raises(InputError, match=r"mass_unit \(--mass-unit\)"):
        grid_cli.run(parse([a for a in argv if a not in ("--mass-unit", "Msun")] + ["--overwrite"]))

"""raytrace grid --yt (raytrace.boxes.ytgrid): datasets built in memory with yt's own loaders
(uniform grid, two-level AMR, particles), so no download is needed."""

import astropy.constants as const
import numpy as np
import pytest

yt = pytest.importorskip("yt", reason="the raytrace[yt] extra is not installed (pip install 'raytrace[yt]')")

import raytrace.cli as cli  # noqa: E402
from raytrace.boxes import load_box  # noqa: E402
from raytrace.boxes.ytgrid import grid_yt  # noqa: E402
from raytrace.physics.constants import MPC_CM  # noqa: E402

yt.set_log_level(50)
M_P = const.m_p.to_value("g")  # CODATA via astropy
X_H = 0.76                      # hydrogen mass fraction of the runs (stated)
X_E = 1.08                      # electrons per hydrogen nucleus (stated)
SIDE_MPC = 10.0                 # proper side of the stream datasets


def cosmological(ds, z=2.0, h=0.7):
    """Give a stream dataset the redshift and h a cosmological code's dataset carries."""
    ds.cosmological_simulation, ds.current_redshift, ds.hubble_constant = 1, z, h
    return ds


def uniform(n=16, seed=1):
    rho = np.random.default_rng(seed).lognormal(size=(n, n, n)) * 1e-29
    ds = yt.load_uniform_grid({"density": (rho, "g/cm**3")}, (n, n, n), length_unit=(SIDE_MPC, "Mpc"),
                              bbox=np.array([[0.0, 1.0]] * 3), periodicity=(True,) * 3)
    # electrons = sum rho V x X_H / m_p (independent of yt: the array and the cell volume)
    cell_cm3 = (SIDE_MPC * MPC_CM / n) ** 3
    return ds, float(rho.sum() * cell_cm3 * X_E * X_H / M_P)


def check_box(result, tmp_path, total, tolerance):
    """The written box loads with no flags and holds the dataset's electrons."""
    path = result.write(tmp_path / "box.h5")
    box = load_box(path, check=False)
    assert box.redshift == 2.0
    # proper 10 Mpc times 1 + z; yt's Mpc and astropy's differ by 2e-10 (their constants)
    assert box.box_size_cMpc == pytest.approx(SIDE_MPC * 3.0, rel=1e-9)
    cell_cm3 = (box.cell_size_cMpc * MPC_CM) ** 3
    electrons = float(np.sum(box.data, dtype=np.float64)) * box.comoving_scale * cell_cm3
    assert electrons == pytest.approx(total, rel=tolerance)
    return box


def test_uniform_grid_keeps_its_electrons(tmp_path):
    ds, total = uniform()
    result = grid_yt(cosmological(ds), 8, ionised_fraction=X_E, hydrogen_fraction=X_H)
    # The covering grid sums whole cells: exact up to float64 rounding; 1e-6 also covers the
    # float32 box file (6e-8 per cell, averaging down).
    assert result.electrons_gridded == pytest.approx(total, rel=1e-6)
    assert result.hubble_h == 0.7
    check_box(result, tmp_path, total, 1e-6)


def test_two_level_amr_grid_keeps_its_electrons(tmp_path):
    rng = np.random.default_rng(2)
    grids = [dict(left_edge=[0.0] * 3, right_edge=[1.0] * 3, level=0, dimensions=[8] * 3),
             dict(left_edge=[0.25] * 3, right_edge=[0.75] * 3, level=1, dimensions=[8] * 3)]
    for grid in grids:
        grid["density"] = (rng.lognormal(size=grid["dimensions"]) * 1e-29, "g/cm**3")
    ds = cosmological(yt.load_amr_grids(grids, [8] * 3, length_unit=(SIDE_MPC, "Mpc"), periodicity=(True,) * 3))
    # Independent total: coarse cells outside the refined cube plus the fine cells.
    coarse, fine = grids[0]["density"][0], grids[1]["density"][0]
    covered = np.zeros((8, 8, 8), bool)
    covered[2:6, 2:6, 2:6] = True
    coarse_cm3 = (SIDE_MPC * MPC_CM / 8) ** 3
    mass = coarse[~covered].sum() * coarse_cm3 + fine.sum() * coarse_cm3 / 8
    total = float(mass * X_E * X_H / M_P)
    for cells in (8, 16):  # coarser than the fine level, and at it
        result = grid_yt(ds, cells, ionised_fraction=X_E, hydrogen_fraction=X_H)
        assert result.electrons_gridded == pytest.approx(total, rel=1e-6)
    check_box(result, tmp_path, total, 1e-6)


def test_particles_keep_their_electrons_within_the_cic_deposit_error(tmp_path):
    rng = np.random.default_rng(3)
    count = 4000
    position = rng.random((count, 3)) * SIDE_MPC
    mass = rng.uniform(0.5, 1.5, count) * 1e40
    abundance = rng.uniform(0.9, 1.16, count)
    data = {f"particle_position_{axis}": (position[:, i], "Mpc") for i, axis in enumerate("xyz")}
    data.update(particle_mass=(mass, "g"), ElectronAbundance=(abundance, ""))
    ds = cosmological(yt.load_particles(data, length_unit="Mpc", bbox=np.array([[0.0, SIDE_MPC]] * 3),
                                        periodicity=(True,) * 3))
    total = float(np.sum(mass * abundance) * X_H / M_P)
    result = grid_yt(ds, 8, hydrogen_fraction=X_H)  # ElectronAbundance is n_e / n_H (Gadget's definition)
    assert result.electrons_read == pytest.approx(total, rel=1e-6)
    # Cloud in cell on a periodic domain shares each particle's electrons among 8 cells with
    # weights summing to 1 (Hockney & Eastwood 1988): the total is kept up to rounding; 1e-6.
    assert result.electrons_gridded == pytest.approx(total, rel=1e-6)
    check_box(result, tmp_path, total, 1e-6)


def test_grid_yt_on_the_command_line_writes_a_box_the_loader_reads(tmp_path, capsys):
    ds, total = uniform(8, seed=4)
    saved = ds.covering_grid(0, ds.domain_left_edge, [8] * 3).save_as_dataset(
        str(tmp_path / "snapshot.h5"), fields=[("gas", "density")])
    out = tmp_path / "box.h5"
    argv = ["grid", "--yt", saved, "--cells", "4", "--ionised-fraction", str(X_E), "--hydrogen-fraction", str(X_H),
            "--output", str(out)]
    # yt's saved dataset is not a cosmological one: the redshift must be given.
    assert cli.main(argv) == 2
    assert "--redshift" in capsys.readouterr().err
    assert cli.main(argv + ["--redshift", "0"]) == 0
    box = load_box(out, check=False)
    electrons = float(np.sum(box.data, dtype=np.float64)) * box.comoving_scale * (box.cell_size_cMpc * MPC_CM) ** 3
    assert box.box_size_cMpc == pytest.approx(SIDE_MPC, rel=1e-9)  # yt's Mpc against astropy's: 2e-10
    assert electrons == pytest.approx(total, rel=1e-6)


@pytest.mark.parametrize("arguments, named", [
    (dict(n_cells=5, ionised_fraction=1.0), "--cells 5"),
    (dict(n_cells=8), "--ionised-fraction"),
    (dict(n_cells=8, ionised_fraction=2.0), "--ionised-fraction"),
    (dict(n_cells=8, ionised_fraction="nothing"), "--ionised-fraction"),
    (dict(n_cells=8, electron_field="nothing"), "--yt-field"),
    (dict(n_cells=8, ionised_fraction=1.0, electron_field="density"), "--yt-field"),
])
def test_bad_yt_options_name_the_flag(arguments, named):
    from raytrace.core.errors import InputError

    ds, _ = uniform()
    with pytest.raises(InputError, match=named):
        grid_yt(cosmological(ds), **arguments)

"""An own simulation's metadata read as it is meant, or refused in one message (issue 24, items 6, 7,
9, 12 and 16).

Before the fix: a Gadget-like file's UnitLength_in_cm was ignored and the error suggested
'50000 cMpc/h' (1000 times too large); contradicting metadata were resolved silently; an
ionised_fraction of -1 was ignored, `grid --cells 1` wrote a box no loader reads and `inspect`
described a half-written box; `inspect` and `grid` named one missing piece per try; the unit-slip
warning missed an overdensity declared as a density and the reverse.

References: astropy units and constants (kpc in cm, m_p), astropy's Planck18 (Omega_b, rho_crit,
the comoving distance to z = 1100); Gadget's convention that a cosmological run's lengths are
comoving in UnitLength_in_cm / h and masses in UnitMass_in_g / h (from memory of the Gadget-2 user
guide, Springel 2005); HDF5's allocation of a dataset's storage as it is written (h5py's
get_space_status).
"""

import warnings

import astropy.constants as const
import astropy.units as u
import h5py
import numpy as np
import pytest
from astropy.cosmology import Planck18

import raytrace.cli as cli
from raytrace.physics.background import MeanPlasma
from raytrace.boxes import load_box
from raytrace.core.errors import InputError
from raytrace.physics.ionisation import IonisationHistory
from safety_support import error_lines

HELIUM, X_E = 0.245, 1.08
KPC_CM = (1 * u.kpc).to_value(u.cm)  # Gadget's usual UnitLength_in_cm, 3.085678e21


@pytest.fixture(scope="module")
def plasma():
    return MeanPlasma(Planck18, IonisationHistory.constant(X_E, helium_fraction=HELIUM))


def mean_comoving_electrons():
    """nbar_e,comoving = x_e (1 - Y_p) Omega_b rho_crit,0 / m_p, every number from astropy."""
    rho_b = Planck18.Ob0 * Planck18.critical_density0.to_value("g/cm3")
    return X_E * (1.0 - HELIUM) * rho_b / const.m_p.to_value("g")


def box_file(path, values=None, attrs=None, groups=None, dataset="PartType0/ElectronDensity"):
    rng = np.random.default_rng(0)
    values = rng.lognormal(-0.18, 0.6, (8, 8, 8)) * mean_comoving_electrons() if values is None else values
    with h5py.File(path, "w") as handle:
        node = handle.create_dataset(dataset, data=np.asarray(values, dtype=np.float32))
        node.attrs.update(attrs or {})
        for name, attributes in (groups or {}).items():
            handle.require_group(name).attrs.update(attributes)
    return path


GADGET_HEADER = {"Header": {"BoxSize": 50000.0, "HubbleParam": 0.7, "Redshift": 1.0},
                 "Parameters": {"UnitLength_in_cm": KPC_CM, "UnitMass_in_g": 1.989e43}}


# -- item 6: code units ------------------------------------------------------------------------------
def test_a_gadget_like_box_size_takes_the_code_unit_of_length_per_h(tmp_path, plasma):
    path = box_file(tmp_path / "snap.h5", attrs={"quantity": "n_e_comoving"}, groups=GADGET_HEADER)
    box = load_box(path, plasma=plasma)
    expected = 50000.0 * (KPC_CM * u.cm).to_value(u.Mpc) / 0.7  # 50000 ckpc/h with h = 0.7
    assert box.box_size_cMpc == pytest.approx(expected, rel=1e-12)
    assert "UnitLength_in_cm" in box.describe()["sources"]["box_size"]


def test_a_box_size_without_any_unit_says_where_it_came_from_and_suggests_no_unit(tmp_path, plasma):
    groups = {"Header": {"BoxSize": 50000.0, "HubbleParam": 0.7, "Redshift": 1.0}}
    path = box_file(tmp_path / "snap.h5", attrs={"quantity": "n_e_comoving"}, groups=groups)
    with pytest.raises(InputError) as raised:
        load_box(path, plasma=plasma)
    message = str(raised.value)
    assert "attribute 'BoxSize' of group /Header = 50000 has no unit" in message and "--box-size" in message
    assert "cMpc" not in message and "kpc" not in message  # no unit the file does not state


def test_a_box_larger_than_the_distance_to_last_scattering_is_warned_about(tmp_path, plasma):
    distance = Planck18.comoving_distance(1100).to_value(u.Mpc)  # about 13900 Mpc
    path = box_file(tmp_path / "snap.h5", attrs={"quantity": "n_e_comoving", "redshift": 1.0})
    with pytest.warns(UserWarning, match="larger than the distance to last scattering"):
        box = load_box(path, plasma=plasma, box_size="50000 cMpc/h", hubble_h=0.7)  # the unit of the old hint
    assert box.box_size_cMpc > distance
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        load_box(path, plasma=plasma, box_size="50 cMpc/h", hubble_h=0.7)


def test_grid_reads_the_header_and_code_units_of_a_gadget_like_particle_file(tmp_path, capsys):
    n, mass_code = 400, 2.5e-4  # particle masses in UnitMass_in_g / h
    with h5py.File(tmp_path / "snap.h5", "w") as handle:
        handle["PartType0/Coordinates"] = np.random.default_rng(1).uniform(0.0, 10000.0, (n, 3))  # ckpc/h
        handle["PartType0/Masses"] = np.full(n, mass_code)
        handle.create_group("Header").attrs.update(BoxSize=10000.0, HubbleParam=0.7, Redshift=2.0)
        handle.create_group("Parameters").attrs.update(UnitLength_in_cm=KPC_CM, UnitMass_in_g=1.989e43)
    status = cli.main(["grid", str(tmp_path / "snap.h5"), "--cells", "8", "--output", str(tmp_path / "box.h5"),
                       "--positions", "PartType0/Coordinates", "--masses", "PartType0/Masses",
                       "--ionised-fraction", "1"])
    assert status == 0, capsys.readouterr().err
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")  # a 400-particle box is far from the cosmic mean
        box = load_box(tmp_path / "box.h5", check=False)
    assert box.redshift == 2.0
    assert box.box_size_cMpc == pytest.approx(10000.0 * (KPC_CM * u.cm).to_value(u.Mpc) / 0.7, rel=1e-12)
    # Electrons: N m UnitMass / h X_H / m_p (x = 1, X_H = 0.76), over the comoving volume.
    electrons = n * mass_code * 1.989e43 / 0.7 * 0.76 / const.m_p.to_value("g")
    volume = (box.box_size_cMpc * u.Mpc).to_value(u.cm) ** 3
    assert np.mean(box.data, dtype=np.float64) * box.comoving_scale * volume == pytest.approx(electrons, rel=1e-5)


# -- item 7: contradicting metadata --------------------------------------------------------------------------
def test_contradicting_metadata_are_warned_in_one_line_and_inspect_shows_both(tmp_path, plasma, capsys):
    path = box_file(tmp_path / "snap.h5", dataset="density",
                    attrs={"quantity": "n_e_comoving", "redshift": 1.0, "box_size": 100.0, "box_size_unit": "cMpc/h"},
                    groups={"Header": {"Redshift": 3.0, "BoxSize": 50.0, "HubbleParam": 0.7}})
    from raytrace.boxes.conflicts import MetadataConflictWarning

    with pytest.warns(MetadataConflictWarning) as caught:
        box = load_box(path, plasma=plasma)
    assert len(caught) == 1
    message = str(caught[0].message)
    assert "'redshift' of dataset /density" in message and "'Redshift' of group /Header says 3" in message
    assert "'BoxSize' of group /Header says 50" in message
    assert box.redshift == 1.0 and box.box_size_cMpc == pytest.approx(100.0 / 0.7, rel=1e-12)
    assert cli.main(["inspect", str(path)]) == 0
    out = capsys.readouterr().out
    assert "redshift       1  [attribute 'redshift' of dataset /density; but attribute 'Redshift' of group " \
           "/Header says 3]" in out


# -- item 9: values that must not pass ---------------------------------------------------------------------------
def test_an_ionised_fraction_of_minus_one_is_refused_even_where_unused(tmp_path, plasma):
    path = box_file(tmp_path / "snap.h5", dataset="density", attrs={
        "quantity": "n_e_comoving", "redshift": 0.0, "box_size": 50.0, "box_size_unit": "cMpc",
        "ionised_fraction": -1.0})
    with pytest.raises(InputError, match=r"attribute 'ionised_fraction' of dataset /density.*-1"):
        load_box(path, plasma=plasma)


def test_grid_refuses_one_cell_a_side(tmp_path, capsys):
    with h5py.File(tmp_path / "gas.h5", "w") as handle:
        handle["pos"] = np.random.default_rng(0).uniform(0.0, 10.0, (50, 3))
        handle["mass"] = np.ones(50)
    argv = ["grid", str(tmp_path / "gas.h5"), "--output", str(tmp_path / "box.h5"), "--positions", "pos",
            "--position-unit", "cMpc", "--box-size", "10 cMpc", "--redshift", "0", "--masses", "mass",
            "--mass-unit", "Msun", "--ionised-fraction", "1", "--cells", "1"]
    assert cli.main(argv) == 2
    lines = error_lines(capsys.readouterr().err)
    assert len(lines) == 1 and "--cells" in lines[0] and ">= 2" in lines[0]
    assert not (tmp_path / "box.h5").exists()


def test_inspect_refuses_a_half_written_box(tmp_path, capsys):
    with h5py.File(tmp_path / "half.h5", "w") as handle:
        node = handle.create_dataset("density", shape=(8, 8, 8), dtype=np.float32, chunks=(2, 8, 8))
        node[:4] = 2.5e-7  # the writer stopped half-way: chunks of the other half were never written
        node.attrs.update(quantity="n_e_comoving", redshift=0.0, box_size=10.0, box_size_unit="cMpc")
    assert cli.main(["inspect", str(tmp_path / "half.h5")]) == 2
    lines = error_lines(capsys.readouterr().err)
    assert len(lines) == 1 and "half-written" in lines[0] and "/density" in lines[0]


# -- item 12: everything missing in one message --------------------------------------------------------------
def test_inspect_names_every_missing_piece_of_metadata_at_once(tmp_path, capsys):
    path = box_file(tmp_path / "bare.h5", dataset="density")
    assert cli.main(["inspect", str(path)]) == 2
    lines = error_lines(capsys.readouterr().err)
    assert len(lines) == 1
    for flag in ("--quantity", "--redshift", "--box-size"):
        assert flag in lines[0], flag


def test_grid_names_every_missing_option_at_once(tmp_path, capsys):
    with h5py.File(tmp_path / "gas.h5", "w") as handle:
        handle["pos"] = np.random.default_rng(0).uniform(0.0, 10.0, (50, 3))
    assert cli.main(["grid", str(tmp_path / "gas.h5"), "--cells", "4", "--output", str(tmp_path / "box.h5")]) == 2
    lines = error_lines(capsys.readouterr().err)
    assert len(lines) == 1
    for flag in ("--positions", "--redshift", "--position-unit", "--box-size", "--masses", "--mass-unit",
                 "--ionised-fraction"):
        assert flag in lines[0], flag


# -- item 16: the two unit slips made most ----------------------------------------------------------------------
def test_an_overdensity_declared_as_a_density_is_named(tmp_path, plasma):
    values = np.random.default_rng(2).lognormal(-0.18, 0.6, (8, 8, 8))
    values /= values.mean()  # an overdensity: mean exactly 1
    path = box_file(tmp_path / "delta.h5", values=values, dataset="density",
                    attrs={"quantity": "n_e_comoving", "redshift": 0.0, "box_size": 50.0, "box_size_unit": "cMpc"})
    with pytest.warns(UserWarning, match="an overdensity declared as a density.*--quantity overdensity"):
        load_box(path, plasma=plasma)


def test_a_density_declared_as_an_overdensity_is_named(tmp_path, plasma):
    values = np.random.default_rng(3).lognormal(-0.18, 0.6, (8, 8, 8))
    values *= mean_comoving_electrons() / values.mean()  # a comoving density: mean exactly nbar_e
    path = box_file(tmp_path / "ne.h5", values=values, dataset="density",
                    attrs={"quantity": "overdensity", "redshift": 0.0, "box_size": 50.0, "box_size_unit": "cMpc"})
    with pytest.warns(UserWarning, match="a density declared as an overdensity.*--quantity n_e_comoving"):
        load_box(path, plasma=plasma)

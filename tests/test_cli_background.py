"""``raytrace background`` end to end, in process (capsys) and once as a subprocess.

The numbers printed are checked against independent references: for a constant
ionisation table, the resonance redshift and K = pi m^2 / (3 (1+z_r) H(z_r))
worked out here with astropy (PHYSICS.md s.3); P against epsilon^2 K / omega_0
with omega_0 from astropy's constants (k T_0, Fixsen 2009; h nu for a frequency).
"""

import subprocess
import sys
from importlib.metadata import version

import astropy.constants as const
import astropy.units as u
import numpy as np
import pytest
from astropy.cosmology import Planck18

from raytrace.cli import main

HBAR_EV_S = const.hbar.to_value(u.eV * u.s)


def _run(capsys, *argv):
    code = main(["background", *argv])
    captured = capsys.readouterr()
    return code, captured.out, captured.err


def _table_rows(out):
    """(mass, K, P, [redshifts]) for every data line of the printed table."""
    rows = []
    for line in out.splitlines():
        if not line.strip() or line.lstrip().startswith("#"):
            continue
        mass, kernel, probability, rest = line.split(None, 3)
        redshifts = [] if rest.strip() == "none" else [float(z) for z in rest.split(",")]
        rows.append((float(mass), float(kernel), float(probability), redshifts))
    return rows


@pytest.fixture()
def constant_table(tmp_path):
    # x_e = 1 at every redshift: a fully ionised hydrogen universe.
    path = tmp_path / "xe_constant.txt"
    z = np.expm1(np.linspace(0.0, np.log1p(3000.0), 200))
    np.savetxt(path, np.column_stack((z, np.ones_like(z))), header="z x_e")
    return path


def _analytic(mass, helium_fraction=0.245):
    """z_r and K for n_e = n_H0 (1+z)^3 (PHYSICS.md s.3), from astropy alone."""
    rho_crit = Planck18.critical_density0.to_value(u.g / u.cm**3)
    n_H0 = (1 - helium_fraction) * Planck18.Ob0 * rho_crit / const.m_p.to_value(u.g)
    # (hbar omega_p)^2 per cm^-3, omega_p^2 = n e^2 / (eps0 m_e) (NRL Formulary).
    m2_per_density = HBAR_EV_S**2 * (u.cm**-3 * const.e.si**2 / (const.eps0 * const.m_e)).to_value(u.s**-2)
    z_r = (mass**2 / m2_per_density / n_H0) ** (1 / 3) - 1
    hubble = HBAR_EV_S * Planck18.H(z_r).to_value(u.s**-1)
    return z_r, np.pi * mass**2 / (3 * (1 + z_r) * hubble)


def test_constant_table_against_analytic_result(capsys, constant_table):
    masses = [1e-13, 1e-12, 1e-10]
    code, out, err = _run(
        capsys, "--mass-values", *map(str, masses), "--ionisation-table", str(constant_table),
        "--helium-fraction", "0.245", "--epsilon", "1e-8", "--frequency", "160 GHz",
    )
    assert code == 0, err
    assert err == ""
    rows = _table_rows(out)
    assert [row[0] for row in rows] == masses
    omega0 = (const.h * 160 * u.GHz).to_value(u.eV)
    for mass, kernel, probability, redshifts in rows:
        z_r, expected_kernel = _analytic(mass)
        assert len(redshifts) == 1
        assert redshifts[0] == pytest.approx(z_r, abs=6e-4)  # printed with 3 decimals
        assert kernel == pytest.approx(expected_kernel, rel=6e-5)  # printed with 5 figures
        assert probability == pytest.approx(1e-16 * expected_kernel / omega0, rel=1.2e-4)
    assert "xe_constant.txt" in out  # the header says which history was used


def test_default_camb_history(capsys):
    # Default: CAMB with Planck 2018; omega_0 = k T_0, T_0 = 2.72548 K (Fixsen 2009).
    code, out, err = _run(capsys, "--mass-values", "1e-13", "1e-9", "1e-16")
    assert code == 0, err
    rows = _table_rows(out)
    assert len(rows) == 3
    omega0 = (const.k_B * 2.72548 * u.K).to_value(u.eV)
    assert f"omega_0 = {omega0:.4e} eV" in out
    mass, kernel, probability, redshifts = rows[0]
    # PHYSICS.md s.5 / issue 2: falls after recombination, rises at reionisation (z_re ~ 7.8
    # for tau = 0.0561), falls after it: three resonances, printed in increasing z.
    assert len(redshifts) == 3
    assert redshifts == sorted(redshifts)
    assert redshifts[0] < 7.0 < redshifts[1] < 12.0 < 20.0 < redshifts[2]
    assert kernel > 0
    assert probability == pytest.approx(1e-14 * kernel / omega0, rel=1.2e-4)
    # Far above the plasma mass at z = 1100 (~2e-10 eV) and far below its minimum (~1e-14 eV):
    # no resonance, K = 0.
    for mass, kernel, probability, redshifts in rows[1:]:
        assert redshifts == [] and kernel == 0.0 and probability == 0.0


def test_mass_grid(capsys, constant_table):
    # numpy.geomspace is the reference for log-spaced masses.
    code, out, err = _run(capsys, "--mass-min", "1e-13", "--mass-max", "1e-11", "--mass-count", "5",
                          "--ionisation-table", str(constant_table))
    assert code == 0 and err == "", err
    rows = _table_rows(out)
    np.testing.assert_allclose([row[0] for row in rows], np.geomspace(1e-13, 1e-11, 5), rtol=1e-4)
    assert all(len(row[3]) == 1 for row in rows)


def test_old_spellings_work_with_one_deprecation_line(capsys, constant_table):
    new = _run(capsys, "--mass-min", "1e-13", "--mass-max", "1e-11", "--mass-count", "5",
               "--ionisation-table", str(constant_table))
    old = _run(capsys, "--mass-range", "1e-13", "1e-11", "5", "--ionisation-table", str(constant_table))
    assert old[0] == 0 and old[1] == new[1]
    lines = old[2].strip().splitlines()
    assert len(lines) == 1 and "--mass-range is deprecated" in lines[0] and "--mass-min" in lines[0]
    listed = _run(capsys, "--mass", "1e-13", "--ionisation-table", str(constant_table))
    assert listed[0] == 0 and "--mass is deprecated" in listed[2] and "use --mass-values" in listed[2]


def test_version(capsys):
    # The installed distribution's metadata (pyproject.toml) is the reference.
    with pytest.raises(SystemExit) as exit_info:
        main(["--version"])
    assert exit_info.value.code == 0
    assert capsys.readouterr().out.strip() == f"raytrace {version('raytrace')}"


@pytest.mark.parametrize(
    "argv, flag",
    [
        (["--mass-values=-1e-13"], "--mass-values"),
        (["--mass-values", "1e-13", "nan"], "--mass-values"),
        (["--mass-values", "0"], "--mass-values"),
        (["--mass-min", "1e-12", "--mass-max", "1e-14", "--mass-count", "5"], "--mass-min"),
        (["--mass-values", "1e-13", "--mass-count", "5"], "--mass-values"),
        (["--mass-values", "1e-13", "--epsilon=-1e-7"], "--epsilon"),
        (["--mass-values", "1e-13", "--epsilon", "nan"], "--epsilon"),
        (["--mass-values", "1e-13", "--z-min", "5", "--z-max", "1"], "--z-min"),
        (["--mass-values", "1e-13", "--z-min", "-1"], "--z-min"),
        (["--mass-values", "1e-13", "--z-max", "nan"], "--z-max"),
        (["--mass-values", "1e-13", "--z-max", "5000"], "--z-max"),
        (["--mass-values", "1e-13", "--frequency", "160"], "--frequency"),
        (["--mass-values", "1e-13", "--frequency", "3 kg"], "--frequency"),
        (["--mass-values", "1e-13", "--optical-depth", "0.9"], "--optical-depth"),
        (["--mass-values", "1e-13", "--reionisation-redshift", "90"], "--reionisation-redshift"),
        (["--mass-values", "1e-13", "--helium-fraction", "1.5"], "--helium-fraction"),
    ],
)
def test_bad_input_exits_2_with_one_line_naming_the_flag(capsys, argv, flag):
    code, out, err = _run(capsys, *argv)
    assert code == 2
    assert out == ""
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith("raytrace background: error: ")
    assert flag in lines[0]
    assert "Traceback" not in err


def test_unreadable_table_names_the_file(capsys, tmp_path):
    for path, content in [(tmp_path / "missing.txt", None), (tmp_path / "broken.txt", "0 1\n1\n")]:
        if content is not None:
            path.write_text(content)
        code, out, err = _run(capsys, "--mass-values", "1e-13", "--ionisation-table", str(path))
        assert code == 2
        lines = err.strip().splitlines()
        assert len(lines) == 1 and str(path) in lines[0]


@pytest.mark.parametrize(
    "argv, flag",
    [
        (["--mass-values", "abc"], "--mass-values"),
        (["--mass-values", "1e-13", "--z-max", "x"], "--z-max"),
    ],
)
def test_unparseable_arguments_exit_2(capsys, argv, flag):
    # argparse's own errors: exit status 2, usage, then one error line naming the flag
    # (argparse convention, Python documentation).
    with pytest.raises(SystemExit) as exit_info:
        main(["background", *argv])
    assert exit_info.value.code == 2
    err = capsys.readouterr().err
    assert flag in err.strip().splitlines()[-1]


def test_a_negative_number_with_an_exponent_is_a_value_refused_naming_its_flag(capsys):
    # argparse's own pattern for negative numbers has no exponent, so it took "-1e-13" for a
    # flag ("expected one argument"); it is a mass, and masses must be positive (issue 14, item 8).
    code, out, err = _run(capsys, "--mass-values", "-1e-13")
    assert code == 2
    lines = err.strip().splitlines()
    assert len(lines) == 1 and "--mass" in lines[0] and "-1e-13" in lines[0]


def test_module_help_subprocess():
    # `python -m raytrace --help` in a fresh interpreter.
    completed = subprocess.run(
        [sys.executable, "-m", "raytrace", "--help"], capture_output=True, text=True, timeout=120
    )
    assert completed.returncode == 0, completed.stderr
    assert "background" in completed.stdout
    assert completed.stdout.lstrip().startswith("usage: raytrace")

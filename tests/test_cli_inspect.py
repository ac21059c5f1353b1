"""Tests of ``raytrace inspect`` through the CLI's main(): JSON and text reports, the
figure, and bad input turned into one line and exit status 2 (issue 3 item 5).

References: numpy percentiles, astropy constants and Planck18, PHYSICS.md sections 1 and 3.
"""

import json
import re

import h5py
import numpy as np
import pytest
from reference_tracer import PLASMA_M2_PER_DENSITY

import raytrace.cli as cli

H_SIM = 0.6766


@pytest.fixture(autouse=True)
def registered(monkeypatch):
    """Run through main() whether or not the lead has registered the subcommand yet."""
    if "inspect" not in cli._SUBCOMMANDS:
        monkeypatch.setattr(cli, "_SUBCOMMANDS", cli._SUBCOMMANDS + ("inspect",))


ROOT_PLASMA_MASS = np.sqrt(PLASMA_M2_PER_DENSITY)  # eV per sqrt(cm^-3), exact CODATA (PHYSICS.md section 1)
# Boxes hold float32 and n_e is formed from them in float32: half a float32 unit (6e-8) in n_e is 3e-8
# in m (measured up to 2.3e-8); 1e-7 leaves a factor 3 and sees the NRL constant's 1.5e-4 in m.
MASS_RTOL = 1e-7


def half_unit_in_last_digit(printed):
    """Half a unit in the last printed digit of a number printed as d.dddde+XX, relative to it."""
    mantissa = printed.lower().split("e")[0]
    return 0.5 * 10.0 ** -len(mantissa.split(".")[1]) / abs(float(mantissa))

def write(path, values, dataset="density", **attrs):
    with h5py.File(path, "a") as handle:
        handle.create_dataset(dataset, data=values).attrs.update(attrs)
    return str(path)


def overdensity_box(path, z, seed, n=16):
    values = np.random.default_rng(seed).lognormal(-0.32, 0.8, size=(n, n, n)).astype(np.float32)
    attrs = dict(quantity="overdensity", box_size=100.0, box_size_unit="cMpc/h", hubble_h=H_SIM, redshift=z)
    return write(path, values, **attrs), values


def run(capsys, *argv):
    status = cli.main(["inspect", *map(str, argv)])
    out, err = capsys.readouterr()
    return status, out, err


def test_json_report_of_a_series(tmp_path, capsys):
    first, values = overdensity_box(tmp_path / "z05.h5", 0.5, 1)
    second, _ = overdensity_box(tmp_path / "z15.h5", 1.5, 2)
    status, out, err = run(capsys, second, first, "--json")
    assert status == 0, err
    report = json.loads(out)
    box = report["boxes"][1]
    assert box["path"].endswith("z05.h5") and box["n_cells"] == 16 and box["redshift"] == 0.5
    # 100 cMpc/h with h = 0.6766 (common practice, no source).
    assert box["box_size_cMpc"] == pytest.approx(100 / H_SIM, rel=1e-12)
    assert box["cell_size_cMpc"] == pytest.approx(100 / H_SIM / 16, rel=1e-12)
    statistics = box["statistics"]
    # An overdensity box's n_e / nbar_e is its stored values: numpy's percentiles are the reference.
    for p in ("0.1", "1.0", "16.0", "50.0", "84.0", "99.0", "99.9"):
        assert statistics["percentiles"][p] == pytest.approx(np.percentile(values, float(p)), rel=1e-5)
    assert statistics["mean_overdensity"] == pytest.approx(values.mean(dtype=np.float64), rel=1e-6)
    # m_gamma = sqrt(4 pi alpha n_e / m_e) (PHYSICS.md section 1; the NRL Plasma Formulary's 8.98 kHz
    # sqrt(n_e) is its 3-digit check), from the exact CODATA constants (tests/reference_tracer.py).
    per_root_density = ROOT_PLASMA_MASS
    n_e_max = values.max() * statistics["mean_electron_density_cm3"]
    assert statistics["plasma_mass_eV"]["highest_cell"] == pytest.approx(per_root_density * np.sqrt(n_e_max), rel=MASS_RTOL, abs=0)
    coverage = report["series"]["coverage"]
    # Nearest snapshot serves: the boundary sits half-way, z = 1 (issue 3 item 2).
    assert [(c["z_start"], c["z_end"], c["box"]) for c in coverage] == [(0.0, 1.0, 0), (1.0, 1.5, 1)]
    # Over z = 0 .. 1 the z = 0.5 box's densest cell grows as (1+z)^3 (PHYSICS.md section 3).
    comoving_max = values.max() * statistics["mean_electron_density_cm3"] / 1.5**3
    assert coverage[0]["mass_high_eV"] == pytest.approx(per_root_density * np.sqrt(comoving_max * 2.0**3), rel=MASS_RTOL, abs=0)


def test_text_report_and_flags_for_a_file_without_attributes(tmp_path, capsys):
    path = write(tmp_path / "raw.h5", np.full((8, 8, 8), 3, dtype=np.int64), "gas/ne")
    status, out, err = run(
        capsys, path, "--quantity", "n_e_physical", "--box-size", "50 Mpc", "--redshift", "2",
    )
    assert status == 0, err
    assert "8^3 cells, stored as int64" in out and "/gas/ne" in out
    assert "50 cMpc, as '50 Mpc'  [given: --box-size" in out
    assert "series" not in out
    # n_e = 3 cm^-3 everywhere: m = sqrt(4 pi alpha 3 / m_e) = 6.43e-11 eV (PHYSICS.md section 1, exact CODATA),
    # printed with 5 digits: to half a unit in the last printed digit.
    expected = ROOT_PLASMA_MASS * np.sqrt(3.0)
    probes = re.search(r"probes\s+dark-photon masses (\S+) \.\. (\S+) eV at z = 2", out)
    assert probes, out
    for printed in (probes[1], probes[2]):
        assert float(printed) == pytest.approx(expected, rel=half_unit_in_last_digit(printed), abs=0)
    # A 1e-3 slip in the constant (half the old 2e-3) would be seen.
    assert not float(probes[1]) * 1.001 == pytest.approx(expected, rel=half_unit_in_last_digit(probes[1]), abs=0)


def test_plot_is_written_once_and_replaced_only_when_asked(tmp_path, capsys):
    first, _ = overdensity_box(tmp_path / "a.h5", 0.0, 3)
    second, _ = overdensity_box(tmp_path / "b.h5", 2.0, 4)
    figure = tmp_path / "inspect.png"
    status, out, err = run(capsys, first, second, "--plot", figure)
    assert status == 0, err
    assert figure.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"  # the PNG signature (PNG specification)
    status, out, err = run(capsys, first, "--plot", figure)
    assert status == 2 and "exists" in err and "--overwrite" in err
    status, out, err = run(capsys, first, "--plot", figure, "--overwrite")
    assert status == 0, err
    status, out, err = run(capsys, first, "--plot", tmp_path / "inspect.xyz")
    assert status == 2 and "image format" in err


def test_bad_input_is_one_line_and_status_two(tmp_path, capsys):
    status, out, err = run(capsys, tmp_path / "absent.h5")
    assert status == 2 and "absent.h5: file not found" in err and "Traceback" not in err
    values = np.ones((8, 8, 8))
    values[0, 0, 0] = np.nan
    path = write(tmp_path / "nan.h5", values, quantity="n_e_comoving", box_size=1.0, box_size_unit="cMpc", redshift=0.0)
    status, out, err = run(capsys, path)
    assert status == 2 and "nan.h5, dataset /density" in err and "1 of 512" in err
    status, out, err = run(capsys, path, path, "--redshift", "1,2,3")
    assert status == 2 and "--redshift" in err and "3 values for 2 boxes" in err
    status, out, err = run(capsys, path, "--box-size", "12 leagues")
    assert status == 2 and "--box-size" in err and "leagues" in err


def test_two_boxes_at_one_redshift_are_shown_then_refused_as_a_series(tmp_path, capsys):
    first, _ = overdensity_box(tmp_path / "a.h5", 1.0, 5)
    second, _ = overdensity_box(tmp_path / "b.h5", 1.0, 6)
    status, out, err = run(capsys, first, second)
    assert "box 1 of 2" in out and "box 2 of 2" in out
    assert status == 2 and "same redshift" in err

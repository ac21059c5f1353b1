"""Tests of raytrace.boxes: reading HDF5 boxes in every meaning, series of snapshots,
statistics, and the bad-input messages (issue 3 items 1, 2, 5).

References: astropy (units, constants, Planck18), numpy (percentiles, interpolation),
scipy.stats (log-normal quantiles), PHYSICS.md sections 1, 3 and 5.
"""

import pickle
import tracemalloc

import astropy.constants as const
import astropy.units as u
import h5py
import numpy as np
import pytest
from astropy.cosmology import Planck18
from astropy.cosmology import units as cu
from reference_tracer import PLASMA_M2_PER_DENSITY
from scipy import stats

import raytrace.boxes.meanings as boxes_meanings
import raytrace.boxes.values as boxes_values
from raytrace.boxes import Box, BoxSeries, as_series, load_box, load_series
from raytrace.core.errors import InputError
from raytrace.physics.background import MeanPlasma
from raytrace.physics.ionisation import IonisationHistory

# The reading tests store values of order 1 (not cosmic densities): the plausibility warning is the
# subject of test_box_sources.py and test_box_metadata.py, not of these.
pytestmark = pytest.mark.filterwarnings("ignore::raytrace.boxes.meanings.PlausibilityWarning")

HELIUM = 0.245
X_E = 1.08
H_SIM = 0.6766


@pytest.fixture(scope="module")
def plasma():
    """Planck18 with a constant x_e, so that nbar_e has a closed form below."""
    return MeanPlasma(Planck18, IonisationHistory.constant(X_E, helium_fraction=HELIUM))


ROOT_PLASMA_MASS = np.sqrt(PLASMA_M2_PER_DENSITY)  # eV per sqrt(cm^-3), exact CODATA (PHYSICS.md section 1)
# Boxes hold float32 and n_e is formed from them in float32: half a float32 unit (6e-8) in n_e is 3e-8
# in m (measured up to 2.3e-8); 1e-7 leaves a factor 3 and sees the NRL constant's 1.5e-4 in m.
MASS_RTOL = 1e-7

def hydrogen_density0():
    # n_H0 = (1 - Y_p) Omega_b rho_crit / m_p (PHYSICS.md section 5), all from astropy.
    rho_baryon = Planck18.Ob0 * Planck18.critical_density0.to_value("g/cm3")
    return (1.0 - HELIUM) * rho_baryon / const.m_p.to_value("g")


def mean_electron_density(z):
    # nbar_e = x_e n_H0 (1+z)^3 (PHYSICS.md section 5).
    return X_E * hydrogen_density0() * (1.0 + z) ** 3


def write(path, data, dataset="density", attrs=None, root=None, **options):
    with h5py.File(path, "a") as handle:
        node = handle.create_dataset(dataset, data=data, **options)
        node.attrs.update(attrs or {})
        handle.attrs.update(root or {})
    return path


def field(n=16, seed=0, sigma=0.8):
    rng = np.random.default_rng(seed)
    return rng.lognormal(-0.5 * sigma**2, sigma, size=(n, n, n))


STANDARD = {"box_size": 100.0, "box_size_unit": "cMpc/h", "hubble_h": H_SIM, "redshift": 1.5}


# -- round trip in every meaning ------------------------------------------------------------
Z_SNAP = 1.5


def _stored(quantity, n_e, fraction):
    """What a simulation would store for a physical n_e at Z_SNAP (the definitions of issue 3 item 1)."""
    expansion = (1.0 + Z_SNAP) ** 3
    if quantity == "n_e_physical":
        return n_e
    if quantity == "n_e_comoving":  # comoving = physical / (1+z)^3 (PHYSICS.md section 3)
        return n_e / expansion
    if quantity == "overdensity":
        return n_e / mean_electron_density(Z_SNAP)
    if quantity == "gas_density":  # n_e = x n_H, n_H = (1 - Y_p) rho / m_p (PHYSICS.md section 5)
        return n_e / fraction * const.m_p.to_value("g") / (1.0 - HELIUM)
    # gas_overdensity: n_H = delta n_H0 (1+z)^3
    return n_e / (fraction * hydrogen_density0() * expansion)


@pytest.mark.parametrize(
    "quantity, fraction_kind",
    [
        ("n_e_physical", None),
        ("n_e_comoving", None),
        ("overdensity", None),
        ("gas_density", "constant"),
        ("gas_density", "dataset"),
        ("gas_overdensity", "constant"),
        ("gas_overdensity", "dataset"),
    ],
)
def test_round_trip_gives_the_same_physical_density(tmp_path, plasma, quantity, fraction_kind):
    n_e = field(seed=1) * mean_electron_density(Z_SNAP)
    rng = np.random.default_rng(2)
    attrs = dict(STANDARD, quantity=quantity)
    fraction = None
    if fraction_kind == "constant":
        fraction = 0.9
        attrs["ionised_fraction"] = fraction
    elif fraction_kind == "dataset":
        fraction = rng.uniform(0.3, 1.16, size=n_e.shape)
        attrs["ionised_fraction_dataset"] = "/fields/x_e"
    path = write(tmp_path / "box.h5", _stored(quantity, n_e, fraction), "fields/density", attrs)
    if fraction_kind == "dataset":
        write(path, fraction.astype(np.float32), "fields/x_e")
    box = load_box(path, plasma=plasma)  # the density is the only 3-D dataset once x_e is set aside
    assert box.dataset == "/fields/density"
    assert box.data.dtype == np.float32 and box.data.flags.c_contiguous
    # float32 storage: a few parts in 1e7 per value.
    np.testing.assert_allclose(box.physical_electron_density(Z_SNAP), n_e, rtol=2e-6)
    # Elsewhere the comoving field is scaled by (1+z)^3 (PHYSICS.md section 3).
    np.testing.assert_allclose(
        box.physical_electron_density(0.5), n_e * (1.5 / (1.0 + Z_SNAP)) ** 3, rtol=2e-6
    )


def test_from_array_in_each_meaning_matches_the_file_loader(plasma):
    n_e = field(seed=3) * mean_electron_density(Z_SNAP)
    for quantity, fraction in (("n_e_comoving", None), ("overdensity", None), ("gas_density", 0.7)):
        box = Box.from_array(
            _stored(quantity, n_e, fraction), "100 Mpc/h", Z_SNAP, quantity,
            plasma=plasma, hubble_h=H_SIM, ionised_fraction=fraction,
        )
        np.testing.assert_allclose(box.physical_electron_density(Z_SNAP), n_e, rtol=2e-6)
        assert box.load_arguments is None
    array_fraction = np.full(n_e.shape, 0.5)
    box = Box.from_array(
        _stored("gas_overdensity", n_e, array_fraction), "100 Mpc/h", Z_SNAP, "gas_overdensity",
        plasma=plasma, hubble_h=H_SIM, ionised_fraction=array_fraction,
    )
    np.testing.assert_allclose(box.physical_electron_density(Z_SNAP), n_e, rtol=2e-6)


def test_gas_at_the_mean_baryon_density_gives_the_mean_electron_density(plasma):
    # rho = Omega_b rho_crit (1+z)^3 fully ionised to x_e gives nbar_e (astropy Planck18).
    rho = Planck18.Ob0 * Planck18.critical_density0.to_value("g/cm3") * (1.0 + Z_SNAP) ** 3
    box = Box.from_array(np.full((4, 4, 4), rho), "50 cMpc", Z_SNAP, "gas_density", plasma=plasma,
                         ionised_fraction=X_E)
    np.testing.assert_allclose(box.physical_electron_density(Z_SNAP), mean_electron_density(Z_SNAP), rtol=1e-6)


# -- box size and units -----------------------------------------------------------------------
@pytest.mark.parametrize(
    "given, hubble_h, redshift, expected_cMpc",
    [
        # Units by astropy; comoving = physical (1+z), and /h divides by h (common practice, no source).
        ("100 cMpc/h", H_SIM, 0.5, (100 * u.Mpc).to_value(u.Mpc) / H_SIM),
        ("100 Mpc/h", H_SIM, 0.5, 100 / H_SIM),
        ("100 Mpc h^-1", H_SIM, 0.5, 100 / H_SIM),
        ("67.7 Mpc", None, 2.0, 67.7),
        ("1e5 ckpc/h", H_SIM, 0.0, (1e5 * u.kpc).to_value(u.Mpc) / H_SIM),
        ("10 Mpc physical", None, 1.0, 20.0),
        ("10 physical Mpc", None, 3.0, 40.0),
        ("500 pkpc", None, 1.0, (500 * u.kpc).to_value(u.Mpc) * 2.0),
        (67.7 * u.Mpc, None, 1.0, 67.7),
        (2.0 * u.Gpc, None, 1.0, 2000.0),
        (100 * u.Mpc / cu.littleh, H_SIM, 1.0, 100 / H_SIM),
    ],
)
def test_box_size_argument(given, hubble_h, redshift, expected_cMpc):
    box = Box.from_array(np.ones((4, 4, 4)), given, redshift, hubble_h=hubble_h)
    assert box.box_size_cMpc == pytest.approx(expected_cMpc, rel=1e-12)
    assert box.cell_size_cMpc == pytest.approx(expected_cMpc / 4, rel=1e-12)
    assert box.n_cells == 4


def test_box_size_attribute_must_say_comoving_or_physical(tmp_path):
    attrs = dict(quantity="n_e_comoving", box_size=10.0, box_size_unit="Mpc", redshift=1.0)
    with pytest.raises(InputError, match="comoving or physical"):
        load_box(write(tmp_path / "b.h5", np.ones((4, 4, 4)), attrs=attrs))


@pytest.mark.parametrize(
    "size, unit, expected",
    [
        (100.0, "cMpc/h", 100 / H_SIM),
        (100.0, "cMpc", 100.0),
        (2.5e4, "ckpc/h", 25 / H_SIM),
        # A physical side at the snapshot redshift (z = 1) is (1 + z) times longer comoving.
        (10.0, "pMpc", 20.0),
        (10.0, "Mpc physical", 20.0),
    ],
)
def test_box_size_attributes(tmp_path, size, unit, expected):
    attrs = dict(quantity="n_e_comoving", box_size=size, box_size_unit=unit, redshift=1.0, hubble_h=H_SIM)
    box = load_box(write(tmp_path / "b.h5", np.ones((4, 4, 4)), attrs=attrs))
    assert box.box_size_cMpc == pytest.approx(expected, rel=1e-12)


def test_arguments_override_attributes_and_dataset_attributes_override_root(tmp_path):
    root = dict(quantity="n_e_comoving", box_size=50.0, box_size_unit="cMpc", redshift=3.0)
    path = write(tmp_path / "b.h5", np.ones((4, 4, 4)), attrs={"redshift": 2.0}, root=root)
    assert load_box(path).redshift == 2.0
    box = load_box(path, redshift=0.25, box_size="80 cMpc", quantity="n_e_physical")
    assert (box.redshift, box.box_size_cMpc, box.quantity) == (0.25, 80.0, "n_e_physical")
    # n_e_physical at z = 0.25: comoving = 1 / 1.25^3 (PHYSICS.md section 3).
    assert box.comoving_scale == pytest.approx(1.25**-3, rel=1e-12)


# -- storage: memory map, conversion, memory ---------------------------------------------------------
def test_contiguous_float32_is_memory_mapped_read_only(tmp_path):
    values = field(seed=4).astype(np.float32)
    attrs = dict(STANDARD, quantity="n_e_comoving")
    box = load_box(write(tmp_path / "b.h5", values, attrs=attrs))
    assert isinstance(box.data, np.memmap)
    np.testing.assert_array_equal(box.data, values)
    with pytest.raises(ValueError):
        box.data[0, 0, 0] = 1.0
    assert not isinstance(load_box(tmp_path / "b.h5", memory_map=False).data, np.memmap)


@pytest.mark.parametrize(
    "dtype, options",
    [("int16", {"chunks": (4, 16, 16), "compression": "gzip"}), (">f8", {}), ("float16", {}), ("uint8", {})],
)
def test_other_dtypes_are_read_into_float32(tmp_path, dtype, options):
    values = np.random.default_rng(5).integers(1, 200, size=(16, 16, 16)).astype(dtype)
    box = load_box(write(tmp_path / "b.h5", values, attrs=dict(STANDARD, quantity="n_e_comoving"), **options))
    assert box.data.dtype == np.float32 and not isinstance(box.data, np.memmap)
    np.testing.assert_array_equal(box.data, values.astype(np.float32))
    assert box.describe()["stored_dtype"] == str(np.dtype(dtype))


def test_reading_a_compressed_box_makes_no_second_full_copy(tmp_path, monkeypatch):
    # Issue 3 item 1: one float32 array plus slab-sized temporaries. The slab (16 MB) and the
    # checksum's read buffer (4 MB) are fixed sizes, independent of the box: shrunk here so that
    # a 64^3 box shows what a 512^3 one would.
    import functools

    import raytrace.core.provenance as provenance

    monkeypatch.setattr(provenance, "file_checksum", functools.partial(provenance.file_checksum, chunk_bytes=1 << 16))
    n = 64
    values = field(n, seed=6).astype(np.float32)
    path = write(tmp_path / "b.h5", values, attrs=dict(STANDARD, quantity="n_e_comoving"),
                 chunks=(8, n, n), compression="gzip")
    monkeypatch.setattr(boxes_values, "_SLAB_VALUES", 4 * n * n)
    tracemalloc.start()
    box = load_box(path)
    peak = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    assert box.data.nbytes <= peak < 1.3 * values.nbytes


def test_load_arguments_reopen_the_same_box_without_a_mean_plasma(tmp_path, plasma, monkeypatch):
    path = write(tmp_path / "b.h5", field(seed=7), attrs=dict(STANDARD, quantity="overdensity"))
    box = load_box(path, plasma=plasma)
    arguments = box.load_arguments
    assert pickle.loads(pickle.dumps(arguments)) == arguments

    def no_default_plasma():
        raise AssertionError("the reopened box must not need a MeanPlasma")

    monkeypatch.setattr(boxes_meanings, "_default_plasma", no_default_plasma)
    again = load_box(**arguments)
    assert again.comoving_scale == box.comoving_scale
    assert again.box_size_cMpc == pytest.approx(box.box_size_cMpc, rel=1e-15)
    assert again.checksum == box.checksum and again.checksum.startswith("sha256:")
    np.testing.assert_array_equal(again.data, box.data)
    # The mean of an overdensity box with mean 1 is nbar_e (astropy n_H0, PHYSICS.md section 5).
    mean_comoving = box.describe()["mean_comoving_density_cm3"]
    assert mean_comoving == pytest.approx(box.data.mean(dtype=np.float64) * mean_electron_density(1.5) / 2.5**3)


def test_in_memory_checksum_is_the_sha256_of_the_float32_bytes():
    import hashlib

    values = field(seed=8).astype(np.float32)
    box = Box.from_array(values, "10 cMpc", 0.0)
    assert box.checksum == "sha256:" + hashlib.sha256(values.tobytes()).hexdigest()
    assert box.data is not values and not box.data.flags.writeable


# -- bad input ---------------------------------------------------------------------------------
def _error(call, *args, **kwargs):
    with pytest.raises(InputError) as caught:
        call(*args, **kwargs)
    return str(caught.value)


def test_missing_file_and_not_hdf5(tmp_path):
    assert "file not found" in _error(load_box, tmp_path / "absent.h5")
    text = tmp_path / "notes.h5"
    text.write_text("not a box")
    message = _error(load_box, text)
    assert "notes.h5" in message and "not an HDF5 file" in message
    assert "folder" in _error(load_box, tmp_path)


def test_dataset_missing_lists_the_3d_datasets(tmp_path):
    path = write(tmp_path / "b.h5", np.ones((4, 4, 4)), "gas/ne", attrs=dict(STANDARD, quantity="n_e_comoving"))
    write(path, np.ones((4, 4)), "gas/map")
    message = _error(load_box, path, dataset="/gas/rho")
    assert "b.h5" in message and "'/gas/rho'" in message and "/gas/ne (4, 4, 4)" in message
    assert "/gas/map" not in message
    write(path, np.ones((4, 4, 4)), "gas/temperature")
    message = _error(load_box, path)
    assert "several 3-D datasets" in message and "/gas/temperature" in message and "--dataset" in message
    assert "group" in _error(load_box, path, dataset="gas")


def test_no_3d_dataset(tmp_path):
    path = write(tmp_path / "b.h5", np.ones((4, 4)), "flat")
    message = _error(load_box, path)
    assert "no 3-D dataset" in message and "/flat (4, 4)" in message


@pytest.mark.parametrize(
    "shape, expected", [((4, 4), "2-D"), ((4, 4, 4, 4), "4-D"), ((8, 8, 4), "not cubic"), ((1, 1, 1), "at least 2")]
)
def test_shape_must_be_a_cube(tmp_path, shape, expected):
    path = write(tmp_path / "b.h5", np.ones(shape), "rho", attrs=dict(STANDARD, quantity="n_e_comoving"))
    message = _error(load_box, path, dataset="rho")
    assert expected in message and "b.h5" in message and "/rho" in message


def test_not_finite_negative_and_all_zero_values(tmp_path):
    attrs = dict(STANDARD, quantity="n_e_comoving")
    values = np.ones((8, 8, 8))
    values[0, 0, :3] = np.nan
    values[1, 1, :2] = np.inf
    message = _error(load_box, write(tmp_path / "a.h5", values, attrs=attrs))
    assert "5 of 512" in message and "NaN or inf" in message and "a.h5, dataset /density" in message
    values = np.ones((8, 8, 8))
    values[2, 2, :4] = -1.0
    message = _error(load_box, write(tmp_path / "b.h5", values, attrs=attrs))
    assert "4 of 512" in message and "negative" in message and "b.h5" in message
    message = _error(load_box, write(tmp_path / "c.h5", np.zeros((8, 8, 8)), attrs=attrs))
    assert "every value is zero" in message and "c.h5" in message
    # float64 beyond float32's range becomes inf and is reported, not silently kept.
    values = np.ones((8, 8, 8))
    values[0, 0, 0] = 1e300
    assert "1 of 512" in _error(load_box, write(tmp_path / "d.h5", values, attrs=attrs))
    assert "NaN or inf" in _error(Box.from_array, np.full((4, 4, 4), np.nan), "1 cMpc", 0.0)


def test_non_numeric_values(tmp_path):
    path = write(tmp_path / "b.h5", np.ones((4, 4, 4), dtype=bool), attrs=dict(STANDARD, quantity="n_e_comoving"))
    assert "float or integer" in _error(load_box, path)


@pytest.mark.parametrize(
    "missing, flag",
    [("redshift", "--redshift"), ("box_size", "--box-size"), ("quantity", "--quantity")],
)
def test_missing_information_names_the_flag(tmp_path, missing, flag):
    attrs = dict(STANDARD, quantity="n_e_comoving")
    del attrs[missing]
    message = _error(load_box, write(tmp_path / "b.h5", np.ones((4, 4, 4)), attrs=attrs))
    assert flag in message and "b.h5" in message and "/density" in message


def test_missing_unit_h_and_ionised_fraction(tmp_path):
    attrs = dict(STANDARD, quantity="n_e_comoving")
    del attrs["box_size_unit"]
    assert "box_size_unit" in _error(load_box, write(tmp_path / "a.h5", np.ones((4, 4, 4)), attrs=attrs))
    attrs = dict(STANDARD, quantity="n_e_comoving")
    del attrs["hubble_h"]
    assert "--hubble-h" in _error(load_box, write(tmp_path / "b.h5", np.ones((4, 4, 4)), attrs=attrs))
    attrs = dict(STANDARD, quantity="gas_overdensity")
    path = write(tmp_path / "c.h5", np.ones((4, 4, 4)), attrs=attrs)
    assert "--ionised-fraction" in _error(load_box, path)
    assert "electrons per hydrogen" in _error(load_box, path, ionised_fraction=3.0)
    assert "no ionised-fraction dataset" in _error(load_box, path, ionised_fraction="/x_e")
    attrs = dict(STANDARD, quantity="overdensity")
    path = write(tmp_path / "d.h5", np.ones((4, 4, 4)), attrs=attrs)
    assert "gas quantities" in _error(load_box, path, ionised_fraction=1.0)


@pytest.mark.parametrize(
    "given, expected",
    [
        ("100", "no unit"),
        ("100 parsecs", "cannot read the unit"),
        ("100 Mpc/hr", "cannot read the unit"),
        ("100 mpc", "cannot read the unit"),
        ("ten Mpc", "cannot read"),
        ("10 cMpc physical", "both comoving and physical"),
        ("10 h^-1 Mpc/h", "twice"),
        ("-5 cMpc", "positive"),
        (100.0, "expected a length with its unit"),
        (5 * u.s, "not a length"),
    ],
)
def test_box_size_not_understood(given, expected):
    message = _error(Box.from_array, np.ones((4, 4, 4)), given, 0.0, hubble_h=H_SIM)
    assert expected in message


def test_bad_attributes(tmp_path):
    attrs = dict(STANDARD, quantity="n_e_comoving", box_size_unit="furlongs")
    message = _error(load_box, write(tmp_path / "a.h5", np.ones((4, 4, 4)), attrs=attrs))
    assert "box_size_unit" in message and "furlongs" in message and "a.h5" in message
    attrs = dict(STANDARD, quantity="electrons")
    message = _error(load_box, write(tmp_path / "b.h5", np.ones((4, 4, 4)), attrs=attrs))
    assert "'electrons'" in message and "n_e_physical" in message
    attrs = dict(STANDARD, quantity="n_e_comoving", redshift=-1.0)
    assert "redshift" in _error(load_box, write(tmp_path / "c.h5", np.ones((4, 4, 4)), attrs=attrs))


# -- series --------------------------------------------------------------------------------------
def _boxes(redshifts, n=4, size="10 cMpc"):
    return [Box.from_array(np.full((n, n, n), 1.0 + i), size, z) for i, z in enumerate(redshifts)]


def test_series_sorts_and_serves_the_nearest_snapshot():
    zs = [3.0, 0.0, 1.0, 6.0, 0.5]
    series = BoxSeries(_boxes(zs))
    np.testing.assert_array_equal(series.redshifts, sorted(zs))
    assert series.z_max == 6.0 and series.z_min == 0.0 and len(series) == 5
    z = np.random.default_rng(9).uniform(0.0, 8.0, 500)
    low, high, weight = series.serving(z)
    # Reference: brute-force nearest snapshot in redshift (issue 3 item 2).
    nearest = np.argmin(np.abs(z[:, None] - series.redshifts[None, :]), axis=1)
    np.testing.assert_array_equal(low, nearest)
    np.testing.assert_array_equal(high, nearest)
    assert np.all(weight == 0)


def test_intervals_cover_zero_to_z_stop_with_midpoint_boundaries():
    series = BoxSeries(_boxes([0.0, 1.0, 2.0, 4.0]))
    pieces = series.intervals(3.5)
    assert [p[2] for p in pieces] == [0, 1, 2, 3]
    np.testing.assert_allclose([p[0] for p in pieces], [0.0, 0.5, 1.5, 3.0])
    np.testing.assert_allclose([p[1] for p in pieces], [0.5, 1.5, 3.0, 3.5])
    for start, end, index in pieces:
        middle = 0.5 * (start + end)
        assert index == np.argmin(np.abs(series.redshifts - middle))
    assert [p[2] for p in series.intervals(0.4)] == [0]
    assert "positive" in _error(series.intervals, 0.0)


def test_blend_is_log_linear_in_density_between_bracketing_snapshots():
    zs = [0.0, 1.0, 3.0]
    series = BoxSeries(_boxes(zs), blend=True)
    z = np.random.default_rng(10).uniform(0.0, 4.0, 200)
    low, high, weight = series.serving(z)
    ln_values = np.log([box.data[0, 0, 0] for box in series])
    blended = (1.0 - weight) * ln_values[low] + weight * ln_values[high]
    # Reference: numpy's linear interpolation of ln n in z, constant beyond the last snapshot.
    np.testing.assert_allclose(blended, np.interp(z, zs, ln_values), rtol=1e-12)
    assert np.all(high - low == 1)


def test_blend_needs_a_shared_grid_but_nearest_does_not():
    mixed = _boxes([0.0], n=4, size="10 cMpc") + _boxes([1.0], n=8, size="10 cMpc")
    assert len(BoxSeries(mixed)) == 2
    message = _error(BoxSeries, mixed, blend=True)
    assert "--blend" in message and "4^3" in message and "8^3" in message
    resized = _boxes([0.0], size="10 cMpc") + _boxes([1.0], size="20 cMpc")
    assert "share" in _error(BoxSeries, resized, blend=True)


def test_series_rejects_duplicates_and_non_boxes_and_accepts_lists():
    assert "same redshift" in _error(BoxSeries, _boxes([1.0, 1.0]))
    assert "at least one" in _error(BoxSeries, [])
    assert "Box objects" in _error(BoxSeries, [1, 2])
    boxes = _boxes([0.0, 2.0])
    series = as_series(boxes)
    assert as_series(series) is series
    assert len(as_series(tuple(boxes))) == 2 and len(as_series(boxes[0])) == 1
    assert "BoxSeries" in _error(as_series, "cubes_demo/*.h5")
    again = pickle.loads(pickle.dumps(series))
    np.testing.assert_array_equal(again.redshifts, series.redshifts)
    assert again.checksums == series.checksums
    with pytest.raises(AttributeError):
        series.blend = True


def test_load_series_from_a_glob_a_list_and_one_file(tmp_path):
    for z in (2.0, 0.0, 1.0):
        attrs = dict(STANDARD, quantity="n_e_comoving", redshift=z)
        write(tmp_path / f"snap_{z:g}.h5", field(8, seed=int(z)), attrs=attrs)
    from_glob = load_series(str(tmp_path / "snap_*.h5"))
    np.testing.assert_array_equal(from_glob.redshifts, [0.0, 1.0, 2.0])
    from_list = load_series([tmp_path / "snap_1.h5", tmp_path / "snap_0.h5"])
    assert from_list.checksums == (from_glob.checksums[0], from_glob.checksums[1])

    one = tmp_path / "one.h5"
    for z in (0.5, 3.0):
        write(one, field(8, seed=7), f"z{z:g}", attrs={"redshift": z}, root=dict(STANDARD, quantity="n_e_comoving"))
    series = load_series(one)
    assert [box.dataset for box in series] == ["/z0.5", "/z3"]
    np.testing.assert_array_equal(series.redshifts, [0.5, 3.0])
    assert series.describe()["serving"][0] == {"z_start": 0.0, "z_end": 1.75, "box": 0}

    bare = tmp_path / "bare"
    bare.mkdir()
    for name in ("a", "b"):
        write(bare / f"{name}.h5", field(8), attrs={"box_size": 50.0, "box_size_unit": "cMpc"})
    series = load_series([bare / "a.h5", bare / "b.h5"], quantity="n_e_comoving", redshift=[4.0, 0.2])
    assert [box.path.name for box in series] == ["b.h5", "a.h5"]
    assert "2 values for 3 boxes" in _error(load_series, str(tmp_path / "snap_*.h5"), redshift=[1.0, 2.0])
    assert "matches no file" in _error(load_series, str(tmp_path / "nothing_*.h5"))


# -- statistics --------------------------------------------------------------------------------------
def test_statistics_of_a_log_normal_box(plasma):
    sigma, z = 0.5, 0.5
    overdensity = np.random.default_rng(11).lognormal(-0.5 * sigma**2, sigma, size=(32, 32, 32))
    box = Box.from_array(overdensity, "100 cMpc/h", z, "overdensity", plasma=plasma, hubble_h=H_SIM)
    result = box.statistics(plasma)
    assert result["mean_electron_density_cm3"] == pytest.approx(mean_electron_density(z), rel=1e-6)
    stored = overdensity.astype(np.float32)
    # numpy as the reference for the percentiles of the cells.
    for p, value in result["percentiles"].items():
        assert value == pytest.approx(np.percentile(stored, p), rel=1e-5)
    assert result["mean_overdensity"] == pytest.approx(stored.mean(dtype=np.float64), rel=1e-6)
    # scipy's log-normal quantiles: 32768 cells pin the 16/50/84 % quantiles to about 1 %.
    reference = stats.lognorm(s=sigma, scale=np.exp(-0.5 * sigma**2))
    for p in (16.0, 50.0, 84.0):
        assert result["percentiles"][p] == pytest.approx(reference.ppf(p / 100), rel=0.03)
    # m_gamma = sqrt(4 pi alpha n_e / m_e) (PHYSICS.md section 1; the NRL Plasma Formulary's 8.98 kHz
    # sqrt(n_e) is its 3-digit check), from the exact CODATA constants (tests/reference_tracer.py).
    per_root_density = ROOT_PLASMA_MASS
    masses = result["plasma_mass_eV"]
    n_e = stored.astype(np.float64) * mean_electron_density(z)
    assert masses["mean_density"] == pytest.approx(per_root_density * np.sqrt(mean_electron_density(z)), rel=MASS_RTOL, abs=0)
    assert masses["lowest_cell"] == pytest.approx(per_root_density * np.sqrt(n_e.min()), rel=MASS_RTOL, abs=0)
    assert masses["highest_cell"] == pytest.approx(per_root_density * np.sqrt(n_e.max()), rel=MASS_RTOL, abs=0)
    sampled = box.statistics(plasma, max_cells=8192)
    assert sampled["percentile_cells"] == 8192
    assert sampled["percentiles"][50.0] == pytest.approx(result["percentiles"][50.0], rel=0.05)


def test_plasma_mass_range_scales_as_the_three_halves_power_of_one_plus_z():
    values = np.ones((4, 4, 4))
    values[0, 0, 0] = 0.0
    values[1, 1, 1] = 9.0
    box = Box.from_array(values * 1e-7, "10 cMpc", 1.0, "n_e_comoving")
    low, high = box.plasma_mass_range(0.5, 3.0)
    # n_e physical = comoving (1+z)^3 (PHYSICS.md section 3); m = sqrt(4 pi alpha n_e / m_e) (section 1),
    # exact CODATA constants (tests/reference_tracer.py).
    per_root_density = ROOT_PLASMA_MASS
    stored = (values * 1e-7).astype(np.float32).astype(np.float64)  # as the box holds them
    assert low == pytest.approx(per_root_density * np.sqrt(stored[0, 0, 1] * 1.5**3), rel=MASS_RTOL, abs=0)
    assert high == pytest.approx(per_root_density * np.sqrt(stored[1, 1, 1] * 4.0**3), rel=MASS_RTOL, abs=0)
    assert box.statistics(MeanPlasma(Planck18, IonisationHistory.constant(1.0)))["zero_cells"] == 1

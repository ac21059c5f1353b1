"""Bad input meets only raytrace's own error type (issue 7 item 3).

Property-based tests (hypothesis, derandomized, fixed example counts) feed random
TOML run files, random bytes and random small HDF5 files to the run-file parser and
the box loader; a handful of bad command lines per subcommand go through
raytrace.cli.main. The reference is the error contract of raytrace.core.errors and the
CLI: user input either works or raises InputError naming the file, dataset, key or
flag, and the CLI turns that into one line and exit status 2 (argparse's own
errors: its usage, then one error line, exit status 2).
"""

import argparse
import math
import tempfile
from datetime import date
from pathlib import Path

import h5py
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

try:
    import tomllib
except ModuleNotFoundError:  # Python 3.10, as raytrace.cli.runfile
    import tomli as tomllib

import raytrace.cli as cli
from raytrace.boxes import QUANTITIES, Box, load_box, load_series
from raytrace.cli.runfile import SIGHTLINE_OPTIONS, NumberOrText, add_flags, read_run_file
from raytrace.cli.runfile import settings as run_settings
from raytrace.core.errors import InputError
from raytrace.physics.background import MeanPlasma
from raytrace.physics.ionisation import IonisationHistory

# Derandomized, no example database: every run, here or in CI, tries the same examples.
FUZZ = settings(max_examples=150, deadline=None, derandomize=True, database=None,
                suppress_health_check=[HealthCheck.too_slow])
KNOWN = {option.key: option for option in SIGHTLINE_OPTIONS}
SECTIONS = sorted({key.split(".")[0] for key in KNOWN})
# A constant ionisation history: the loader's overdensity and gas conversions without CAMB's start-up cost.
PLASMA = MeanPlasma(None, IonisationHistory.constant(1.08))


# -- random TOML documents -----------------------------------------------------------------------
def toml_string(text):
    """A TOML basic string; the characters TOML forbids raw (TOML 1.0, "String") as \\u escapes."""
    return '"' + "".join(
        f"\\u{ord(c):04x}" if c in '"\\' or ord(c) < 0x20 or ord(c) == 0x7F else c for c in text
    ) + '"'


def toml_value(value):
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, float):
        return "nan" if math.isnan(value) else ("inf" if value > 0 else "-inf") if math.isinf(value) else repr(value)
    if isinstance(value, str):
        return toml_string(value)
    if isinstance(value, list):
        return "[" + ", ".join(toml_value(v) for v in value) + "]"
    if isinstance(value, dict):
        return "{" + ", ".join(f"{toml_string(k)} = {toml_value(v)}" for k, v in value.items()) + "}"
    return value.isoformat() if isinstance(value, date) else str(value)


def toml_document(document):
    # TOML needs the root's plain keys before the first [table] header.
    lines = [f"{toml_string(k)} = {toml_value(v)}" for k, v in document.items() if not isinstance(v, dict)]
    for section, table in document.items():
        if isinstance(table, dict):
            lines.append(f"[{toml_string(section)}]")
            lines += [f"{toml_string(k)} = {toml_value(v)}" for k, v in table.items()]
    return "\n".join(lines) + "\n"


scalars = st.one_of(
    st.text(max_size=8),
    # Text that reads as a number, a length or nothing: the conversions' edge cases.
    st.sampled_from(["12", "1.5", "1e400", "nan", "-3", "", "100 Mpc/h", "boxes/*.h5"]),
    st.integers(min_value=-(2**63), max_value=2**63 - 1),
    st.floats(allow_nan=True, allow_infinity=True),
    st.sampled_from([0, 1, -1, 0.0, 1e-300, 1e300, 2.5]),
    st.booleans(),
    st.dates(),
)
values = st.recursive(
    scalars, lambda inner: st.lists(inner, max_size=3) | st.dictionaries(st.text(max_size=4), inner, max_size=3),
    max_leaves=6,
)


# Values of the kind each option states (bounds and non-finite floats not respected): so that
# documents get past the type checks to the range checks.
of_kind = {
    int: st.integers(min_value=-(2**63), max_value=2**63 - 1),
    float: st.floats(allow_nan=True, allow_infinity=True) | st.integers(-10, 10),
    str: st.text(max_size=8),
    NumberOrText: st.floats(allow_nan=True, allow_infinity=True) | st.text(max_size=8),
    bool: st.booleans(),
    list: st.lists(st.text(max_size=8), max_size=3) | st.text(max_size=8),
}
DOCUMENT_FAULTS = ("unknown section", "unknown key", "section not a table", "value of any type")


@st.composite
def run_documents(draw):
    """Known sections and keys with values of their kind, plus none, some or all of
    DOCUMENT_FAULTS, so that every check is reached, not only the first one a random
    document fails."""
    faults = draw(st.sets(st.sampled_from(DOCUMENT_FAULTS)))
    document = {}
    for _ in range(draw(st.integers(1, 4))):
        section = draw(st.sampled_from(SECTIONS))
        in_section = [option for option in SIGHTLINE_OPTIONS if option.key.startswith(section + ".")]
        if "unknown section" in faults and draw(st.booleans()):
            section = draw(st.text(max_size=6))
        if "section not a table" in faults and draw(st.booleans()):
            document[section] = draw(values)
            continue
        table = document.get(section)
        if not isinstance(table, dict):
            table = document[section] = {}
        for _ in range(draw(st.integers(1, 3))):
            option = draw(st.sampled_from(in_section))
            name = option.key.split(".", 1)[1]
            if "unknown key" in faults and draw(st.booleans()):
                name = draw(st.text(max_size=6))
            typed = "value of any type" in faults and draw(st.booleans())
            single = of_kind[option.kind]
            if option.listable:
                single = single | st.lists(single, max_size=3)
            table[name] = draw(values if typed else single)
    return document


def write_toml(folder, document):
    text = toml_document(document)
    # The generator must write valid TOML (tomllib is the reference), or only the decoder would be tested.
    tomllib.loads(text)
    path = Path(folder) / "run.toml"
    path.write_text(text, encoding="utf-8")
    return path


def sightline_parser():
    parser = argparse.ArgumentParser(prog="raytrace sightlines")
    add_flags(parser, SIGHTLINE_OPTIONS)
    return parser


def assert_matches_schema(found):
    """Accepted values have the kind the schema states (SIGHTLINE_OPTIONS is data, the reference)."""
    for key, value in found.items():
        option = KNOWN[key]
        if value is None:
            continue
        if option.listable and isinstance(value, list):
            assert len(value) > 1
            for item in value:
                assert_matches_schema({key: item})
            continue
        if option.choices:
            assert value in option.choices
        if option.kind is NumberOrText:
            assert (isinstance(value, float) and math.isfinite(value)) or (isinstance(value, str) and value)
        elif option.kind is list and option.numbers:
            assert isinstance(value, list) and value and all(isinstance(v, float) and math.isfinite(v) for v in value)
        elif option.kind is list:
            assert isinstance(value, list) and value and all(isinstance(v, str) for v in value)
        elif option.kind is float:
            assert isinstance(value, float) and math.isfinite(value)
        else:
            assert type(value) is option.kind, (key, value)


@FUZZ
@given(run_documents())
def test_random_run_files_give_settings_or_an_input_error_naming_the_file(document):
    with tempfile.TemporaryDirectory() as folder:
        path = write_toml(folder, document)
        try:
            found = read_run_file(path, SIGHTLINE_OPTIONS)
        except InputError as error:
            # Contract: every run-file error names the file first.
            assert str(error).startswith(f"{path}: ")
        else:
            assert set(found) <= set(KNOWN)
            assert_matches_schema(found)


@FUZZ
@given(run_documents())
def test_random_run_files_through_settings_name_the_file_or_the_key(document):
    with tempfile.TemporaryDirectory() as folder:
        path = write_toml(folder, document)
        try:
            found = run_settings(sightline_parser().parse_args([str(path)]), SIGHTLINE_OPTIONS)
        except InputError as error:
            # Contract: the message names the file, or (a range check) the key.
            message = str(error)
            assert str(path) in message or any(key in message for key in KNOWN), message
        else:
            assert set(found) == set(KNOWN)
            assert_matches_schema(found)
            for key, value in found.items():
                option = KNOWN[key]
                # The schema's bounds (at_least inclusive, above exclusive) hold for what is accepted: for a
                # listable option given a list (edges), for each of its values.
                for each in (value if option.listable and isinstance(value, list) else [value]):
                    if each is not None and option.at_least is not None:
                        assert each >= option.at_least
                    if each is not None and option.above is not None:
                        assert each > option.above


flag_options = [option for option in SIGHTLINE_OPTIONS if option.kind is not bool]


@FUZZ
@given(st.sampled_from(flag_options), st.text(max_size=8) | st.sampled_from(["nan", "-inf", "1e999", "0", "-2", "1.5"]))
def test_random_flag_values_give_settings_or_an_input_error_naming_the_flag(option, text):
    # "--flag=value" keeps argparse from reading a value that starts with '-' as another option.
    args = sightline_parser().parse_args([f"{option.flag}={text}"])
    try:
        found = run_settings(args, SIGHTLINE_OPTIONS)
    except InputError as error:
        # Contract: a bad flag value names the flag (a range check names its key and flag).
        assert option.flag in str(error), str(error)
    else:
        assert_matches_schema(found)


@FUZZ
@given(st.binary(max_size=64))
def test_random_bytes_as_a_run_file_give_an_input_error_naming_the_file(content):
    with tempfile.TemporaryDirectory() as folder:
        path = Path(folder) / "run.toml"
        path.write_bytes(content)
        try:
            found = read_run_file(path, SIGHTLINE_OPTIONS)
        except InputError as error:
            assert str(error).startswith(f"{path}: ")
        else:
            assert_matches_schema(found)


# -- random small HDF5 files ------------------------------------------------------------------------
USABLE_DTYPES = ["<f4", ">f4", "<f8", "<f2", "<i1", ">i8", "<u2"]
DTYPES = USABLE_DTYPES + ["bool", "S4", "str", "compound", "<c8"]
USABLE_FILLS = ["lognormal", "tiny", "one zero slab"]
FILLS = USABLE_FILLS + ["zeros", "nan", "inf", "negative", "huge"]
USABLE_SHAPES = [(4, 4, 4), (3, 3, 3), (2, 2, 2)]
ASPECTS = ("dtype", "shape", "fill", "attributes", "extra")

shapes = st.one_of(
    st.integers(0, 4).map(lambda n: (n, n, n)),
    st.lists(st.integers(0, 4), min_size=0, max_size=4).map(tuple),
)
bad_attribute_values = st.one_of(
    st.text(st.characters(exclude_characters="\x00", exclude_categories=["Cs"]), max_size=6),  # HDF5 strings end at NUL
    st.floats(allow_nan=True, allow_infinity=True),
    st.integers(-5, 5),
    st.sampled_from([b"bytes", "", "Mpc", np.array([1.0, 2.0]), np.array([], dtype=float), np.bool_(True),
                     np.array([b"cMpc", b"Mpc"]), h5py.Empty("f4"), -1.0, np.nan]),
)
good_attribute_values = {
    "quantity": st.sampled_from(sorted(QUANTITIES)),
    "redshift": st.sampled_from([0.0, 0.5, 3.0]),
    "box_size": st.sampled_from([10.0, 100.0]),
    "box_size_unit": st.sampled_from(["cMpc", "cMpc/h", "pkpc"]),
    "hubble_h": st.just(0.6766),
    "ionised_fraction": st.sampled_from([1.0, 1.08]),
    "ionised_fraction_dataset": st.sampled_from(["x_e", "/density", "missing"]),
}


@st.composite
def box_files(draw):
    """A usable box file with none, some or all of its aspects drawn at random instead,
    so that every check is reached, not only the first one a random file fails."""
    randomised = draw(st.sets(st.sampled_from(ASPECTS)))
    attributes = {}
    for key, good in good_attribute_values.items():
        choice = draw(st.sampled_from(["good", "missing", "bad"])) if "attributes" in randomised else "good"
        if choice != "missing":
            value = draw(good if choice == "good" else bad_attribute_values)
            attributes[key] = (value, draw(st.sampled_from(["dataset", "root"])))
    return {
        "dtype": draw(st.sampled_from(DTYPES if "dtype" in randomised else USABLE_DTYPES)),
        "shape": draw(shapes if "shape" in randomised else st.sampled_from(USABLE_SHAPES)),
        "fill": draw(st.sampled_from(FILLS if "fill" in randomised else USABLE_FILLS)),
        "seed": draw(st.integers(0, 2**16)),
        "name": draw(st.sampled_from(["density", "gas/n_e"])),
        "attributes": attributes,
        # x_e: an ionised-fraction dataset of random shape; snapshot: a second box with its own redshift.
        "extra": draw(st.sampled_from(["x_e", "snapshot", "flat map"])) if "extra" in randomised else None,
        "x_e_shape": draw(shapes),
    }


def fill_values(fill, shape, seed):
    rng = np.random.default_rng(seed)
    values = rng.lognormal(0.0, 1.0, shape)
    flat = values.reshape(-1)
    if fill == "zeros":
        values[...] = 0.0
    elif fill in ("nan", "inf", "negative") and flat.size:
        flat[rng.integers(0, flat.size)] = {"nan": np.nan, "inf": np.inf, "negative": -1.0}[fill]
    elif fill == "huge":
        values *= 1e39  # beyond float32's range for the larger cells
    elif fill == "tiny":
        values *= 1e-42  # float32 subnormals
    elif fill == "one zero slab" and values.ndim:
        values[: max(1, values.shape[0] // 2)] = 0.0
    return values


def typed(values, dtype):
    if dtype == "bool":
        return values > 1.0
    if dtype == "S4":
        return np.full(values.shape, b"1.0", dtype="S4")
    if dtype == "str":
        return np.full(values.shape, "1.0", dtype=h5py.string_dtype())
    if dtype == "compound":
        out = np.zeros(values.shape, dtype=[("n_e", "<f4"), ("flag", "<i4")])
        out["n_e"] = values
        return out
    if np.dtype(dtype).kind in "iu":
        # Integer boxes: the values scaled into range; NaN (as 0) and inf (as the bound) cannot be stored.
        return np.nan_to_num(np.clip(values * 10, max(np.iinfo(dtype).min, -100), 100)).astype(dtype)
    return values.astype(dtype)


def write_box_file(folder, spec):
    path = Path(folder) / "box.h5"
    with h5py.File(path, "w") as handle:
        with np.errstate(over="ignore"):  # "huge" overflows the 16- and 32-bit floats on purpose
            data = typed(fill_values(spec["fill"], spec["shape"], spec["seed"]), spec["dtype"])
        node = handle.create_dataset(spec["name"], data=data)
        for key, (value, owner) in spec["attributes"].items():
            (node if owner == "dataset" else handle).attrs[key] = value
        if spec["extra"] == "x_e":
            handle["x_e"] = np.random.default_rng(spec["seed"]).uniform(0.0, 1.3, spec["x_e_shape"])
        elif spec["extra"] == "snapshot":
            other = handle.create_dataset("later", data=fill_values("lognormal", spec["shape"], spec["seed"] + 1))
            other.attrs["redshift"] = 1.0
        elif spec["extra"] == "flat map":
            handle["map"] = np.ones((4, 4))
    return path


def assert_usable(box):
    """A box the loader accepts holds finite, non-negative densities (numpy's isfinite the reference)."""
    assert isinstance(box, Box)
    data = np.asarray(box.data)
    assert data.dtype == np.float32 and data.ndim == 3
    assert np.all(np.isfinite(data)) and np.all(data >= 0) and np.any(data > 0)
    assert math.isfinite(box.comoving_scale) and box.comoving_scale > 0
    assert math.isfinite(box.box_size_cMpc) and box.box_size_cMpc > 0
    low, high = box.plasma_mass_range()
    assert np.isfinite([low, high]).all() and 0 < low <= high


# Random boxes are far from cosmic densities by design: the plausibility warning is not the subject.
@pytest.mark.filterwarnings("ignore::raytrace.boxes.meanings.PlausibilityWarning")
@FUZZ
@given(box_files())
def test_random_box_files_give_a_usable_box_or_an_input_error_naming_the_file(spec):
    with tempfile.TemporaryDirectory() as folder:
        path = write_box_file(folder, spec)
        try:
            box = load_box(path, plasma=PLASMA)
        except InputError as error:
            assert str(path) in str(error), str(error)
        else:
            assert_usable(box)
        try:
            series = load_series(str(Path(folder) / "*.h5"), plasma=PLASMA)
        except InputError as error:
            assert str(path) in str(error), str(error)
        else:
            for box in series:
                assert_usable(box)


@pytest.mark.filterwarnings("ignore::raytrace.boxes.meanings.PlausibilityWarning")  # random boxes, as above
@FUZZ
# "\udcff": what Python makes of a --dataset argument whose bytes are not UTF-8 (surrogateescape).
@given(box_files(), st.text(max_size=8) | st.sampled_from(["/", ".", "gas", "//density", "map", "\udcff"]))
def test_a_random_dataset_argument_gives_a_box_or_an_input_error_naming_the_file(spec, dataset):
    with tempfile.TemporaryDirectory() as folder:
        path = write_box_file(folder, spec)
        try:
            box = load_box(path, dataset=dataset, plasma=PLASMA)
        except InputError as error:
            assert str(path) in str(error), str(error)
        else:
            assert_usable(box)


# -- the command line, end to end ---------------------------------------------------------------------
@pytest.fixture(scope="module")
def files(tmp_path_factory):
    """Placeholders of the command lines below: good and bad input files."""
    folder = tmp_path_factory.mktemp("cli")
    with h5py.File(folder / "box.h5", "w") as handle:
        density = np.random.default_rng(0).lognormal(0.0, 1.0, (8, 8, 8)) * 2.2e-7
        handle.create_dataset("density", data=density.astype(np.float32)).attrs.update(
            quantity="n_e_comoving", redshift=0.0, box_size=50.0, box_size_unit="cMpc")
    with h5py.File(folder / "particles.h5", "w") as handle:
        handle["pos"] = np.random.default_rng(1).uniform(0.0, 10.0, (100, 3))
        handle["mass"] = np.ones(100)
    (folder / "text.txt").write_text("not a table\n")
    (folder / "sub").mkdir()
    # Masses inside what the box probes, so that no warning line joins the error line.
    (folder / "good.toml").write_text(
        '[boxes]\nfiles = ["box.h5"]\n[masses]\nmin_eV = 1e-14\nmax_eV = 5e-14\ncount = 3\n'
        "[rays]\ncount = 2\nz_max = 0.5\ninclude_background = false\n")
    (folder / "bad.toml").write_text("[rays\ncount = 2\n")
    (folder / "unknown.toml").write_text("[rays]\ncolour = 3\n")
    (folder / "wrong.toml").write_text('[rays]\ncount = "many"\n')
    names = ["box.h5", "particles.h5", "text.txt", "sub", "good.toml", "bad.toml", "unknown.toml", "wrong.toml"]
    places = {name.split(".")[0]: str(folder / name) for name in names}
    places["folder"] = str(folder)
    return places


def grid_argv(particles="{particles}", **changed):
    flags = {"cells": "8", "output": "{folder}/out.h5", "positions": "pos", "position_unit": "cMpc",
             "box_size": "10 cMpc", "redshift": "0", "masses": "mass", "mass_unit": "Msun",
             "ionised_fraction": "1", **changed}
    options = [item for name, value in flags.items() for item in ("--" + name.replace("_", "-"), value)]
    return ["grid", particles, *options]


def case(argv, named):
    """A bad command line and what its error line must name (placeholders of ``files`` allowed)."""
    return pytest.param(argv, named, id=f"{argv[0]}: {named}")


# (command line, what the one error line must name)
BAD_COMMAND_LINES = [
    case(["background", "--mass-values", "1e-13", "--ionisation-table", "{folder}/missing.txt"], "{folder}/missing.txt"),
    case(["background", "--mass-values", "1e-13", "--ionisation-table", "{box}"], "{box}"),
    case(["background", "--mass-values", "1e-13", "--ionisation-table", "{sub}"], "{sub}"),
    case(["background", "--mass-values", "inf"], "--mass-values"),
    case(["background", "--mass-values", "1e-13", "--helium-fraction", "nan"], "--helium-fraction"),
    case(["background", "--mass-min", "1e-12", "--mass-max", "1e-14"], "--mass-min"),
    case(["inspect", "{folder}/missing.h5"], "{folder}/missing.h5"),
    case(["inspect", "{text}"], "{text}"),
    case(["inspect", "{sub}"], "{sub}"),
    case(["inspect", "{folder}/*.none"], "{folder}/*.none"),
    case(["inspect", "{box}", "--redshift", "a,b"], "--redshift"),
    case(["inspect", "{box}", "--hubble-h", "-1"], "--hubble-h"),
    case(["inspect", "{box}", "--hubble-h", "abc"], "--hubble-h"),
    case(["inspect", "{box}", "--ionised-fraction", "0.5"], "--ionised-fraction"),
    case(["inspect", "{box}", "--z-max", "1e9"], "--z-max"),
    case(["inspect", "{box}", "--z-max", "nan"], "--z-max"),
    case(grid_argv("{folder}/missing.h5"), "{folder}/missing.h5"),
    case(grid_argv("{text}"), "{text}"),
    case(grid_argv(cells="0"), "--cells"),
    case(grid_argv(positions="nothing"), "--positions"),
    case(grid_argv(positions="mass"), "--positions"),
    case(grid_argv(mass_unit="bananas"), "--mass-unit"),
    case(grid_argv(redshift="-1"), "--redshift"),
    case(grid_argv(output="{box}"), "{box}"),
    # A grid that cannot fit in memory is the options' doing: status 2, not an internal error.
    case(grid_argv(cells="100000"), "memory"),
    case(["sightlines", "{folder}/missing.toml"], "{folder}/missing.toml"),
    case(["sightlines", "{bad}"], "{bad}"),
    case(["sightlines", "{box}"], "{box}"),
    case(["sightlines", "{unknown}"], "'colour' in [rays]"),
    case(["sightlines", "{wrong}"], "rays.count"),
    case(["sightlines"], "--boxes"),
    case(["sightlines", "--boxes", "{folder}/missing.h5"], "{folder}/missing.h5"),
    case(["sightlines", "{good}", "--rays", "0"], "--rays"),
    case(["sightlines", "{good}", "--z-max", "nan"], "--z-max"),
    case(["sightlines", "{good}", "--mass-min", "-1"], "--mass-min"),
    case(["sightlines", "{good}", "--frequency", "3 kg"], "--frequency"),
    case(["sightlines", "{good}", "--dataset", "nothing"], "'nothing'"),
    case(["sightlines", "{good}", "--output", "{box}"], "{box}"),
    case(["sightlines", "{good}", "--resume", "--output", "{folder}/new.h5"], "{folder}/new.h5"),
    case(["sightlines", "{good}", "--step-cells", "0.5"], "--step-cells: no longer an option"),
    case(["sky", "{good}", "--step-cells", "0.5"], "--step-cells: no longer an option"),
    case(["sightlines", "{good}", "--photon-energy", "0"], "--photon-energy"),
    case(["sightlines", "{good}", "--jobs", "0"], "--jobs"),
    case(["sightlines", "{good}", "--plot", "{folder}/kernel.xyz"], "{folder}/kernel.xyz"),
    case(["limits", "--mass-values", "1e-13", "--confidence", "nan"], "--confidence"),
    case(["limits", "--mass-values", "1e-13", "--spectrum", "{folder}/missing.txt"], "{folder}/missing.txt"),
    case(["limits", "--mass-values", "1e-13", "--spectrum", "{box}"], "{box}"),
    case(["limits", "--mass-values", "1e-13", "--output", "{folder}/limits.txt"], "{folder}/limits.txt"),
    case(["limits", "--mass-values", "1e-13", "--output", "{box}"], "{box}"),
    case(["limits", "--mass-values", "1e-13", "--plot", "{folder}/limits.xyz"], "{folder}/limits.xyz"),
]


@pytest.mark.parametrize("argv", [grid_argv(output="{folder}/control.h5"), ["sightlines", "{good}"]],
                         ids=["grid", "sightlines"])
def test_the_good_command_lines_the_bad_ones_vary_succeed(files, capsys, argv):
    # The control for the cases below: each fails for what it changes, not for the rest.
    assert cli.main([item.format(**files) for item in argv]) == 0, capsys.readouterr().err


@pytest.mark.parametrize("argv, named", BAD_COMMAND_LINES)
def test_bad_input_on_the_command_line_is_one_line_and_status_2(files, capsys, argv, named):
    argv, named = [item.format(**files) for item in argv], named.format(**files)
    status = cli.main(argv)
    err = capsys.readouterr().err
    # The CLI's contract (raytrace.cli): status 2, one line "raytrace COMMAND: error: ..." naming the input.
    assert status == 2, err
    assert "Traceback" not in err
    lines = err.strip().splitlines()
    assert len(lines) == 1, err
    assert lines[0].startswith(f"raytrace {argv[0]}: error: ") and named in lines[0], lines[0]


@pytest.mark.parametrize("argv, flag", [
    (["background", "--mass-values", "1e-13", "--z-min", "abc"], "--z-min"),
    (["inspect", "{box}", "--z-max", "abc"], "--z-max"),
    (grid_argv(cells="many"), "--cells"),
    (["sightlines", "--rays"], "--rays"),
    (["limits", "--mass-values", "1e-13", "--confidence", "x"], "--confidence"),
])
def test_unparseable_flags_exit_2_naming_the_flag(files, capsys, argv, flag):
    # argparse's own errors (Python documentation): usage, then one error line naming the flag, status 2.
    with pytest.raises(SystemExit) as exit_info:
        cli.main([item.format(**files) for item in argv])
    err = capsys.readouterr().err
    assert exit_info.value.code == 2
    assert "Traceback" not in err and flag in err.strip().splitlines()[-1]

"""One vocabulary, outputs never lost, self-describing files (issue 13).

References: the run-file schema and the argparse parsers themselves (read, not
re-typed), h5py for the stored attributes, healpy.read_map and astropy.io.fits
for the FITS files (HEALPix FITS convention, Gorski et al. 2005), hashlib for the
boxes' SHA-256 checksums, numpy for the counts of resonating pixels.
"""

import argparse
import hashlib
import re
import warnings

import h5py
import numpy as np
import pytest
from astropy.io import fits
from conftest import write_lognormal_box

import raytrace.cli as cli
from raytrace.cli import runfile
from raytrace.core.errors import InputError
from raytrace.core.resultfiles import FORMAT_VERSION
from raytrace.report.plots import shown_mass_index
from raytrace.sky.maps import SkyResult
from raytrace.statistics.results import SightlineResult


def subcommand_parsers():
    parser = cli.build_parser()
    sub = next(action for action in parser._actions if isinstance(action, argparse._SubParsersAction))
    return sub.choices


def visible_options(parser):
    return [action for action in parser._actions
            if action.option_strings and action.help != argparse.SUPPRESS and action.dest != "help"]


def _flat(text):
    """Text without white space: argparse wraps help lines (also inside hyphenated words)."""
    return "".join(text.split())


# -- one vocabulary ------------------------------------------------------------------------------


def test_every_help_lists_the_default_of_every_option_that_has_one():
    schemas = {"sightlines": runfile.SIGHTLINE_OPTIONS, "sky": runfile.SKY_OPTIONS}
    for name, parser in subcommand_parsers().items():
        schema = {option.dest: option for option in schemas.get(name, ())}
        shown = _flat(parser.format_help())
        for action in visible_options(parser):
            # Run-file commands keep argparse's default None (the run file's value stands): the schema has it.
            default = schema[action.dest].default if action.dest in schema else action.default
            if default is None or default is False or (isinstance(default, (tuple, list)) and not default):
                continue
            assert "default" in action.help, f"raytrace {name} {action.option_strings[0]}: no default in its help"
            assert _flat(action.help) in shown
            # A schema default the help does not put in words is printed as a number.
            if (action.dest in schema and "default" not in schema[action.dest].help
                    and isinstance(default, (int, float)) and not isinstance(default, bool)):
                assert f"default: {default:g}" in action.help, (name, action.option_strings[0])


def test_one_flag_and_one_metavar_per_concept_in_every_subcommand():
    # The schema: one flag per key, no flag for two keys, no old spelling used as another concept's flag.
    flag_of = {}
    for key, option in runfile.VOCABULARY.items():
        flag_of.setdefault(option.flag, set()).add(key)
    assert all(len(keys) == 1 for keys in flag_of.values()), flag_of
    old_spellings = {alias for option in runfile.VOCABULARY.values() for alias in option.aliases}
    vocabulary_by_flag = {option.flag: option for option in runfile.VOCABULARY.values()}
    metavars = {}
    for name, parser in subcommand_parsers().items():
        for action in visible_options(parser):
            for flag in action.option_strings:
                if flag.startswith("--no-"):
                    continue
                # An old spelling is only ever a hidden alias ('--mass' is the shown mass, a concept of its own).
                assert flag not in old_spellings or vocabulary_by_flag.get(flag), (name, flag)
                metavars.setdefault(flag, set()).add(str(action.metavar))
                option = vocabulary_by_flag.get(flag)
                # Box options: the schema takes one value or a list per file ("Z[,Z...]") where grid, which
                # writes one box, takes one value ("Z"); same flag and concept, the list marks differ.
                if (option is not None and option.kind is not bool and not option.key.startswith("boxes.")
                        and flag != "--output"):
                    assert action.metavar == runfile._metavar(option), (name, flag, action.metavar)
    # --output's metavar names what each command writes: RESULT.h5, BOX.h5, a table FILE, a report STEM.
    box_flags = {option.flag for key, option in runfile.VOCABULARY.items() if key.startswith("boxes.")}
    assert all(len(spelled) == 1 for flag, spelled in metavars.items() if flag not in box_flags | {"--output"}), \
        {f: m for f, m in metavars.items() if len(m) > 1}
    # The spellings the issue found for one concept each: one survives, visible everywhere it applies.
    visible = {name: {flag for action in visible_options(parser) for flag in action.option_strings}
               for name, parser in subcommand_parsers().items()}
    for command in ("sightlines", "sky", "background", "limits"):
        assert {"--mass-min", "--mass-max", "--mass-count"} <= visible[command]
        assert "--mass-range" not in visible[command]
    for command in ("sky", "limits", "report"):
        assert "--isotropy-threshold" in visible[command] and "--threshold" not in visible[command]
    for command in ("sightlines", "sky"):
        assert "--batch-size" in visible[command] and "--batch-pixels" not in visible[command]


def test_helps_name_subcommands_not_python_functions():
    for name, parser in subcommand_parsers().items():
        text = parser.format_help()
        assert not re.search(r"raytrace\.[a-z_]+\.?[a-z_]*\(|raytrace\.cast_", text), name
    assert "raytracesky" in _flat(subcommand_parsers()["limits"].format_help())


@pytest.mark.parametrize("old, new", [(["--threshold", "2e-5"], ["--isotropy-threshold", "2e-5"]),
                                      (["--batch-pixels", "8"], ["--batch-size", "8"])])
def test_old_spellings_still_parse_with_a_deprecation_notice(capsys, old, new):
    parser = subcommand_parsers()["sky"]
    assert vars(parser.parse_args(old)) == vars(parser.parse_args(new))
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and old[0] in err[0] and "deprecated" in err[0] and new[0] in err[0]


def test_an_old_run_file_key_still_reads_with_a_notice(tmp_path, capsys):
    path = tmp_path / "old.toml"
    path.write_text("[sky]\nbatch_pixels = 32\n")
    values = runfile.read_run_file(path, runfile.SKY_OPTIONS)
    assert values["rays.batch_size"] == 32
    assert "sky.batch_pixels is deprecated" in capsys.readouterr().err


def test_an_empty_path_switches_a_run_files_output_off(tmp_path):
    path = tmp_path / "run.toml"
    path.write_text('[output]\nfits = "maps.fits"\nplot = "map.png"\n')
    args = subcommand_parsers()["sky"].parse_args([str(path), "--fits", ""])
    values = runfile.settings(args, runfile.SKY_OPTIONS)
    assert values["output.fits"] is None and values["output.plot"] == str(tmp_path / "map.png")


# -- small runs through the command line ---------------------------------------------------------


@pytest.fixture(scope="module")
def boxes(tmp_path_factory):
    """Two sets of two small log-normal boxes (different seeds: different bytes, different checksums)."""
    folder = tmp_path_factory.mktemp("boxes")
    sets = {}
    for name, seed in (("a", 1), ("b", 2)):
        rng = np.random.default_rng(seed)
        sets[name] = [str(write_lognormal_box(folder / f"{name}_z{z}.h5", z, rng)) for z in (0.0, 0.5)]
    return sets


COMMON = ["--z-max", "0.5", "--mass-min", "1e-14", "--mass-max", "1e-13", "--mass-count", "6"]


def run_cli(capsys, *argv):
    status = cli.main([str(item) for item in argv])
    captured = capsys.readouterr()
    return status, captured.out, captured.err


@pytest.fixture(scope="module")
def runs(boxes, tmp_path_factory):
    """A sightline run and a sky run on box set a, a sky run on box set b with another seed."""
    folder = tmp_path_factory.mktemp("runs")
    paths = {"lines": folder / "lines.h5", "sky": folder / "sky.h5", "fits": folder / "sky.fits",
             "png": folder / "sky.png", "other": folder / "other_sky.h5"}
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        assert cli.main(["sightlines", "--boxes", *boxes["a"], *COMMON, "--rays", "16",
                         "--output", str(paths["lines"])]) == 0
        assert cli.main(["sky", "--boxes", *boxes["a"], *COMMON, "--nside", "2", "--output", str(paths["sky"]),
                         "--fits", str(paths["fits"]), "--plot", str(paths["png"])]) == 0
        assert cli.main(["sky", "--boxes", *boxes["b"], *COMMON, "--nside", "2", "--seed", "7",
                         "--output", str(paths["other"])]) == 0
    return paths


def test_a_run_without_output_says_so_on_stderr(boxes, capsys):
    status, out, err = run_cli(capsys, "sightlines", "--boxes", *boxes["a"], *COMMON, "--rays", "4")
    assert status == 0 and "mean_K_eV" in out
    assert "no output file requested" in err and "--output" in err


def test_every_dataset_carries_a_unit_and_a_description_and_crossings_agree_in_dtype(runs):
    dtypes = {}
    for key in ("lines", "sky"):
        with h5py.File(runs[key], "r") as handle:
            assert handle.attrs["format_version"] == FORMAT_VERSION
            datasets = []
            handle.visititems(lambda name, item: datasets.append((name, item)) if isinstance(item, h5py.Dataset)
                              else None)
            assert "pdf_mean/kernel_boxes" in dict(datasets)  # groups' datasets too
            for name, dataset in datasets:
                assert isinstance(dataset.attrs.get("unit"), str), (key, name)
                assert len(dataset.attrs.get("description", "")) > 10, (key, name)
                assert "\n" not in dataset.attrs["description"]
            dtypes[key] = handle["crossings"].dtype
    assert dtypes["lines"] == dtypes["sky"]


def test_load_refuses_a_newer_format_version(runs, tmp_path):
    newer = tmp_path / "newer.h5"
    newer.write_bytes(runs["lines"].read_bytes())
    with h5py.File(newer, "a") as handle:
        handle.attrs["format_version"] = FORMAT_VERSION + 1
    with pytest.raises(InputError, match="format version"):
        SightlineResult.load(newer)


def test_fits_header_and_read_map_give_the_shown_mass(runs):
    sky = SkyResult.load(runs["sky"])
    shown = shown_mass_index(sky)
    header = fits.getheader(runs["fits"], 1)
    # A HEALPix map in the boxes' axes claims no celestial frame (COORDSYS is the celestial/galactic keyword).
    assert "COORDSYS" not in header and header["SKYFRAME"] == "box axes"
    assert "EPSILON" not in header and "OMEGA0" not in header  # no probability maps were asked for
    assert header["EXTNAME"] not in ("xtension", "")
    assert header["MASS1"] == pytest.approx(sky.mass_eV[shown], rel=1e-12)
    # healpy.read_map's default (field 0) is the map the run showed.
    import healpy

    np.testing.assert_array_equal(healpy.read_map(str(runs["fits"])), sky.kernel[:, shown])


def test_mass_flag_chooses_the_shown_mass(boxes, tmp_path, capsys):
    path = tmp_path / "chosen.fits"
    status, out, err = run_cli(capsys, "sky", "--boxes", *boxes["a"], *COMMON, "--nside", "2",
                               "--fits", path, "--mass", "2.1e-14")
    assert status == 0, err
    masses = np.geomspace(1e-14, 1e-13, 6)
    nearest = masses[np.argmin(np.abs(np.log(masses / 2.1e-14)))]
    assert fits.getheader(path, 1)["MASS1"] == pytest.approx(nearest, rel=1e-9)


def test_an_overwrite_that_would_replace_another_runs_files_refuses_and_leaves_them(boxes, runs, capsys):
    before = {key: runs[key].read_bytes() for key in ("fits", "png")}
    new_result = runs["sky"].with_name("rerun.h5")
    status, out, err = run_cli(capsys, "sky", "--boxes", *boxes["a"], *COMMON, "--nside", "2",
                               "--output", new_result, "--fits", runs["fits"], "--plot", runs["png"], "--overwrite")
    assert status == 2
    lines = err.strip().splitlines()
    assert len(lines) == 1 and str(runs["fits"]) in lines[0] and str(runs["png"]) in lines[0]
    assert {key: runs[key].read_bytes() for key in ("fits", "png")} == before
    assert not new_result.exists()


def test_overwrite_covers_a_runs_own_companion_files(boxes, tmp_path, capsys):
    argv = ["sky", "--boxes", *boxes["a"], *COMMON, "--nside", "2", "--output", tmp_path / "own.h5",
            "--plot", tmp_path / "own.png"]
    assert run_cli(capsys, *argv)[0] == 0
    status, _, err = run_cli(capsys, *argv, "--overwrite")
    assert status == 0, err


def _sha256(path):
    return hashlib.sha256(open(path, "rb").read()).hexdigest()


def test_limits_warns_naming_the_checksums_that_differ(boxes, runs, capsys):
    status, out, err = run_cli(capsys, "limits", "--result", runs["lines"], "--sky", runs["other"])
    assert status == 0, err
    checks = [line for line in err.splitlines() if "different boxes" in line]
    assert len(checks) == 1
    for path in (*boxes["a"], *boxes["b"]):
        assert _sha256(path)[:12] in checks[0]
    assert any("different seeds: 0 against 7" in line for line in err.splitlines())
    # The same set-up gives no such warning.
    _, _, same = run_cli(capsys, "limits", "--result", runs["lines"], "--sky", runs["sky"])
    assert "different" not in same


@pytest.mark.parametrize("every", [False, True])
def test_limits_table_fits_100_columns(runs, capsys, every):
    status, out, err = run_cli(capsys, "limits", "--result", runs["lines"], "--sky", runs["sky"],
                               *(["--all"] if every else []))
    assert status == 0, err
    table = [line for line in out.splitlines() if not line.startswith("# spectrum") and "Delta chi" not in line]
    assert max(len(line) for line in table) <= 100


# -- the shown mass on the demo boxes ------------------------------------------------------------


def test_demo_sky_shows_a_mass_resonating_in_at_least_90_percent_of_pixels(demo_dir, tmp_path, capsys):
    # The demo run file's boxes, mass grid and z range, on a coarser sky so that the test takes seconds.
    result = tmp_path / "demo_sky.h5"
    status, out, err = run_cli(capsys, "sky", demo_dir / "demo_sky.toml", "--nside", "4", "--rays-per-pixel", "1",
                               "--output", result, "--fits", "", "--plot", "", "--jobs", "1")
    assert status == 0, err
    shown = float(re.search(r"# shown: m = (\S+) eV", out).group(1))
    sky = SkyResult.load(result)
    k = int(np.argmin(np.abs(np.log(sky.mass_eV / shown))))
    # Counted here from the stored crossings: pixels with a resonance inside the boxes at that mass.
    assert np.mean(sky.crossings[:, k] > 0) >= 0.9


def test_shown_mass_rule_prefers_masses_resonating_in_most_pixels():
    # A hand-made sky: 12 pixels (nside 1), 5 masses; the edge masses resonate in 1 pixel.
    crossings = np.zeros((12, 5))
    crossings[0, [0, 4]] = 1.0
    crossings[:, [1, 2, 3]] = 2.0
    crossings[3, 1] = 0.0  # mass 1 misses one pixel: masses 2 and 3 resonate in all
    sky = SkyResult(np.geomspace(1e-14, 1e-12, 5), np.ones((12, 5)), np.zeros(5), crossings, np.zeros(12), 0.0,
                    {"nside": 1, "ordering": "RING"})
    assert shown_mass_index(sky) in (2, 3)
    assert shown_mass_index(sky, 1e-12) == 4


# -- signs of life, empty cells ------------------------------------------------------------------


def test_grid_warns_when_more_than_a_tenth_of_the_cells_are_empty(tmp_path, capsys):
    # 20 particles on 16^3 = 4096 cells: CIC reaches at most 8 cells each, so at least 96 % stay empty.
    rng = np.random.default_rng(3)
    particles = tmp_path / "few.h5"
    with h5py.File(particles, "w") as handle:
        handle["pos"] = rng.uniform(0, 5, (20, 3))
        handle["m"] = np.full(20, 1e10)
    box = tmp_path / "box.h5"
    status, out, err = run_cli(capsys, "grid", particles, "--cells", "16", "--positions", "pos", "--position-unit",
                               "cMpc", "--box-size", "5 cMpc", "--redshift", "1", "--masses", "m", "--mass-unit",
                               "Msun", "--ionised-fraction", "1", "--method", "cic", "--output", box)
    assert status == 0, err
    with h5py.File(box, "r") as handle:
        empty = np.mean(handle["electron_density"][...] == 0)  # counted from the file
    assert empty > 0.9
    warned = [line for line in err.splitlines() if "empty" in line]
    assert len(warned) == 1 and f"{100 * empty:.0f} %" in warned[0]


def test_inspect_handles_empty_cells_without_numpy_warnings(tmp_path, capsys):
    rng = np.random.default_rng(4)
    values = (2.5e-7 * np.exp(rng.normal(0, 1, (16, 16, 16)))).astype(np.float32)
    values[values < 2.5e-7] = 0.0  # about half the cells empty
    path = tmp_path / "holes.h5"
    with h5py.File(path, "w") as handle:
        handle.create_dataset("electron_density", data=values).attrs.update(
            quantity="n_e_comoving", box_size=50.0, box_size_unit="cMpc", redshift=1.0)
    with warnings.catch_warnings():
        warnings.simplefilter("error", RuntimeWarning)  # numpy's divide-by-zero and invalid-value warnings
        status, out, err = run_cli(capsys, "inspect", path, "--plot", tmp_path / "holes.png")
    assert status == 0, err
    assert "warning" not in err
    zero = int(np.sum(values == 0))
    assert f"{zero} cells ({100 * zero / values.size:.1f} %) are empty" in out


def test_progress_steps_give_the_same_bits_as_whole_batches(boxes, capsys, monkeypatch):
    # Every ray is traced on its own (DEVELOPERS.md), so tracing a batch in small steps for the bar
    # must not change a bit. Steps of the fewest rows (four per thread) here.
    import raytrace
    from raytrace.boxes import load_series
    from raytrace.tracing import progress

    monkeypatch.setattr(progress, "STEP_CELLS_PER_THREAD", 1)
    series = load_series(boxes["a"])
    masses = np.geomspace(1e-14, 1e-13, 6)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        quiet = raytrace.cast_sightlines(series, masses, 40, 0.5, batch_size=40)
        shown = raytrace.cast_sightlines(series, masses, 40, 0.5, batch_size=40, progress=True)
    np.testing.assert_array_equal(quiet.kernel, shown.kernel)
    np.testing.assert_array_equal(quiet.crossings, shown.crossings)


def test_step_rows_are_about_2_18_cells_and_four_rows_per_thread_and_at_most_a_batch():
    from raytrace.tracing.progress import step_rows

    # Rows of 2^16 cells: 4 per thread (the least); of 1000 cells: ceil(2^18 / 1000) = 263 per thread.
    assert step_rows(256, 2, 2**16) == 8 and step_rows(1024, 2, 1000) == 526 and step_rows(256, 2, 1000) == 256
    assert step_rows(5, 16, 1e6) == 5 and step_rows(1, 0, 10) == 1


def test_report_warns_about_a_sky_from_other_boxes_and_takes_mass(runs, tmp_path, capsys):
    stem = tmp_path / "page"
    status, out, err = run_cli(capsys, "report", runs["lines"], "--sky", runs["other"], "--output", stem,
                               "--mass", "4e-14")
    assert status == 0, err
    assert sum("different boxes" in line for line in err.splitlines()) == 1
    masses = np.geomspace(1e-14, 1e-13, 6)
    nearest = masses[np.argmin(np.abs(np.log(masses / 4e-14)))]
    assert f"map at m = {nearest:.3g} eV" in (tmp_path / "page.txt").read_text()


def test_limit_plot_legend_lists_only_curves_it_draws():
    from matplotlib.figure import Figure

    from raytrace.limits.spectral import sightline_limits

    mass = np.geomspace(1e-14, 1e-12, 8)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        # The homogeneous kernel is 0 everywhere: that curve has nothing to draw.
        limits = sightline_limits(mass, np.full(8, 1e5), background_kernel_eV=np.zeros(8))
    ax = Figure().add_subplot()
    from raytrace.limits.limitset import plot_limits

    plot_limits(ax, limits)
    labels = [text.get_text() for text in ax.get_legend().get_texts()]
    drawn = [curve.label for curve in limits.all_curves() if np.isfinite(curve.epsilon_max).any()]
    assert labels == drawn and len(drawn) < len(limits.all_curves())


def test_report_writes_only_the_formats_asked_for(runs, tmp_path, capsys):
    stem = tmp_path / "only"
    status, out, err = run_cli(capsys, "report", runs["lines"], "--output", stem, "--formats", "txt")
    assert status == 0, err
    # A run with redshift bins has a second page of the same format (where and when conversion happens).
    assert sorted(path.name for path in tmp_path.iterdir()) == ["only.txt", "only_where.txt"]
    status, _, err = run_cli(capsys, "report", runs["lines"], "--output", stem, "--formats", "gif")
    assert status == 2 and "--formats" in err


def test_every_dataset_a_run_fills_has_a_unit_and_description_entry():
    # The table the writers read: a dataset without an entry would stop the final save.
    from raytrace.core.resultfiles import DATASETS
    from raytrace.tracing.lattice import SKY_LAYOUT
    from raytrace.tracing.sightlines import SIGHTLINE_LAYOUT

    assert set(SIGHTLINE_LAYOUT) | set(SKY_LAYOUT) | {"mass_eV", "kernel_background"} <= set(DATASETS)

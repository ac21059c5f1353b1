"""A sky run interrupted mid-way and resumed from its checkpoint ends bit-identical to an
uninterrupted run (the reference is that uninterrupted run itself)."""

import h5py
import numpy as np
import pytest
from conftest import write_lognormal_box

import raytrace
from raytrace.boxes import load_series
from raytrace.core.errors import InputError
from raytrace.physics.background import MeanPlasma
from raytrace.physics.ionisation import IonisationHistory
from raytrace.sky.maps import SkyResult
from raytrace.tracing.backends import HDF5Backend
from raytrace.tracing.lattice import SkyTracer

MASS = np.geomspace(1.2e-14, 4e-14, 6)
OPTIONS = dict(nside=4, z_max=0.5, include_background=False, batch_pixels=16, seed=3)


@pytest.fixture(scope="module")
def setup(tmp_path_factory):
    folder = tmp_path_factory.mktemp("boxes")
    rng = np.random.default_rng(1)
    paths = [write_lognormal_box(folder / f"box_z{z:g}.h5", z, rng) for z in (0.0, 0.5)]
    plasma = MeanPlasma(None, IonisationHistory.constant(1.08))
    series = load_series([str(p) for p in paths])
    reference = raytrace.cast_sky(series, MASS, plasma=plasma, **OPTIONS)
    return series, plasma, reference


def test_interrupted_sky_run_resumes_to_the_same_maps(setup, tmp_path, monkeypatch):
    series, plasma, reference = setup
    output = tmp_path / "sky.h5"
    original = SkyTracer.trace
    calls = {"n": 0}

    def failing(self, pixels):
        calls["n"] += 1
        if calls["n"] == 3:  # 12 * 4^2 = 192 pixels in 12 batches: stop after two
            raise KeyboardInterrupt
        return original(self, pixels)

    monkeypatch.setattr(SkyTracer, "trace", failing)
    with pytest.raises(KeyboardInterrupt):
        raytrace.cast_sky(series, MASS, plasma=plasma, backend=HDF5Backend(output), **OPTIONS)
    monkeypatch.setattr(SkyTracer, "trace", original)
    checkpoint = output.with_name(output.name + ".partial")
    with h5py.File(checkpoint, "r") as handle:
        assert handle["batch_done"][...].sum() == 2
    assert not output.exists()

    resumed = raytrace.cast_sky(series, MASS, plasma=plasma, backend=HDF5Backend(output, resume=True), **OPTIONS)
    assert not checkpoint.exists()
    loaded = SkyResult.load(output)
    for result in (resumed, loaded):
        assert np.array_equal(result.kernel_boxes, reference.kernel_boxes)
        assert np.array_equal(result.crossings, reference.crossings)
        assert np.array_equal(result.dispersion_measure_boxes, reference.dispersion_measure_boxes)


def test_resuming_a_sky_run_with_another_seed_is_refused(setup, tmp_path, monkeypatch):
    series, plasma, _ = setup
    output = tmp_path / "sky.h5"

    def interrupted(self, pixels):
        raise KeyboardInterrupt

    monkeypatch.setattr(SkyTracer, "trace", interrupted)
    with pytest.raises(KeyboardInterrupt):
        raytrace.cast_sky(series, MASS, plasma=plasma, backend=HDF5Backend(output), **OPTIONS)
    monkeypatch.undo()
    other = dict(OPTIONS, seed=4)
    with pytest.raises(InputError, match="seed: checkpoint 3, now 4"):
        raytrace.cast_sky(series, MASS, plasma=plasma, backend=HDF5Backend(output, resume=True), **other)

"""Shared fixtures: where the published data live, and small in-memory boxes."""

import os
from pathlib import Path

import h5py
import matplotlib
import numpy as np
import pytest

matplotlib.use("Agg")

REPOSITORY = Path(__file__).resolve().parents[1]


def shared_data_dir():
    """../shared/data beside the repository (as laid out for development and CI),
    or the folder named by RAYTRACE_SHARED_DATA."""
    folder = Path(os.environ.get("RAYTRACE_SHARED_DATA", REPOSITORY.parent / "shared" / "data"))
    if not folder.is_dir():
        raise FileNotFoundError(
            f"published data folder {folder} not found: set RAYTRACE_SHARED_DATA to the shared/data folder"
        )
    return folder


@pytest.fixture(scope="session")
def shared_data():
    return shared_data_dir()


@pytest.fixture(scope="session")
def demo_dir():
    return REPOSITORY / "cubes_demo"


@pytest.fixture(scope="session")
def demo_series(demo_dir):
    """The shipped demo boxes (z = 0 to 6) as one series."""
    from raytrace.boxes import load_series

    return load_series(sorted(str(p) for p in demo_dir.glob("demo_z*.h5")))


def two_box_run_file(rays, seed, batch_size=10, mass_count=8, extra=""):
    """The text of a run file over two boxes box_z0.h5 and box_z1.h5 (z = 0, 1) to z = 1.5, 1e-14 to
    1.2e-13 eV: what the resume and data-safety tests write beside :func:`write_lognormal_box`'s boxes.
    ``rays`` None leaves out [rays] count (a sky does not use it); ``extra`` is added at the end."""
    count = "" if rays is None else f"count = {rays}\n"
    return (f'[boxes]\nfiles = ["box_z0.h5", "box_z1.h5"]\n\n[masses]\nmin_eV = 1e-14\nmax_eV = 1.2e-13\n'
            f"count = {mass_count}\n\n[rays]\n{count}z_max = 1.5\nbatch_size = {batch_size}\nseed = {seed}\n{extra}")


def write_lognormal_box(path, redshift, rng, cells=16, mean_comoving_cm3=2.5e-7):
    """A small log-normal comoving electron-density box file (contiguous float32, so it is
    memory-mapped) with every attribute the loader reads; about the cosmic mean density."""
    values = (mean_comoving_cm3 * np.exp(rng.normal(-0.125, 0.5, (cells,) * 3))).astype(np.float32)
    with h5py.File(path, "w") as handle:
        dataset = handle.create_dataset("electron_density", data=values)
        dataset.attrs.update(quantity="n_e_comoving", box_size=50.0, box_size_unit="cMpc", redshift=redshift)
    return path


def camb_background_for_planck18(tau=0.0561):
    """CAMB run by hand for astropy's Planck18 (H0, Omega_b h^2, Omega_dm h^2, m_nu, Neff,
    Tcmb0) with tau = 0.0561 (Planck 2018 VI, TT,TE,EE+lowE+lensing+BAO): the reference
    for the project's default ionisation history."""
    import camb
    from astropy.cosmology import Planck18

    h = Planck18.h
    params = camb.CAMBparams()
    params.set_cosmology(
        H0=Planck18.H0.value,
        ombh2=Planck18.Ob0 * h**2,
        omch2=Planck18.Odm0 * h**2,
        mnu=float(np.sum(Planck18.m_nu.value)),
        nnu=Planck18.Neff,
        TCMB=Planck18.Tcmb0.value,
        tau=tau,
    )
    return camb.get_background(params)

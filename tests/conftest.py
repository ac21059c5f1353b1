"""Shared fixtures: where the published data live, and small in-memory boxes."""

import os
from pathlib import Path

import matplotlib
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

"""Provenance and safe writing of outputs.

In: output paths, input files, run parameters. Out: package versions, input
checksums, and atomic writes (a temporary file renamed into place), so that a
crash never leaves a half-written result and nothing existing is overwritten
unless asked.
"""

import hashlib
import json
import os
import platform
import tempfile
from contextlib import contextmanager
from importlib import metadata
from pathlib import Path

from .errors import InputError

_PACKAGES = ("raytrace", "numpy", "scipy", "numba", "h5py", "astropy", "camb", "healpy", "joblib")


def package_versions():
    """Versions of Python and of the packages a result depends on."""
    versions = {"python": platform.python_version()}
    for name in _PACKAGES:
        try:
            versions[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            versions[name] = "not installed"
    return versions


def file_checksum(path, chunk_bytes=1 << 22):
    """SHA-256 of a file's bytes, as 'sha256:<hex>'."""
    digest = hashlib.sha256()
    with open(path, "rb") as handle:
        for chunk in iter(lambda: handle.read(chunk_bytes), b""):
            digest.update(chunk)
    return "sha256:" + digest.hexdigest()


def provenance_json(**fields):
    """Fields plus package versions, as one JSON string to store as an attribute."""
    return json.dumps({**fields, "versions": package_versions()}, sort_keys=True, default=str)


def check_writable(path, overwrite):
    """Refuse to replace an existing output unless ``overwrite`` is set.

    A missing folder is fine: the writers create it (see :func:`output_folder`).
    """
    path = Path(path)
    if path.exists() and not overwrite:
        raise InputError(f"{path}: output exists; pass --overwrite (overwrite=True) to replace it")
    if path.is_dir():
        raise InputError(f"{path}: is a folder; expected a file name for the output")


def output_folder(path):
    """Create the folder an output goes into, with a clear error if that is impossible."""
    folder = Path(path).parent
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as error:
        raise InputError(f"{path}: cannot create the output folder {folder} ({error.strerror})") from None
    return folder


@contextmanager
def atomic_output(path, overwrite=False):
    """Yield a temporary path beside ``path``; rename it onto ``path`` on success.

    On any exception the temporary file is removed and ``path`` is untouched.
    """
    path = Path(path)
    check_writable(path, overwrite)
    handle, temporary = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=output_folder(path))
    os.close(handle)
    try:
        yield Path(temporary)
        # mkstemp makes the file private (0600); give it the permissions a plain open() would.
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(temporary, 0o666 & ~umask)
        os.replace(temporary, path)
    except BaseException:
        if os.path.exists(temporary):
            os.unlink(temporary)
        raise

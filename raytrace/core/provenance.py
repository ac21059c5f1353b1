"""Provenance and safe writing of outputs.

In: output paths, input files, run parameters. Out: package versions, input
checksums, and atomic writes (a temporary file renamed into place), so that a
crash never leaves a half-written result and nothing existing is overwritten
unless asked; output sets that appear all together or not at all; a watch on
the input files a run must not see change.
"""

import contextvars
import errno
import glob
import hashlib
import json
import os
import platform
import shutil
import tempfile
from contextlib import contextmanager
from importlib import metadata
from pathlib import Path

from raytrace.core.errors import InputError, WriteError

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
    """Refuse to replace an existing output unless ``overwrite`` is set; refuse a folder always.

    A missing folder is fine: the writers create it (see :func:`output_folder`),
    unless something on the way is a file, or the nearest existing folder is not writable.
    """
    text = os.fspath(path)
    path = Path(path)
    if text.endswith(("/", os.sep)) or path.is_dir():
        raise InputError(f"{text}: is a folder; expected a file name for the output")
    if path.exists() and not overwrite:
        raise InputError(f"{path}: output exists; pass --overwrite (overwrite=True) to replace it")
    folder = path.parent
    while not folder.exists() and folder != folder.parent:
        folder = folder.parent
    if not folder.is_dir():
        raise InputError(f"{path}: cannot be written, {folder} is a file, not a folder")
    if not os.access(folder, os.W_OK | os.X_OK):
        raise InputError(f"{path}: cannot be written, the folder {folder} is not writable")
    _check_name_length(path, folder)


#: The longest name a run derives from an output's: its checkpoint's temporary file, '.<name>.partial.XXXXXXXX.part'.
_DERIVED_NAME_EXTRA = len("..partial.xxxxxxxx.part")


def _check_name_length(path, folder):
    """Refuse, before any work, a name whose temporary or checkpoint names the file system cannot hold."""
    try:
        limit = os.pathconf(folder, "PC_NAME_MAX")
    except (OSError, ValueError):
        limit = 255  # POSIX's usual NAME_MAX where the system does not say (common practice, no source)
    length = len(os.fsencode(path.name))
    if length + _DERIVED_NAME_EXTRA > limit:
        raise InputError(f"{path.name[:40]}...: the output's name is too long ({length} bytes; this file system "
                         f"takes names up to {limit} bytes and the run's temporary and checkpoint names add "
                         f"{_DERIVED_NAME_EXTRA}): choose a name of at most {limit - _DERIVED_NAME_EXTRA} bytes")


def check_outputs(paths, overwrite, flags=None):
    """Check every output of a run before it starts (see :func:`check_writable`); no path twice.

    ``flags``: the option naming each path (same order), put in front of a refusal.
    """
    paths = list(paths)
    seen = set()
    for path, flag in zip(paths, flags or [None] * len(paths)):
        try:
            check_writable(path, overwrite)
            resolved = Path(path).resolve()
            if resolved in seen:
                raise InputError(f"{path}: given as two of the run's outputs; each output needs its own file")
        except InputError as error:
            if flag is None:
                raise
            raise InputError(f"{flag}: {error}") from None
        seen.add(resolved)


def output_folder(path):
    """Create the folder an output goes into, with a clear error if that is impossible."""
    folder = Path(path).parent
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as error:
        raise InputError(f"{path}: cannot create the output folder {folder} ({error.strerror})") from None
    return folder


# errno values of a write the machine refused (full disk or quota, a failing or read-only device),
# and the words HDF5 uses for them when it does not pass errno on.
_WRITE_FAILURES = {errno.ENOSPC, errno.EDQUOT, errno.EIO, errno.EFBIG, errno.EROFS}
_WRITE_FAILURE_WORDS = ("No space left", "Disk quota", "Input/output error", "File too large", "Read-only file system")


def is_write_failure(error):
    """Whether ``error`` (an OSError, also HDF5's through h5py) is the machine refusing a write."""
    return isinstance(error, OSError) and (error.errno in _WRITE_FAILURES
                                           or any(words in str(error) for words in _WRITE_FAILURE_WORDS))


def write_failure(path, error, consequence="nothing was written at that name"):
    """The one-line InputError for a refused write of ``path``: why, the free space there, what it left."""
    reason = next((words for words in _WRITE_FAILURE_WORDS if words in str(error)), None)
    reason = reason or error.strerror or str(error).splitlines()[0]
    folder = Path(path).parent
    while not folder.exists() and folder != folder.parent:
        folder = folder.parent
    try:
        free = f"{shutil.disk_usage(folder).free / 1e6:.3g} MB free there"
    except OSError:
        free = "free space unknown"
    return WriteError(f"{path}: writing failed ({reason}; {free}); {consequence}")


class OutputSet:
    """The outputs of one run, held as temporary files until all are written (see :func:`output_set`)."""

    def __init__(self):
        self.pending = []      # (temporary, final path)
        self.kept = set()      # temporaries a failure leaves where they are (a finished run's result)
        self.afterwards = []   # callables run once every output is in place

    def commit(self):
        """Rename every output into place, first recording them in a journal (several outputs), so that
        a kill between two renames leaves a write that ``--resume`` completes (:mod:`raytrace.core.journal`)."""
        from raytrace.core.journal import write_journal

        journal = write_journal(self.pending) if len(self.pending) > 1 else None
        placed = []
        for index, (temporary, path) in enumerate(self.pending):
            try:
                inode = os.stat(temporary).st_ino
                os.replace(temporary, path)
            except OSError as error:
                self.pending = self.pending[index:]
                self.discard()
                if journal is not None:
                    journal.unlink()
                raise write_failure(path, error, "outputs before it in the run are in place, those after are not") \
                    from None
            placed.append((path, inode))
            remove_stale_temporaries(path)
        if journal is not None:
            journal.unlink()
        self.pending = []
        claim_written(placed)
        for action in self.afterwards:
            action()

    def discard(self):
        for temporary, _ in self.pending:
            if os.path.exists(temporary) and temporary not in self.kept:
                os.unlink(temporary)
        self.pending = []


def claim_written(placed):
    """Refuse to claim an output another process replaced since this run renamed it into place.

    ``placed``: (path, inode of the file this run wrote) pairs. Raytrace runs lock
    their outputs (:mod:`raytrace.core.outputguard`); this catches any other writer.
    """
    for path, inode in placed:
        try:
            now = os.stat(path).st_ino
        except OSError:
            now = None
        if now != inode:
            raise WriteError(f"{path}: another process replaced or removed this output just after this run wrote "
                             "it; the file there is not this run's result")


_OUTPUT_SET = contextvars.ContextVar("raytrace_output_set", default=None)


@contextmanager
def output_set(paths=(), overwrite=False):
    """All or nothing: outputs written inside (through :func:`atomic_output`) appear together at the end.

    ``paths`` are checked first (:func:`check_outputs`). Each output goes to a
    temporary file beside its final name; when the block ends normally all are
    renamed into place, then the actions given to :func:`after_outputs` run (e.g.
    removing a checkpoint); on any exception every temporary file is removed (but
    those of :func:`move_into_place`, which stay) and nothing at a final name changes.
    """
    check_outputs(paths, overwrite)
    pending = OutputSet()
    token = _OUTPUT_SET.set(pending)
    try:
        yield pending
    except BaseException:
        pending.discard()
        raise
    finally:
        _OUTPUT_SET.reset(token)
    pending.commit()


def after_outputs(action):
    """Run ``action`` once the current output set is in place (now, outside one)."""
    pending = _OUTPUT_SET.get()
    if pending is None:
        action()
    else:
        pending.afterwards.append(action)


def move_into_place(source, path):
    """Rename ``source`` onto ``path``: now, or inside an output set with the set's other outputs. A set
    that fails leaves ``source`` where it is (a finished run's result file, which a resume puts in place)."""
    pending = _OUTPUT_SET.get()
    if pending is None:
        inode = os.stat(source).st_ino
        os.replace(source, path)
        claim_written([(path, inode)])
        return
    pending.pending.append((source, Path(path)))
    pending.kept.add(source)


def remove_stale_temporaries(path):
    """Remove this tool's temporary files beside ``path`` that a killed run left (``.<name>.XXXXXXXX.part``)."""
    path = Path(path)
    for stale in path.parent.glob(f".{glob.escape(path.name)}.{'[a-z0-9_]' * 8}.part"):
        try:
            stale.unlink()
        except OSError:
            pass  # another process's, or already gone: not ours to insist on


@contextmanager
def hdf5_image(path):
    """Yield a new HDF5 file built in memory; on success write its bytes to ``path`` in one plain write.

    HDF5 itself never writes to the disk, so a full disk or an I/O error is a
    clean OSError from that write (HDF5 failing mid-file can crash the process
    when it closes the file).
    """
    import h5py

    with h5py.File(f"{Path(path).name}.in-memory", "w", driver="core", backing_store=False) as handle:
        yield handle
        handle.flush()
        image = handle.id.get_file_image()
    with open(path, "wb") as raw:
        raw.write(image)


@contextmanager
def atomic_output(path, overwrite=False, at_once=False):
    """Yield a temporary path beside ``path``; rename it onto ``path`` on success.

    On any exception the temporary file is removed and ``path`` is untouched; a
    refused write (full disk, I/O error) becomes an InputError naming ``path`` and
    the free space. Inside :func:`output_set` the rename waits for the whole set,
    unless ``at_once`` (a checkpoint, which the run needs while it goes on).
    """
    path = Path(path)
    check_writable(path, overwrite)
    try:
        handle, temporary = tempfile.mkstemp(prefix=f".{path.name}.", suffix=".part", dir=output_folder(path))
    except OSError as error:
        raise (write_failure(path, error) if is_write_failure(error) else error) from None
    os.close(handle)
    try:
        yield Path(temporary)
        # mkstemp makes the file private (0600); give it the permissions a plain open() would.
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(temporary, 0o666 & ~umask)
        pending = None if at_once else _OUTPUT_SET.get()
        if pending is not None:
            pending.pending.append((temporary, path))
            return
        inode = os.stat(temporary).st_ino
        os.replace(temporary, path)
        remove_stale_temporaries(path)
        claim_written([(path, inode)])
    except BaseException as error:
        if os.path.exists(temporary):
            os.unlink(temporary)
        if is_write_failure(error):
            in_set = not at_once and _OUTPUT_SET.get() is not None
            raise write_failure(path, error, "none of the run's outputs was written" if in_set else
                                "nothing was written at that name") from None
        raise


class InputWatch:
    """Files a run reads, which must not change under it.

    In: (path, 'sha256:...') pairs, taken when the files were read. :meth:`quick`
    compares size and modification time with those at construction (cheap, after
    every batch); :meth:`final` also recomputes the checksums (before a result is
    written). A change is an InputError naming the file.
    """

    def __init__(self, files):
        self.files = [(Path(path), checksum, self._stamp(path)) for path, checksum in files]

    @staticmethod
    def _stamp(path):
        try:
            status = os.stat(path)
        except OSError:
            return None
        return status.st_size, status.st_mtime_ns

    @staticmethod
    def _raise(path, how):
        raise InputError(f"{path}: the file changed while the run read it ({how}); inputs must not change "
                          "during a run: nothing was written, start the run afresh (--overwrite)")

    def quick(self):
        for path, _, stamp in self.files:
            if self._stamp(path) != stamp:
                self._raise(path, "its size or modification time differ" if os.path.exists(path) else "it is gone")

    def final(self):
        self.quick()
        for path, checksum, _ in self.files:
            if file_checksum(path) != checksum:
                self._raise(path, f"its SHA-256 is no longer {checksum}")

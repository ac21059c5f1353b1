"""Two guards around a run's outputs: never over an input, and one run per output at a time.

In: the run's output paths (with the option naming each) and its input files
(paths or glob patterns, with their options). Out: an InputError naming both
when an output resolves to an input file (after symlinks and hard links,
globs expanded; ``--overwrite`` or not), and :func:`output_lock`, an advisory
lock (``fcntl.flock``) on a lock file beside each output that a second run
on the same output meets and reports in one line, instead of both writing it.
"""

import errno
import glob
import os
from contextlib import contextmanager
from pathlib import Path

from raytrace.core.errors import InputError

_GLOB_CHARACTERS = "*?["


def _expanded(pattern):
    """The files a path or glob pattern names (a pattern that exists as a file is that file)."""
    text = os.fspath(pattern)
    if any(character in text for character in _GLOB_CHARACTERS) and not os.path.exists(text):
        return [Path(match) for match in sorted(glob.glob(text))]
    return [Path(text)]


def _same_file(a, b):
    """Whether two paths are one existing file: the same device and inode, so symlinks and hard links
    count; where either does not exist there is nothing of the input's to lose."""
    try:
        return os.path.samefile(a, b)
    except OSError:
        return False


def _named(pairs):
    """(path, option) pairs without the switched-off ones (None, ''); a lone path or pattern is its own pair."""
    out = []
    for item in pairs:
        path, option = item if isinstance(item, tuple) else (item, None)
        if path:
            out.append((path, option))
    return out


def refuse_outputs_over_inputs(outputs, inputs):
    """Refuse, before any work, an output that is one of the run's input files.

    ``outputs``, ``inputs``: (path, option) pairs (or plain paths); an input may
    be a glob pattern, or a list of them. ``--overwrite`` does not cover this:
    replacing an input would destroy what the run reads.
    """
    files = []
    for pattern, option in _named(inputs):
        for item in (pattern if isinstance(pattern, (list, tuple)) else [pattern]):
            files += [(path, option, item) for path in _expanded(item)]
    for output, out_option in _named(outputs):
        for path, in_option, pattern in files:
            if _same_file(output, path):
                named = f"{out_option} {output}" if out_option else str(output)
                source = f"{in_option} {pattern}" if in_option else str(pattern)
                if os.fspath(pattern) != os.fspath(path):
                    source += f", which matches {path}"
                raise InputError(f"{named}: is an input file of the run ({source}); a run never writes over "
                                 "what it reads, --overwrite or not: choose another output name")


def lock_path(path):
    """The lock file of an output: ``.<name>.lock`` beside it."""
    path = Path(path)
    return path.with_name(f".{path.name}.lock")


def _holder(descriptor):
    """The process id the lock's holder wrote into it, as text ('unknown' where there is none)."""
    try:
        os.lseek(descriptor, 0, os.SEEK_SET)
        text = os.read(descriptor, 64).decode(errors="replace").strip()
    except OSError:
        text = ""
    return text or "unknown"


def _acquire(path):
    """Take the lock of output ``path`` (not waiting); returns (lock file, descriptor)."""
    import fcntl

    lock = lock_path(path)
    lock.parent.mkdir(parents=True, exist_ok=True)
    while True:
        try:
            descriptor = os.open(lock, os.O_RDWR | os.O_CREAT, 0o666)
        except OSError as error:
            raise InputError(f"{path}: cannot make its lock file {lock.name} ({error.strerror})") from None
        try:
            fcntl.flock(descriptor, fcntl.LOCK_EX | fcntl.LOCK_NB)
        except OSError as error:
            holder = _holder(descriptor)
            os.close(descriptor)
            if error.errno not in (errno.EWOULDBLOCK, errno.EACCES):
                raise InputError(f"{path}: cannot lock {lock.name} ({error.strerror})") from None
            raise InputError(f"{path}: another raytrace run (process {holder}) is writing this output now; "
                             "one run per output at a time: wait for it to finish, or choose another name") from None
        # The holder before us removes the lock file as it lets go: a lock taken on a file no longer
        # at that name locks nothing, so take it again on the file that is there.
        try:
            current = os.stat(lock).st_ino
        except FileNotFoundError:
            current = None
        if current == os.fstat(descriptor).st_ino:
            os.ftruncate(descriptor, 0)
            os.write(descriptor, f"{os.getpid()}\n".encode())
            return lock, descriptor
        os.close(descriptor)


@contextmanager
def output_lock(paths):
    """Hold the lock of every output in ``paths`` (None and '' skipped) for the block.

    Advisory (``fcntl.flock``): raytrace runs respect it, other programs do not.
    A run that finds an output locked stops at once with one line naming it and
    the process holding it; the lock files are removed when the block ends.
    """
    held = []
    try:
        for path in sorted({os.path.abspath(path) for path in paths if path}):
            held.append(_acquire(Path(path)))
        yield
    finally:
        for lock, descriptor in reversed(held):
            try:
                os.unlink(lock)  # while still held: a run waiting on this file sees it gone and retries
            except OSError:
                pass
            os.close(descriptor)

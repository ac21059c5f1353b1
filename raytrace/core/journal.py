"""The journal of a run's final write, so that a kill between its renames can be completed.

In: the (temporary, final) pairs of an output set about to be renamed into
place, every temporary file complete. Out: ``.<first output>.commit`` beside
the first output, written (atomically) before the first rename and removed
after the last; and :func:`complete_interrupted_write`, which a resumed run
calls to finish the renames a kill left undone, so that no output is lost and
no complete temporary file stays behind as a hidden orphan.
"""

import json
import os
from pathlib import Path

from raytrace.core.errors import InputError


def journal_path(first_output):
    """Where the journal of an output set whose first output is ``first_output`` lives."""
    first_output = Path(first_output)
    return first_output.with_name(f".{first_output.name}.commit")


def write_journal(pending):
    """Record ``pending`` ((temporary, final) pairs) beside the first final path; returns the journal's path."""
    journal = journal_path(pending[0][1])
    temporary = journal.with_name(journal.name + ".new")
    entries = [[os.path.abspath(temporary_file), os.path.abspath(final)] for temporary_file, final in pending]
    with open(temporary, "w") as handle:
        json.dump(entries, handle)
    os.replace(temporary, journal)
    return journal


def complete_interrupted_write(first_output):
    """Finish the renames a kill interrupted in the final write whose first output is ``first_output``.

    Returns the paths moved into place now ([] when there is no journal: nothing
    was interrupted there). Every temporary file a journal names was complete
    before the first rename, so moving the ones still there finishes that write.
    """
    journal = journal_path(first_output)
    if not journal.is_file():
        return []
    try:
        entries = json.loads(journal.read_text())
        pairs = [(Path(temporary), Path(final)) for temporary, final in entries]
    except (OSError, ValueError, TypeError) as error:
        raise InputError(f"{journal}: the journal of an interrupted final write cannot be read ({error}); "
                         "start afresh with --overwrite") from None
    missing = [final for temporary, final in pairs if not temporary.exists() and not final.exists()]
    if missing:
        raise InputError(f"{journal}: the interrupted final write cannot be completed: "
                         f"{', '.join(map(str, missing))} was never put in place and its temporary file is gone; "
                         "start afresh with --overwrite")
    moved = []
    for temporary, final in pairs:
        if temporary.exists():
            os.replace(temporary, final)
            moved.append(final)
    journal.unlink()
    return moved

"""What the data-safety tests of issue 24 share: a folder of small boxes with a run file, the one
error line a command printed, a file's SHA-256 (hashlib), and a driver that SIGKILLs a command at a
chosen rename or removal (the way a kill lands: no cleanup runs, the kernel drops the process).
"""

import hashlib
import os
import subprocess
import sys
from pathlib import Path

import numpy as np

from conftest import REPOSITORY, two_box_run_file, write_lognormal_box


def box_folder(folder, rays=40, seed=11):
    """Two 16^3 log-normal boxes (z = 0, 1) and a run file of ``rays`` rays; returns the run file."""
    folder = Path(folder)
    write_lognormal_box(folder / "box_z0.h5", 0.0, np.random.default_rng(1))
    write_lognormal_box(folder / "box_z1.h5", 1.0, np.random.default_rng(2))
    (folder / "run.toml").write_text(two_box_run_file(rays, seed))
    # The same without [rays] count, which a sky does not use (and the code before issue 24 refused).
    (folder / "sky.toml").write_text(two_box_run_file(None, seed))
    return folder / "run.toml"


def sha256(path):
    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def error_lines(err):
    """The 'raytrace X: error:' lines of a command's stderr (progress bars, notes and warnings aside)."""
    return [line for line in err.splitlines() if ": error: " in line]


def leftovers(folder):
    """Files a run must not leave behind: temporaries, journals, checkpoints, lock files."""
    return sorted(name for name in os.listdir(folder)
                  if name.endswith((".part", ".commit", ".partial", ".lock", ".new")))


# Run as a script: SIGKILL this process just before os.replace onto, or os.unlink of, a path ending in
# argv[1] (argv[2]: 'replace' or 'unlink'), then raytrace.cli.main(argv[3:]).
_KILLER = """\
import os, signal, sys
target, kind = sys.argv[1], sys.argv[2]
real = {"replace": os.replace, "unlink": os.unlink}
def make(name):
    def wrapped(*args, **kwargs):
        path = os.fspath(args[1] if name == "replace" else args[0])
        if name == kind and path.endswith(target):
            os.kill(os.getpid(), signal.SIGKILL)
        return real[name](*args, **kwargs)
    return wrapped
os.replace, os.unlink = make("replace"), make("unlink")
from raytrace.cli import main
sys.exit(main(sys.argv[3:]))
"""


def run_killed(folder, target, kind, argv):
    """Run ``raytrace argv`` in a child that is SIGKILLed at the ``kind`` of a path ending in ``target``."""
    script = Path(folder) / "killer.py"
    script.write_text(_KILLER)
    environment = {**os.environ, "PYTHONPATH": str(REPOSITORY), "MPLBACKEND": "Agg"}
    return subprocess.run([sys.executable, str(script), target, kind, *argv], cwd=folder, env=environment,
                          capture_output=True, text=True, timeout=300)


def raytrace_process(folder, argv):
    """``python -m raytrace argv`` started in ``folder`` (not waited for)."""
    environment = {**os.environ, "PYTHONPATH": str(REPOSITORY), "MPLBACKEND": "Agg"}
    return subprocess.Popen([sys.executable, "-m", "raytrace", *argv], cwd=folder, env=environment,
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)

"""Stress test of checkpoints, outputs and cluster runs (not in CI): random SIGKILLs, damaged batches,
outputs over inputs, concurrent writers, worker kills.

1. A sightline run (``python -m raytrace sightlines``) is SIGKILLed at ``--kills`` random
   moments, resumed after each; after ``--corrupt`` of the kills a finished batch of the
   checkpoint gets random bytes. The final result must be bit-identical to the
   uninterrupted run, and every damaged batch must have been reported and recomputed.
2. Outputs over inputs: the run asked to write onto a box (by name, through a symlink, through the
   run file's glob) must refuse in one line, exit 2, and leave the box's bytes as they were.
3. Concurrent writers: pairs of runs with different seeds started together (``--overwrite``) on one
   output: one writes, the other stops in one line, and the file holds the seed of the run that
   printed it; no lock file or temporary is left.
4. The same run on a local dask cluster (``--scheduler local --workers 2``) with one worker
   process SIGKILLed in the first second and another mid-run must equal it as well.

Prints the figures (kills landed, batches done at each, damaged batches recomputed, worker
kills, wall times) and exits 1 if any comparison fails.

    python scripts/stress_reliability.py                 # 20 kills, 2 of them with damage
    python scripts/stress_reliability.py --kills 5 --rays 1000
"""

import argparse
import os
import signal
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import h5py
import numpy as np

ARRAYS = ("kernel_boxes", "crossings", "dispersion_measure_boxes", "direction")
RUN_FILE = """\
[boxes]
files = ["box_z0.h5", "box_z1.h5"]

[masses]
min_eV = 1e-14
max_eV = 1.2e-13
count = 32

[rays]
count = {rays}
z_max = 1.5
batch_size = {batch}
seed = 2026
"""


def write_box(path, redshift, seed, cells):
    """A log-normal comoving electron-density box about the cosmic mean (synthetic)."""
    rng = np.random.default_rng(seed)
    values = (2.5e-7 * np.exp(rng.normal(-0.125, 0.5, (cells,) * 3))).astype(np.float32)
    with h5py.File(path, "w") as handle:
        dataset = handle.create_dataset("electron_density", data=values)
        dataset.attrs.update(quantity="n_e_comoving", box_size=50.0, box_size_unit="cMpc", redshift=redshift)


def command(folder, output, *flags):
    return [sys.executable, "-m", "raytrace", "sightlines", str(folder / "run.toml"), "--output", str(output), *flags]


def batches_done(checkpoint):
    try:
        with h5py.File(checkpoint, "r", locking=False) as handle:
            return np.flatnonzero(handle["batch_done"][...])
    except (OSError, KeyError):
        return np.zeros(0, dtype=int)


def damage_a_finished_batch(checkpoint, rng, batch_size):
    """Random bytes inside a finished batch's kernel rows, written straight into the file."""
    done = batches_done(checkpoint)
    if done.size == 0:
        return None
    batch = int(rng.choice(done))
    with h5py.File(checkpoint, "r") as handle:
        node = handle["kernel_boxes"]
        offset = node.id.get_offset() + (batch * batch_size + 1) * node.shape[1] * node.dtype.itemsize
    with open(checkpoint, "r+b") as raw:
        raw.seek(offset)
        raw.write(rng.bytes(64))
    return batch


def same(path, reference):
    """Whether the per-ray arrays are bit-identical; prints the rays that differ where they are not."""
    with h5py.File(path, "r") as a, h5py.File(reference, "r") as b:
        differ = [name for name in ARRAYS if not np.array_equal(a[name][...], b[name][...])]
        for name in differ:
            rows = np.flatnonzero(np.any((a[name][...] != b[name][...]).reshape(len(a[name]), -1), axis=1))
            print(f"  {name}: {rows.size} rays differ, first {rows[:10].tolist()}")
    return not differ


def kill_and_resume(folder, reference, args, rng, max_delay):
    output = folder / "killed.h5"
    checkpoint = output.with_name(output.name + ".partial")
    landed, damaged, reported, between_save_and_cleanup = [], [], 0, []
    kill = -1
    while len(landed) < args.kills and kill < 3 * args.kills:  # until that many kills landed mid-run
        kill += 1
        flags = ["--resume"] if checkpoint.exists() else []
        process = subprocess.Popen(command(folder, output, *flags), stdout=subprocess.DEVNULL,
                                   stderr=subprocess.PIPE, text=True)
        delay = rng.uniform(0.5, max_delay)
        time.sleep(delay)
        if process.poll() is None:
            process.send_signal(signal.SIGKILL)
        stderr = process.communicate()[1]
        reported += stderr.count("fail their checksum")
        if process.returncode == -signal.SIGKILL and output.exists() and not checkpoint.exists():
            print(f"  kill {kill}: landed after the run had finished its outputs ({delay:.2f} s); starting afresh")
            os.unlink(output)
            continue
        if process.returncode == -signal.SIGKILL:
            landed.append((round(delay, 2), int(batches_done(checkpoint).size)))
        elif "already complete" in stderr:  # killed during the final write: the resume completed it
            print(f"  kill {kill}: {stderr.strip().splitlines()[-1]}")
            between_save_and_cleanup.append(kill)
            os.unlink(output)
            continue
        elif process.returncode == 0:
            print(f"  kill {kill}: the run finished first ({delay:.2f} s); starting afresh")
            os.unlink(output)
            continue
        else:
            print(f"  kill {kill}: exit {process.returncode}: {stderr.strip().splitlines()[-1:]}")
            return False
        # Damage after args.corrupt of the landed kills, spread at random over the run.
        needed, left = args.corrupt - len(damaged), args.kills - len(landed) + 1
        if needed > 0 and batches_done(checkpoint).size and rng.random() < max(needed / left, 0.15):
            damaged.append(damage_a_finished_batch(checkpoint, rng, args.batch))
    final = subprocess.run(command(folder, output, *(["--resume"] if checkpoint.exists() else [])),
                           capture_output=True, text=True)
    reported += final.stderr.count("fail their checksum")
    print(f"  kills landed mid-run: {len(landed)} in {kill + 1} starts (delay s, batches done): {landed}")
    print(f"  damaged batches: {damaged}; resumes that reported a checksum failure: {reported}; "
          f"kills during the final write, completed by the resume: {len(between_save_and_cleanup)}")
    ok = final.returncode == 0 and same(output, reference) and reported >= len(damaged)
    print(f"  final resume exit {final.returncode}; bit-identical to the uninterrupted run: {ok}")
    if final.returncode != 0:
        print("  " + "\n  ".join(final.stderr.strip().splitlines()[-2:]))
    return ok


def sha256(path):
    import hashlib

    return hashlib.sha256(Path(path).read_bytes()).hexdigest()


def outputs_over_inputs(folder):
    """Each way an output can name an input: refused in one line, exit 2, the input's bytes unchanged."""
    os.symlink("box_z1.h5", folder / "alias.h5")
    globbed = folder / "glob.toml"
    globbed.write_text((folder / "run.toml").read_text().replace('["box_z0.h5", "box_z1.h5"]', '["box_z*.h5"]'))
    cases = [("a box by name", "run.toml", "box_z0.h5"), ("a box through a symlink", "run.toml", "alias.h5"),
             ("the run file", "run.toml", "run.toml"), ("a box the run file's glob matches", "glob.toml", "box_z1.h5")]
    ok = True
    for what, run_file, output in cases:
        victim = folder / output
        before = sha256(victim)
        done = subprocess.run([sys.executable, "-m", "raytrace", "sightlines", str(folder / run_file), "--output",
                               str(victim), "--overwrite"], capture_output=True, text=True)
        errors = [line for line in done.stderr.splitlines() if ": error: " in line]
        kept = sha256(victim) == before
        fine = done.returncode == 2 and len(errors) == 1 and "is an input file" in errors[0] and kept
        ok = ok and fine
        print(f"  {what}: exit {done.returncode}, input unchanged: {kept}, one line: {len(errors) == 1}")
    os.unlink(folder / "alias.h5")
    return ok


def concurrent_writers(folder, rng, rounds):
    """Pairs of --overwrite runs with different seeds started together on one output."""
    import json

    output = folder / "shared.h5"
    outcomes, ok = [], True
    for round_number in range(rounds):
        seeds = (1000 + 2 * round_number, 1001 + 2 * round_number)
        runs = []
        for seed in seeds:
            runs.append(subprocess.Popen(command(folder, output, "--overwrite", "--seed", str(seed)),
                                         stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True))
            time.sleep(rng.uniform(0.0, 0.5))
        finished = [(seed, run.wait(), *run.communicate()) for seed, run in zip(seeds, runs)]
        with h5py.File(output, "r") as handle:
            held = json.loads(handle.attrs["run"])["seed"]
        writers = [seed for seed, status, out, _ in finished if status == 0 and "result:" in out]
        stopped = [seed for seed, status, _, err in finished
                   if status == 2 and sum(": error: " in line for line in err.splitlines()) == 1
                   and "another raytrace run" in err]
        leftover = [name for name in os.listdir(folder) if name.endswith((".lock", ".part", ".commit"))]
        # One writer and one stopped run; where the two did not overlap both write, the later one last.
        fine = held in writers and len(writers) + len(stopped) == 2 and not leftover
        ok = ok and fine
        outcomes.append((len(writers), len(stopped), held in writers))
    print(f"  {rounds} pairs (writers, runs stopped in one line, file holds a writer's seed): {outcomes}"
          + ("" if ok else "  FAILED"))
    return ok


def worker_processes(root):
    """dask worker processes that ``root``'s nannies spawned (multiprocessing children), through psutil."""
    import psutil

    found = []
    for child in psutil.Process(root).children(recursive=True):
        try:
            line = " ".join(child.cmdline())
        except psutil.Error:
            continue
        if "spawn_main" in line and "resource_tracker" not in line:
            found.append(child)
    return found


def cluster_with_worker_kills(folder, reference, args, rng):
    output = folder / "cluster.h5"
    start = time.monotonic()
    process = subprocess.Popen(command(folder, output, "--scheduler", "local", "--workers", "2"),
                               stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    kills = []
    for moment in ("first second", "mid-run"):
        deadline = time.monotonic() + 60
        while process.poll() is None and time.monotonic() < deadline:
            workers = worker_processes(process.pid)
            done = len(batches_done(output.with_name(output.name + ".partial")))
            ready = workers and (len(workers) >= 2 if moment == "first second" else done > args.rays // args.batch // 3)
            if ready:
                if moment == "first second":
                    time.sleep(rng.uniform(0.0, 1.0))
                victim = workers[int(rng.integers(len(workers)))]
                victim.send_signal(signal.SIGKILL)
                kills.append((moment, round(time.monotonic() - start, 2)))
                break
            time.sleep(0.05)
    stderr = process.communicate()[1]
    ok = process.returncode == 0 and same(output, reference)
    print(f"  worker kills (moment, s after start): {kills}; exit {process.returncode}; "
          f"{time.monotonic() - start:.1f} s; bit-identical: {ok}")
    if process.returncode != 0:
        print("  " + "\n  ".join(stderr.strip().splitlines()[-3:]))
    return ok and len(kills) == 2


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--kills", type=int, default=20)
    parser.add_argument("--corrupt", type=int, default=2, help="kills followed by damaging a finished batch")
    parser.add_argument("--rays", type=int, default=4000)
    parser.add_argument("--batch", type=int, default=20)
    parser.add_argument("--cells", type=int, default=32)
    parser.add_argument("--max-delay", type=float, default=None,
                        help="latest kill, s after a start (default: 0.8 times the uninterrupted run)")
    parser.add_argument("--seed", type=int, default=1)
    parser.add_argument("--writer-pairs", type=int, default=3, help="pairs of concurrent writers on one output")
    parser.add_argument("--no-cluster", action="store_true")
    args = parser.parse_args()
    rng = np.random.default_rng(args.seed)
    with tempfile.TemporaryDirectory(prefix="raytrace-stress-") as name:
        folder = Path(name)
        write_box(folder / "box_z0.h5", 0.0, 1, args.cells)
        write_box(folder / "box_z1.h5", 1.0, 2, args.cells)
        (folder / "run.toml").write_text(RUN_FILE.format(rays=args.rays, batch=args.batch))
        reference = folder / "reference.h5"
        start = time.monotonic()
        subprocess.run(command(folder, reference), check=True, capture_output=True)
        took = time.monotonic() - start
        print(f"uninterrupted run: {args.rays} rays in batches of {args.batch}, {took:.1f} s (start-up included)")
        print("SIGKILLs and resumes:")
        # Kills land from the start-up to most of the run's own time, so resumes get on with it.
        ok = kill_and_resume(folder, reference, args, rng, args.max_delay or 0.8 * took)
        print("outputs over inputs:")
        ok = outputs_over_inputs(folder) and ok
        print("concurrent writers on one output:")
        ok = concurrent_writers(folder, rng, args.writer_pairs) and ok
        if not args.no_cluster:
            print("local cluster with worker kills:")
            ok = cluster_with_worker_kills(folder, reference, args, rng) and ok
    print("PASS" if ok else "FAIL")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())

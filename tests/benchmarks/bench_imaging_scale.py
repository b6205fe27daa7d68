"""Benchmark: the out-of-core imaging analysis of a frame stack several times larger than the memory
it is allowed, on one process and on a local dask.distributed cluster of 2 workers.

It writes a run-like file with a ``/frames`` group (image sets of 6 polarization settings and a dark
frame per pass, 512 x 512 float32 frames, noise so that nothing compresses away), then runs the
series analysis (integrated Stokes, non-separability and centroid of every pass) and the window
maps (written to a file one window at a time):

- one process, in a child whose address space is capped with RLIMIT_AS at what it uses after its
  imports plus ``--limit-mb`` (malloc arenas limited so the cap measures data, not reservations);
- a LocalCluster of 2 worker processes with a dask memory limit of ``--limit-mb`` / 2 each.

Reports frames per second and peak resident memory (ru_maxrss of the child; the workers' peak RSS
from their own getrusage) against the stack's size. Run: python tests/benchmarks/bench_imaging_scale.py
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

SETTINGS = {  # polarizer-like POVMs of H, V, D, A, R, L
    "H": np.diag([1.0, 0.0]), "V": np.diag([0.0, 1.0]), "D": np.full((2, 2), 0.5),
    "A": np.array([[0.5, -0.5], [-0.5, 0.5]]), "R": np.array([[0.5, -0.5j], [0.5j, 0.5]]),
    "L": np.array([[0.5, 0.5j], [-0.5j, 0.5]]),
}


def write_stack(path: Path, frames: int, side: int, seed: int = 1) -> int:
    """A run-like file with ``frames`` frames (7 per pass); returns its /frames/data size in bytes."""
    import h5py

    rng = np.random.default_rng(seed)
    y, x = np.mgrid[0:side, 0:side] - side / 2
    r2 = (x**2 + y**2) / (side / 6) ** 2
    lobes = r2 * np.exp(-r2)  # a doughnut of the first-order modes
    per_pass = len(SETTINGS) + 1
    passes = frames // per_pass
    n = passes * per_pass
    with h5py.File(path, "w") as f:
        g = f.create_group("frames")
        d = g.create_dataset("data", shape=(n, side, side), dtype="f4", chunks=(1, side, side))
        s = g.create_dataset("saturated", shape=(n, side, side), dtype="u1", chunks=(1, side, side),
                             compression="gzip", compression_opts=1)
        kind, pass_index, ops = [], [], []
        for p in range(passes):
            block = np.empty((per_pass, side, side), dtype="f4")
            for k, e in enumerate(SETTINGS.values()):
                block[k] = 1000 * lobes * (0.5 + 0.4 * np.cos(k + 0.01 * p)) + rng.normal(20, 3, (side, side))
                kind.append(0)
                ops.append(np.kron(e, np.eye(2)))
            block[-1] = rng.normal(20, 3, (side, side))
            kind.append(1)
            ops.append(np.zeros((4, 4)))
            pass_index.extend([p] * per_pass)
            d[p * per_pass:(p + 1) * per_pass] = block
        s[...] = 0
        g.create_dataset("kind", data=np.array(kind))
        g.create_dataset("pass_index", data=np.array(pass_index))
        g.create_dataset("operators", data=np.array(ops))
        for name in ("step_index", "port", "n_averaged"):
            g.create_dataset(name, data=np.arange(n) if name == "step_index" else np.zeros(n, int))
        for name in ("t_s", "exposure_s", "saturation_level"):
            g.create_dataset(name, data=np.arange(n, dtype=float))
        g.create_dataset("commanded", data=np.zeros((n, 5)))
        g.attrs["complete"] = True
    return n * side * side * 4


def analyse(path: str, out: str, address: str | None, window: int) -> dict:
    """Series and window maps of the stack; wall time and frame count."""
    from lightloom.sequencer.imaging_report import imaging_series

    t0 = time.perf_counter()
    result = imaging_series(path, address=address, maps_out=out, passes_per_window=window)
    return {"seconds": time.perf_counter() - t0, "passes": len(result["passes"])}


def vm_size_bytes() -> int:
    with open("/proc/self/status") as f:
        for line in f:
            if line.startswith("VmSize:"):
                return int(line.split()[1]) * 1024
    raise RuntimeError("no VmSize in /proc/self/status")


def child(args: argparse.Namespace) -> None:
    """One process under RLIMIT_AS: imports first, then the cap, then the analysis."""
    import dask  # noqa: F401
    import dask.array  # noqa: F401
    import h5py  # noqa: F401

    import lightloom.sequencer.analysis.imaging_dask  # noqa: F401
    import lightloom.sequencer.imaging_report  # noqa: F401

    base = vm_size_bytes()
    cap = base + args.limit_mb * 2**20
    resource.setrlimit(resource.RLIMIT_AS, (cap, cap))
    dask.config.set(num_workers=2)
    result = analyse(args.stack, args.out, None, args.window)
    result["peak_rss_bytes"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    result["cap_over_imports_bytes"] = args.limit_mb * 2**20
    print(json.dumps(result))


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--stack-gb", type=float, default=2.5, help="size of the frame stack, GB")
    parser.add_argument("--limit-mb", type=int, default=600, help="memory allowed (MB)")
    parser.add_argument("--side", type=int, default=512, help="frame side, pixels")
    parser.add_argument("--window", type=int, default=10, help="passes per window map")
    parser.add_argument("--child", action="store_true", help=argparse.SUPPRESS)
    parser.add_argument("--stack", help=argparse.SUPPRESS)
    parser.add_argument("--out", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child:
        child(args)
        return
    folder = Path(tempfile.mkdtemp(prefix="imaging-scale-"))
    stack = folder / "stack.h5"
    frames = int(args.stack_gb * 1e9 / (args.side * args.side * 4))
    t0 = time.perf_counter()
    size = write_stack(stack, frames, args.side)
    n = size // (args.side * args.side * 4)
    print(f"stack: {n} frames of {args.side}x{args.side} float32, {size / 1e9:.2f} GB "
          f"({size / (args.limit_mb * 2**20):.1f}x the {args.limit_mb} MB allowed), written in "
          f"{time.perf_counter() - t0:.0f} s")

    env = {**os.environ, "MALLOC_ARENA_MAX": "2", "OMP_NUM_THREADS": "1", "OPENBLAS_NUM_THREADS": "1"}
    proc = subprocess.run(
        [sys.executable, __file__, "--child", "--stack", str(stack), "--out", str(folder / "one.h5"),
         "--limit-mb", str(args.limit_mb), "--window", str(args.window)],
        capture_output=True, text=True, env=env,
    )
    if proc.returncode != 0:
        print(proc.stderr[-2000:])
        raise SystemExit("the one-process analysis failed (see above)")
    one = json.loads(proc.stdout.strip().splitlines()[-1])
    print(f"one process (RLIMIT_AS = imports + {args.limit_mb} MB): {n / one['seconds']:.0f} frames/s "
          f"({one['seconds']:.1f} s, two reads of the stack), peak RSS {one['peak_rss_bytes'] / 2**20:.0f} MB, "
          f"stack / peak RSS = {size / one['peak_rss_bytes']:.1f}")

    from distributed import LocalCluster

    per_worker = f"{args.limit_mb // 2}MB"
    with LocalCluster(n_workers=2, threads_per_worker=1, host="127.0.0.1", dashboard_address=None,
                      memory_limit=per_worker, processes=True) as cluster:
        from distributed import Client

        result = analyse(str(stack), str(folder / "cluster.h5"), cluster.scheduler_address, args.window)
        with Client(cluster.scheduler_address) as client:
            peaks = client.run(lambda: resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024)
    worst = max(peaks.values())
    print(f"local cluster, 2 workers x {per_worker}: {n / result['seconds']:.0f} frames/s "
          f"({result['seconds']:.1f} s), peak worker RSS {worst / 2**20:.0f} MB "
          f"(sum {sum(peaks.values()) / 2**20:.0f} MB), stack / total worker limit = "
          f"{size / (args.limit_mb * 2**20):.1f}")
    for p in folder.iterdir():
        p.unlink()
    folder.rmdir()


if __name__ == "__main__":
    main()

"""Benchmark: what carrying camera frames costs a run.

For frames of a few sizes (12-bit-like noisy images of a doughnut beam), measures
- the time to append and sync one frame to the frame journal (``RUN.h5.frames``), against the time
  to append and sync one reading to the run journal, and against the exposure it would follow;
- the bytes per frame on disk (zlib level 1) against the raw float32 frame;
- the time per frame to publish the frames into ``/frames`` of the run file when the run closes.

Run: python tests/benchmarks/bench_frames_journal.py [--frames N]
"""

from __future__ import annotations

import argparse
import os
import tempfile
import time
from pathlib import Path
from types import SimpleNamespace

import h5py
import numpy as np

from lightloom.drivers.camera import CameraSettings, average_frames
from lightloom.sequencer.storage.atomic import sync_fd
from lightloom.sequencer.storage.frames import FrameJournal, frames_path_for, publish


def doughnut(side: int, rng: np.random.Generator) -> np.ndarray:
    y, x = np.mgrid[0:side, 0:side] - side / 2
    r2 = (x**2 + y**2) / (side / 6) ** 2
    return np.clip(np.rint(3000 * r2 * np.exp(-r2) + rng.normal(20, 4, (side, side))), 0, 4095)


def readings_for(n: int) -> SimpleNamespace:
    """The columns publish() takes from a run's reading table."""
    return SimpleNamespace(
        step_index=np.arange(n), kind=np.array(["measure"] * n), pass_index=np.zeros(n, int),
        commanded=np.zeros((n, 5)), operators=np.zeros((n, 1, 4, 4), complex),
        element_names=("quarter_wave_plate", "half_wave_plate", "mode_converter", "converter_angle",
                       "image_rotator"),
    )


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--frames", type=int, default=40)
    args = parser.parse_args()
    rng = np.random.default_rng(1)
    folder = Path(tempfile.mkdtemp(prefix="frames-bench-"))
    # One synced append of a reading-sized record (about 1.2 kB for 4 ports) as the yardstick.
    fd = os.open(folder / "reading.bin", os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
    record = os.urandom(1200)
    t0 = time.perf_counter()
    for _ in range(args.frames):
        os.write(fd, record)
        sync_fd(fd)
    reading_s = (time.perf_counter() - t0) / args.frames
    os.close(fd)
    print(f"one synced 1.2 kB reading append: {reading_s * 1e3:.2f} ms")
    settings = CameraSettings(bit_depth=12)
    for side in (64, 256, 1024):
        h5 = folder / f"run{side}.h5"
        with h5py.File(h5, "w"):
            pass
        frames = [average_frames([doughnut(side, rng)], settings, 0.0) for _ in range(args.frames)]
        journal = FrameJournal(frames_path_for(h5))
        t0 = time.perf_counter()
        for i, frame in enumerate(frames):
            journal.append(i, [(0, frame)])
        append_s = (time.perf_counter() - t0) / args.frames
        journal.close()
        stored = frames_path_for(h5).stat().st_size / args.frames
        t0 = time.perf_counter()
        publish(h5, readings_for(args.frames))
        publish_s = (time.perf_counter() - t0) / args.frames
        raw = side * side * 4
        print(f"{side}x{side}: append+sync {append_s * 1e3:.1f} ms/frame "
              f"({append_s / reading_s:.1f}x a reading append; {raw / append_s / 1e6:.0f} MB/s of float32), "
              f"{stored / 1e3:.0f} kB/frame on disk ({stored / raw:.2f} of raw float32), "
              f"publish {publish_s * 1e3:.1f} ms/frame")
        for p in (h5, frames_path_for(h5)):
            p.unlink()
    (folder / "reading.bin").unlink()
    folder.rmdir()


if __name__ == "__main__":
    main()

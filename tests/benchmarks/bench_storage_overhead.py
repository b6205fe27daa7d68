"""Benchmark: cost of RunStore.record() against a bare os.write + sync loop, and rebuild time.

Run on demand: ``PYTHONPATH=. python tests/benchmarks/bench_storage_overhead.py``.
Prints medians measured in this run; the ratio is record() over the bare loop.
"""

from __future__ import annotations

import hashlib
import os
import statistics
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

import lightloom.sequencer.storage.journal as journal_module
from lightloom.sequencer.storage import Reading, RunHeader, RunStore
from lightloom.sequencer.model.records import PortLayout, RunSources
from lightloom.sequencer.storage.atomic import sync_fd
from lightloom.sequencer.storage.codec import (
    TYPE_HEADER, TYPE_READING, ReadingLayout, encode_header, encode_reading, frame,
)
from lightloom.sequencer.storage.journal import read_journal

ELEMENTS = ("quarter_wave_plate", "half_wave_plate", "mode_converter", "converter_angle",
            "image_rotator")
PORTS = ("det_hh", "det_hv", "det_vh", "det_vv")


def make_header(steps: int) -> RunHeader:
    text = "name: bench\n"
    return RunHeader(
        format_version=1, tool_version="bench", created_utc="2026-01-01T00:00:00+00:00",
        protocol_name="bench", protocol_text=text,
        protocol_sha256=hashlib.sha256(text.encode()).hexdigest(),
        bench_name="sim", bench_text=text, bench_sha256=hashlib.sha256(text.encode()).hexdigest(),
        simulated=True, analyzes=("polarization", "spatial"), element_names=ELEMENTS,
        port_names=PORTS, port_units="W", dimension=4,
        basis_labels=("H,h", "H,v", "V,h", "V,v"), steps_total=steps, steps_json="[]",
        ports=tuple(PortLayout(p, None, None) for p in PORTS), sources=RunSources("bench", "", "sim", ""),
    )


def make_readings(n: int, seed: int = 1) -> list[Reading]:
    rng = np.random.default_rng(seed)
    ops = rng.normal(size=(n, 4, 4, 4)) + 1j * rng.normal(size=(n, 4, 4, 4))
    return [
        Reading(step_index=i, kind="measure", pass_index=0, point_index=i, repeat_index=0,
                commanded=rng.uniform(0, 180, 5), readback=rng.uniform(0, 180, 5),
                values=rng.uniform(0, 1e-3, 4), reference_w=1e-3, operators=ops[i],
                dwell_s=0.1, t_start=1.7e9 + i, t_end=1.7e9 + i + 0.1)
        for i in range(n)
    ]


def bare_loop_s(path: Path, blobs: list[bytes], sync=sync_fd) -> list[float]:
    fd = os.open(path, os.O_WRONLY | os.O_CREAT | os.O_APPEND, 0o644)
    costs = []
    try:
        for blob in blobs:
            t0 = time.perf_counter()
            os.write(fd, blob)
            sync(fd)
            costs.append(time.perf_counter() - t0)
    finally:
        os.close(fd)
    return costs


def record_s(store: RunStore, readings: list[Reading]) -> list[float]:
    costs = []
    for r in readings:
        t0 = time.perf_counter()
        store.record(r)
        costs.append(time.perf_counter() - t0)
    return costs


def main(rounds: int = 10, per_round: int = 200, n_rebuild: int = 20_000) -> None:
    header = make_header(rounds * per_round)
    layout = ReadingLayout.of(header)
    readings = make_readings(rounds * per_round)
    with tempfile.TemporaryDirectory(dir=os.environ.get("BENCH_DIR")) as tmpdir:
        tmp = Path(tmpdir)
        store = RunStore.create(tmp / "run.h5", header)
        blobs = [frame(TYPE_READING, encode_reading(r, layout)) for r in readings]
        t0 = time.perf_counter()
        for r in readings:
            frame(TYPE_READING, encode_reading(r, layout))
        encode_us = (time.perf_counter() - t0) / len(readings) * 1e6
        ours: list[float] = []
        bare: list[float] = []
        for k in range(rounds):
            chunk = slice(k * per_round, (k + 1) * per_round)
            ours += record_s(store, readings[chunk])
            bare += bare_loop_s(tmp / "bare.bin", blobs[chunk])
        store.close("complete")
        journal_module.sync_fd = lambda fd: None
        cpu_store = RunStore.create(tmp / "cpu.h5", header)
        cpu_ours = record_s(cpu_store, readings)
        cpu_bare = bare_loop_s(tmp / "cpu.bin", blobs, sync=lambda fd: None)
        cpu_store.close("complete")
        journal_module.sync_fd = sync_fd
        med_ours, med_bare = statistics.median(ours), statistics.median(bare)
        print(f"sync call: {sync_fd.__doc__.strip()}")
        print(f"reading frame: {len(blobs[0])} bytes (4 ports, 5 elements, d=4)")
        print(f"encode+frame per reading: {encode_us:.1f} us")
        print(f"record() median: {med_ours * 1e3:.3f} ms over {len(ours)} readings")
        print(f"bare os.write+sync median: {med_bare * 1e3:.3f} ms over {len(bare)} writes")
        print(f"ratio record()/bare: {med_ours / med_bare:.3f}")
        print(f"without the sync (CPU only): record() {statistics.median(cpu_ours) * 1e6:.1f} us, "
              f"bare os.write {statistics.median(cpu_bare) * 1e6:.1f} us")

        big = make_readings(n_rebuild, seed=2)
        journal = tmp / "big.h5.journal"
        with open(journal, "wb") as handle:
            handle.write(frame(TYPE_HEADER, encode_header(make_header(n_rebuild))))
            handle.write(b"".join(frame(TYPE_READING, encode_reading(r, layout)) for r in big))
        t0 = time.perf_counter()
        contents = read_journal(journal)
        parse_s = time.perf_counter() - t0
        assert len(contents.readings) == n_rebuild
        t0 = time.perf_counter()
        big_store = RunStore.reopen(tmp / "big.h5")
        reopen_s = time.perf_counter() - t0
        rebuilds = []
        for k in range(5):
            t0 = time.perf_counter()
            assert big_store.refresh("running", f"rebuild {k}")
            rebuilds.append(time.perf_counter() - t0)
        big_store.release()
        size_mb = (tmp / "big.h5").stat().st_size / 1e6
        print(f"read_journal of {n_rebuild} readings: {parse_s:.3f} s "
              f"({journal.stat().st_size / 1e6:.1f} MB)")
        print(f"reopen (lock, parse, rebuild .h5) of {n_rebuild}: {reopen_s:.3f} s")
        print(f"refresh (atomic .h5 rebuild) of {n_rebuild}: median {statistics.median(rebuilds):.3f} s"
              f", min {min(rebuilds):.3f} s, max {max(rebuilds):.3f} s ({size_mb:.1f} MB file)")


if __name__ == "__main__":
    main(*(int(a) for a in sys.argv[1:]))

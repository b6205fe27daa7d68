"""`lightloom sim serve`: the simulated bench on loopback, reached by the real drivers and by a plain
VISA client; a protocol run through it; Ctrl-C stops it cleanly."""

from __future__ import annotations

import json
import os
import random
import re
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

import pyvisa
import pytest

from lightloom.sequencer.cli import main
from lightloom.sequencer.storage.store import load_run
from helpers.runs import default_ctrl_c

REPO = Path(__file__).resolve().parents[1]
ADDRESS = re.compile(r"^\s+(\w+)\s+(\w+)\s+(TCPIP::127\.0\.0\.1::(\d+)::SOCKET)\s+(socket://127\.0\.0\.1:\d+)$")


def _free_base_port(n: int = 12) -> int:
    for base in random.sample(range(49200, 60000, 97), len(range(49200, 60000, 97))):
        ok = True
        for port in range(base, base + n):
            with socket.socket() as s:
                s.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
                try:
                    s.bind(("127.0.0.1", port))
                except OSError:
                    ok = False
                    break
        if ok:
            return base
    raise RuntimeError("no free block of ports")


def _serve(tmp_path: Path, *extra: str) -> tuple[subprocess.Popen, dict[str, tuple[str, str]], Path]:
    # A block of ports found free may be taken by another test's server before ours binds it.
    for _ in range(5):
        proc, addresses, bench_out = _serve_once(tmp_path, *extra)
        if addresses:
            return proc, addresses, bench_out
        _, err = proc.communicate(timeout=20)
        assert "cannot listen" in err, err
    raise AssertionError("sim serve found no free block of ports in 5 tries")


def _serve_once(tmp_path: Path, *extra: str) -> tuple[subprocess.Popen, dict[str, tuple[str, str]], Path]:
    bench_out = tmp_path / "served.yaml"
    proc = subprocess.Popen(
        [sys.executable, "-m", "lightloom.sequencer", "sim", "serve", "--bench", "sim", "--bench-out", str(bench_out),
         "--base-port", str(_free_base_port()), *extra],
        stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, cwd=str(tmp_path),
        env={**os.environ, "PYTHONPATH": str(REPO)}, preexec_fn=default_ctrl_c,
    )
    addresses: dict[str, tuple[str, str]] = {}
    deadline = time.monotonic() + 30
    assert proc.stdout is not None
    for line in proc.stdout:
        m = ADDRESS.match(line.rstrip("\n"))
        if m:
            addresses[m.group(1)] = (m.group(2), m.group(3))
        if line.startswith("serving"):
            break
        assert time.monotonic() < deadline, "sim serve did not start"
    return proc, addresses, bench_out


def _stop(proc: subprocess.Popen) -> int:
    proc.send_signal(signal.SIGINT)
    try:
        return proc.wait(timeout=20)
    finally:
        if proc.poll() is None:
            proc.kill()


def test_every_printed_address_answers_idn_through_pyvisa(tmp_path: Path) -> None:
    proc, addresses, bench_out = _serve(tmp_path)
    try:
        assert len(addresses) == 10
        rm = pyvisa.ResourceManager("@py")
        for name, (kind, visa_address) in addresses.items():
            inst = rm.open_resource(visa_address, read_termination="\n", write_termination="\n", timeout=2000)
            idn = inst.query("*IDN?").strip()
            inst.close()
            # IEEE 488.2: *IDN? answers manufacturer,model,serial,firmware
            assert idn.split(",")[0] == "lightloom" and idn.split(",")[2] == name and len(idn.split(",")) == 4
        assert bench_out.read_text().startswith("# Written by `lightloom sim serve`")
    finally:
        assert _stop(proc) == 0
    assert "stopped" in proc.stdout.read()


def test_the_served_bench_listens_on_loopback_only(tmp_path: Path) -> None:
    proc, addresses, _ = _serve(tmp_path)
    try:
        port = int(next(iter(addresses.values()))[1].split("::")[2])
        out = subprocess.run(["ss", "-ltn"], capture_output=True, text=True).stdout if Path("/usr/bin/ss").exists() or Path("/bin/ss").exists() else ""
        if out:
            lines = [l for l in out.splitlines() if f":{port} " in l]
            assert lines and all("127.0.0.1:" in l for l in lines)
        else:  # no ss: the kernel's socket table
            table = Path("/proc/net/tcp").read_text().splitlines()[1:]
            local = [row.split()[1] for row in table if row.split()[3] == "0A"]
            mine = [a for a in local if int(a.split(":")[1], 16) == port]
            assert mine and all(a.split(":")[0] == "0100007F" for a in mine)
    finally:
        _stop(proc)


def test_a_protocol_runs_through_the_real_drivers_against_the_served_bench(tmp_path: Path) -> None:
    log = tmp_path / "commands.jsonl"
    proc, addresses, bench_out = _serve(tmp_path, "--time-scale", "0.05", "--log", str(log))
    try:
        out = tmp_path / "served-run.h5"
        assert main(["run", "polarization-6", "--bench", str(bench_out), "--out", str(out), "--quiet"]) == 0
        data = load_run(out)
        assert data.status == "complete" and data.steps_done == data.header.steps_total
        assert not data.header.simulated  # from the runner's side these are real instruments
    finally:
        _stop(proc)
    shutter = [json.loads(l) for l in log.read_text().splitlines() if json.loads(l)["device"] == "shutter"]
    commands = [r["command"] for r in shutter if r["command"].startswith("SHUT ")]
    assert commands and commands[-1] == "SHUT CLOSE"  # what the hardware was told last

"""Putting the parts together for one run: devices, storage, runner, signals, log, display.

This is the imperative shell around the compiler and the runner; the command-line verbs ``run``,
``resume`` and ``demo`` call it.
"""

from __future__ import annotations

import datetime as dt
import math
import signal
import sys
import time
import uuid
from contextlib import contextmanager, suppress
from dataclasses import dataclass
from pathlib import Path
from typing import Callable, Iterator

import numpy as np
from rich.console import Console

from lightloom.sequencer import __version__
from lightloom.sequencer.lang.bench import Bench, load_bench, parse_bench
from lightloom.sequencer.errors import EXIT_FAULT, EXIT_INTERRUPTED, EXIT_OK, BenchError, StorageError, UsageError
from lightloom.sequencer.optics.states import BASIS_LABELS
from lightloom.sequencer.model.steps import StepList
from lightloom.sequencer.lang.protocol import Protocol, load_protocol, parse_protocol
from lightloom.sequencer.run.beam import BeamWatch, monitor_levels, ports_watch_the_beam, settled_watch
from lightloom.sequencer.run.runner import Rig, Runner, RunPolicy, StopRequested, hms
from lightloom.sequencer.run.safety import LASER_SAFETY_CAUTION
from lightloom.sequencer.outputs import check_new_output
from lightloom.sequencer.model.records import FORMAT_VERSION, Event, PortLayout, RunHeader, RunSources
from lightloom.sequencer.storage.store import RunStore
from lightloom.sequencer.plan.tablemodel import compile_protocol, table_model
from lightloom.sequencer.model.vocabulary import STAGE_ELEMENTS
from lightloom.sequencer.model.elements import COLUMN
from lightloom.sequencer.optics.analyzer import CONVERTER
from lightloom.sequencer.plan.timing import estimate_steps

STATUS_EXIT = {"complete": EXIT_OK, "interrupted": EXIT_INTERRUPTED, "fault": EXIT_FAULT}


@dataclass
class Assembled:
    """A rig and the clock functions that go with it (virtual for simulated benches)."""

    rig: Rig
    now: Callable[[], float]
    sleep: Callable[[float], None]
    simulated_table: object | None = None


def assemble(bench: Bench, *, continue_at: tuple[float, float] | None = None) -> Assembled:
    """Build the devices of ``bench``: simulated in process, or real drivers (not yet connected).

    ``continue_at`` (simulated benches, on resume): (UNIX s at which the run's simulated clock
    read 0, virtual s reached by the last recorded reading), so the simulated clock, its drift and
    its scheduled faults continue where the run stopped instead of starting again.
    """
    if bench.is_simulated:
        from lightloom.simulators.table import SimulatedTable

        # An instant clock's zero is a whole UNIX second: see simulators.table.READING_GRID_S.
        wall_now = time.time()
        if bench.simulation.time_scale == 0:
            wall_now = float(math.floor(wall_now))
        epoch, start_s = continue_at if continue_at is not None else (wall_now, 0.0)
        table = SimulatedTable(bench, start_s=start_s, epoch_s=epoch)
        devices = table.devices
        wall0 = epoch
        now = lambda: wall0 + table.clock.now()  # noqa: E731
        sleep = table.clock.sleep
    else:
        from lightloom.drivers.registry import create_device
        from lightloom.drivers.options import DriverConfigError

        devices = {}
        for name, spec in bench.devices.items():
            limits = None
            if spec.kind == "rotation_stage" and spec.limits is not None:
                limits = {
                    "min_deg": spec.limits.min_deg, "max_deg": spec.limits.max_deg,
                    "speed_deg_per_s": spec.limits.speed_deg_per_s,
                    "acceleration_deg_per_s2": spec.limits.acceleration_deg_per_s2,
                    "backlash_deg": spec.backlash_deg,
                }
            elif spec.kind == "actuator" and spec.states:
                limits = {"states": list(spec.states)}
            try:
                devices[name] = create_device(name, spec.driver, spec.address, spec.options, limits)
            except DriverConfigError as exc:
                file, line = bench.locate(f"devices.{name}")
                raise BenchError(f"device '{name}': {exc}", file, line) from None
        table = None
        now, sleep = time.time, time.sleep
    roles = bench.roles
    stages = {role: devices[getattr(roles, role)] for role in STAGE_ELEMENTS if getattr(roles, role)}
    rig = Rig(
        stages=stages,  # type: ignore[arg-type]
        converter=devices[roles.mode_converter] if roles.mode_converter else None,  # type: ignore[arg-type]
        shutter=devices[roles.shutter],  # type: ignore[arg-type]
        detectors=tuple(devices[d.device] for d in roles.detectors),  # type: ignore[misc]
        reference=devices[roles.reference] if roles.reference else None,  # type: ignore[arg-type]
    )
    return Assembled(rig, now, sleep, table)


def port_units(bench: Bench) -> str:
    """"W" when every detector is a power meter, "counts" when every one is a counter."""
    kinds = {bench.devices[d.device].kind for d in bench.roles.detectors}
    if kinds == {"power_meter"}:
        return "W"
    if kinds == {"photon_counter"}:
        return "counts"
    if kinds == {"camera"}:
        return "ADU"
    file, line = bench.locate("roles.detectors")
    raise BenchError("detectors mix power meters, photon counters or cameras; use one kind for all ports", file, line)


def make_header(protocol: Protocol, bench: Bench, plan: StepList, units: str, protocol_spec: str, bench_spec: str) -> RunHeader:
    target = factor_target = None
    if protocol.target_state is not None:
        t = np.array(protocol.target_state, dtype=np.complex128)
        if t.shape == (4, 4):
            target = t
        else:
            factor_target = t
    gains = bench.calibration.port_gain
    return RunHeader(
        format_version=FORMAT_VERSION,
        tool_version=__version__,
        created_utc=dt.datetime.now(dt.timezone.utc).isoformat(timespec="seconds"),
        protocol_name=protocol.name,
        protocol_text=protocol.source_text,
        protocol_sha256=protocol.sha256,
        bench_name=bench.name,
        bench_text=bench.resolved_text,
        bench_sha256=bench.sha256,
        simulated=bench.is_simulated,
        analyzes=protocol.analyzes,
        element_names=plan.element_names,
        port_names=plan.port_names,
        port_units=units,
        dimension=4,
        basis_labels=BASIS_LABELS,
        steps_total=len(plan.steps),
        steps_json=plan.to_json(),
        ports=tuple(
            PortLayout(d.label, d.sorter_port, d.splitter_port, float(gains.get(d.device, 1.0)))
            for d in bench.roles.detectors
        ),
        sources=RunSources(
            protocol_spec=protocol_spec, protocol_path=_absolute(protocol.source_path),
            bench_spec=bench_spec, bench_path=_absolute(bench.source_path),
        ),
        target_state=target,
        factor_target_state=factor_target,
        target_label=protocol.target_label,
        reference_device=bench.roles.reference,
        wavelength_nm=bench.wavelength_nm,
        run_id=str(uuid.uuid4()),
    )


def _absolute(path: str) -> str:
    """An existing file's absolute path (so resume and calibrate work from any folder)."""
    p = Path(path)
    return str(p.resolve()) if p.is_file() else path


def policy_for(bench: Bench) -> RunPolicy:
    th, rt = bench.thresholds, bench.retry
    return RunPolicy(
        retry_attempts=rt.attempts, backoff_s=rt.backoff_s, max_backoff_s=rt.max_backoff_s,
        shutter_close_s=rt.shutter_close_s,
        beam_loss_fraction=th.beam_loss_fraction, beam_wait_s=th.beam_wait_s,
        beam_poll_s=min(5.0, max(0.05, th.beam_wait_s / 20.0)), drift_fraction=th.drift_fraction,
    )


@contextmanager
def stop_on_sigterm() -> Iterator[None]:
    """While active, SIGTERM and SIGHUP raise StopRequested in the main thread (a safe stop, exit 130).

    SIGHUP (the terminal or ssh session closed) is left alone when it is ignored, as under nohup.
    """
    def handler(signum, frame):  # noqa: ARG001
        raise StopRequested(signal.Signals(signum).name)

    wanted = [signal.SIGTERM]
    if hasattr(signal, "SIGHUP") and signal.getsignal(signal.SIGHUP) is not signal.SIG_IGN:
        wanted.append(signal.SIGHUP)
    previous = {}
    try:
        for signum in wanted:
            previous[signum] = signal.signal(signum, handler)
    except ValueError:  # not the main thread
        pass
    try:
        yield
    finally:
        for signum, old in previous.items():
            signal.signal(signum, old)


class RunLog:
    """The human-readable log beside the data file (RUN.log), one timestamped line per entry."""

    def __init__(self, path: Path) -> None:
        self.path = path
        try:
            self._f = open(path, "a", encoding="utf-8", buffering=1)
        except OSError:
            self._f = None  # a log that cannot be written must not stop the run (the journal is truth)

    def __call__(self, line: str) -> None:
        if self._f is None:
            return
        stamp = dt.datetime.now(dt.timezone.utc).isoformat(timespec="milliseconds")
        try:
            self._f.write(f"{stamp} {line}\n")
        except OSError:
            self._close_quietly()

    def close(self) -> None:
        self._close_quietly()

    def _close_quietly(self) -> None:
        f, self._f = self._f, None
        if f is not None:
            with suppress(OSError):
                f.close()


def log_path_for(out: Path) -> Path:
    return out.with_suffix(".log") if out.suffix == ".h5" else Path(str(out) + ".log")


def _say(console: Console | None, text: str) -> None:
    """Tell the person watching; a closed or broken terminal must never stop a run."""
    if console is None:
        return
    try:
        console.print(text, highlight=False, markup=False)
    except (OSError, SystemExit):  # rich turns a broken pipe into SystemExit
        pass


def start_run(protocol_spec: str, bench_spec: str, out: str, *, console: Console | None, live: bool) -> int:
    """``lightloom run``: compile, create the run file (refusing an existing one), execute."""
    protocol = load_protocol(protocol_spec)
    bench = load_bench(bench_spec)
    plan = compile_protocol(protocol, bench)
    if plan.violations:
        raise BenchError(
            f"the plan breaks the bench's limits: {plan.violations[0]}"
            + (f" (and {len(plan.violations) - 1} more)" if len(plan.violations) > 1 else "")
            + "; see `lightloom dry-run`",
            bench.source_path, 1,
        )
    units = port_units(bench)
    out_path = Path(out)
    check_new_output(out_path, "--out", f"{out_path} exists already; lightloom never overwrites a run file "
                     f"(use `lightloom resume {out_path}` or another --out)")
    assembled = assemble(bench)
    header = make_header(protocol, bench, plan, units, protocol_spec, bench_spec)
    store = RunStore.create(out_path, header)
    return _execute(protocol, bench, plan, assembled, store, out_path, set(), console, live, resumed=False)


def resume_run(path: str, *, console: Console | None, live: bool) -> int:
    """``lightloom resume``: continue from the first step not recorded, each step exactly once."""
    out_path = Path(path)
    store = RunStore.reopen(out_path)
    try:
        header = store.header
        protocol, bench = _recover_inputs(header)
        plan = compile_protocol(protocol, bench)
        if not _same_steps(plan, header.steps_json):
            raise UsageError(
                f"{out_path}: the protocol and bench compile to a different plan than the one stored "
                f"(stored by lightloom {header.tool_version}, this is {__version__}); resume it with the "
                "version that started it, or start a new run"
            )
        done = store.summary.done.copy()
        assembled = assemble(bench, continue_at=_simulated_clock_at(store) if bench.is_simulated else None)
        if bench.is_simulated and bench.simulation.time_scale == 0:
            _continue_time_line(plan, bench, store, assembled, done)
    except BaseException:
        # A refused resume changes nothing: the run keeps its status and message (e.g. the fault).
        store.release()
        raise
    if store.bytes_cut:
        _say(console, f"cut a torn journal tail of {store.bytes_cut} bytes (a reading that was never reported)")
    return _execute(protocol, bench, plan, assembled, store, out_path, done, console, live, resumed=True)


def _same_steps(plan: StepList, stored_json: str) -> bool:
    """True if ``plan`` is the step list stored (compact form, or the verbose one of older runs)."""
    text = plan.to_json()
    if text == stored_json:
        return True
    try:
        return StepList.from_json(stored_json).to_json() == text
    except (ValueError, KeyError, TypeError):
        return False


def _simulated_clock_at(store: RunStore) -> tuple[float, float] | None:
    """(UNIX s of the simulated clock's zero, virtual s the run had reached when it stopped: its
    last recorded reading or event) of a stopped simulated run, or None before its first event.

    The run's first event is written before any device spends time, so its time is the clock's zero.
    """
    starts = [e.t for e in store.events if e.kind == "start"]
    if not starts:
        return None
    epoch = starts[0]
    t_last = store.summary.t_last
    reached = max([e.t for e in store.events] + ([t_last] if t_last is not None else []))
    return epoch, max(0.0, reached - epoch)


class _TransitionMeasured(Exception):
    """Raised in the stand-in run when the resumed step is about to be read (its clock is known)."""


class _NoStore:
    """A store that keeps nothing: the stand-in run records no reading or event."""

    def event(self, event: Event) -> None:
        pass


def _continue_time_line(plan: StepList, bench: Bench, store: RunStore, assembled: Assembled, done: np.ndarray) -> None:
    """On an instant simulated bench, make the resumed run read at the uninterrupted run's times.

    The first step left (k) would have been read, in the uninterrupted run, after step k-1's
    reading and the transition from k-1 to k (pass wait, shutter, converter, stage moves). A
    stand-in runner on a second simulated table of the same bench replays exactly that: its
    stages stand where the journal read them back, it knows what the real runner knew (the
    targets, converter and shutter of the steps recorded), its table is re-anchored at k-1's
    recorded start (exact, see READING_GRID_S), it reads, waits for k's pass and moves to k with
    the runner's own motion logic. Its clock and stages when k's reading begins are where the real
    table is re-anchored (SimulatedTable.continue_at_step), after the resumed run has closed the
    shutter and approached every stage as always. Nothing changes when the steps recorded are not
    the plan's first ones, or the stand-in cannot get there (a bench with faults).
    ``done``: one flag per step of the plan.
    """
    clock_at = _simulated_clock_at(store)
    done = np.asarray(done, dtype=bool)
    if clock_at is None or done.all():
        return
    epoch = clock_at[0]
    k = int(np.argmin(done))  # the first step left
    summary = store.summary
    if done[k:].any() or (k > 0 and (summary.last_row is None or int(summary.last_row["step_index"]) != k - 1)):
        return
    settings = plan.columns.settings
    stand_in = assemble(bench, continue_at=(epoch, 0.0))
    stand_in_table = stand_in.simulated_table
    reached: list[tuple[float, dict[str, tuple[float, float]]]] = []

    def begin_reading(index: int) -> None:
        stages = {st.name: (st.motor_angle_deg(), st.optical_angle_deg()) for st in stand_in.rig.stages.values()}
        reached.append((stand_in_table.clock.now(), stages))
        raise _TransitionMeasured

    runner = Runner(plan, table_model(bench), stand_in.rig, _NoStore(), policy_for(bench), now=stand_in.now,
                    sleep=stand_in.sleep, wall=time.monotonic, run_start=_run_start(store, stand_in.now),
                    parallel_reads=False, begin_reading=begin_reading)
    try:
        runner.connect()
        if k > 0:
            previous = plan.steps[k - 1]
            # What the uninterrupted runner knew and where its devices were after step k-1.
            for role, stage in stand_in.rig.stages.items():
                column = COLUMN[role]
                set_before = np.flatnonzero(~np.isnan(settings[:k, column]))
                if set_before.size:
                    at = float(summary.last_readback[column])
                    stage.place(at, at)  # every approach ends moving up: the optic rests on the motor
                    runner.assume_stage_at(role, float(settings[set_before[-1], column]))
            converter = stand_in.rig.converter
            set_before = np.flatnonzero(~np.isnan(settings[:k, CONVERTER]))
            if converter is not None and set_before.size:
                state = plan.steps[int(set_before[-1])].settings.mode_converter
                converter.set_state(state)
                converter.wait_settled(runner.policy.settle_timeout_s)
                runner.assume_converter_state(state)
            runner.set_shutter(previous.shutter_open)
            stand_in_table.rest_at(float(summary.last_row["t_start"]) - epoch)
            stand_in_table.begin_step(previous.index)
            runner.read_detectors(previous.dwell_s)
        runner.wait_for_pass(plan.steps[k])
        runner.measure_step(plan.steps[k])
    except _TransitionMeasured:
        at, stages = reached[0]
        assembled.simulated_table.continue_at_step(k, at, stages)
    except Exception:
        # A stand-in that cannot get there changes nothing: the resumed run then continues from
        # the time the run stopped, as a real table would.
        return
    finally:
        runner.release_readers()


def _recover_inputs(header: RunHeader) -> tuple[Protocol, Bench]:
    """The protocol and bench of a run, refusing ones that changed on disk since it started."""
    ppath, bpath = header.sources.protocol_path, header.sources.bench_path
    protocol = parse_protocol(header.protocol_text, ppath or "<stored protocol>")
    if ppath and Path(ppath).is_file():
        now = load_protocol(ppath)
        if now.sha256 != header.protocol_sha256:
            raise UsageError(
                f"{ppath} changed since the run started; resuming would mix two protocols. Restore "
                "the file (the original is stored in the run file under /protocol) or start a new run"
            )
    bench = None
    if bpath and Path(bpath).is_file():
        bench = load_bench(bpath)
        if bench.sha256 != header.bench_sha256:
            raise UsageError(
                f"{bpath} (or a bench it extends) changed since the run started; resuming would mix "
                "two benches. Restore it (the resolved original is stored under /bench) or start a new run"
            )
    if bench is None:
        bench = parse_bench(header.bench_text, bpath or "<stored bench>")
    return protocol, bench


def _execute(protocol, bench, plan, assembled, store, out_path, done, console, live, *, resumed) -> int:
    table = table_model(bench)
    log = RunLog(log_path_for(out_path))
    est = estimate_steps(plan, table)
    done = _as_mask(done, len(plan.steps))
    n_done = int(np.count_nonzero(done))
    from lightloom.sequencer.run.display import Schedule

    work_s = np.asarray(est.step_seconds, float) - np.asarray(est.step_wait_seconds, float)
    pass_index = plan.columns.pass_index.astype(np.int64)
    run_start = _run_start(store, assembled.now)
    schedule = Schedule.of(work_s, pass_index, done, plan.passes, run_start, plan.pass_interval_s)
    left = schedule.seconds_left(assembled.now())
    monitor = None
    frames = None
    try:
        verb = "resume" if resumed else "start"
        log(f"{verb}: protocol {protocol.name} on bench {bench.name} -> {out_path} "
            f"({len(plan.steps) - n_done} of {len(plan.steps)} steps to go, about {hms(left)} h:mm:ss)")
        store.event(Event(assembled.now(), verb, f"lightloom {__version__}; {n_done} of {len(plan.steps)} steps recorded before"))
        if not bench.is_simulated:
            sys.stderr.write(LASER_SAFETY_CAUTION)
            sys.stderr.flush()
            log("laser-safety caution shown; the shutter will open unattended")
        if bench.roles.reference is None and not ports_watch_the_beam(table):
            blind = (
                "warning: this bench has no beam monitor (no reference meter, and its ports do not "
                "measure a complete set), so a lost beam cannot be told from a dark projector and "
                "would be recorded; add a reference pick-off meter for unattended runs"
            )
            log(blind)
            _say(console, blind)
        _say(console, f"{'resuming' if resumed else 'running'} {protocol.name} on {bench.name}: "
                      f"{len(plan.steps) - n_done} steps, about {hms(left)} (h:mm:ss) -> {out_path}")
        runner_kwargs = {}
        if live and console is not None:
            from lightloom.sequencer.run.display import TerminalMonitor

            monitor = TerminalMonitor(
                console, f"lightloom {protocol.name} on {bench.name}", plan.port_names,
                store.header.port_units, schedule, steps_done=n_done, steps_total=len(plan.steps),
                passes=plan.passes, work_s=work_s, now=assembled.now,
            )
            monitor.__enter__()
            runner_kwargs["monitor"] = monitor
        frames = _frame_journal(bench, out_path)
        if frames is not None:
            runner_kwargs.update(frames=frames, frames_averaged=protocol.frames_averaged)
        runner = Runner(plan, table, assembled.rig, store, policy_for(bench), now=assembled.now,
                        sleep=assembled.sleep, wall=time.monotonic, log=log, units=store.header.port_units,
                        run_start=run_start,
                        parallel_reads=not (bench.is_simulated and bench.simulation.time_scale == 0),
                        begin_reading=getattr(assembled.simulated_table, "begin_step", None),
                        beam_watch=_resumed_beam_watch(store, table, policy_for(bench)),
                        **runner_kwargs)
        with stop_on_sigterm():
            status, message = runner.execute(done)
    except BaseException as exc:
        # Stopped outside the runner's own handling (a bug, a second Ctrl-C): say so in the run
        # file and release it; the runner has closed the shutter if it had started.
        resume = f"`lightloom resume {out_path}` continues the run"
        if isinstance(exc, (KeyboardInterrupt, StopRequested)):
            status, message = "interrupted", f"stopped by Ctrl-C or SIGTERM; {resume}"
        elif isinstance(exc, StorageError):
            status, message = "fault", f"{exc.one_line()}"
        else:
            status, message = "fault", f"internal error {exc!r}; please report this; {resume}"
        with suppress(Exception):
            store.close(status, message)
        raise
    finally:
        if monitor is not None:
            monitor.__exit__(None, None, None)
        log.close()
    store.close(status, message)
    if frames is not None:
        _publish_frames(frames, store, out_path, console)
    _say(console, f"{status}: {message}")
    _say(console, f"data: {out_path}   log: {log_path_for(out_path)}")
    return STATUS_EXIT[status]


def _frame_journal(bench: Bench, out_path: Path):
    """The frame journal of a run on a bench with a camera (None without one)."""
    if not any(bench.devices[d.device].kind == "camera" for d in bench.roles.detectors):
        return None
    from lightloom.sequencer.storage.frames import FrameJournal, frames_path_for

    return FrameJournal(frames_path_for(out_path))


def _publish_frames(frames, store: RunStore, out_path: Path, console: Console | None) -> None:
    """Copy the reported frames into the closed run file (the frame journal stays the record)."""
    from lightloom.sequencer.storage.frames import publish

    frames.close()
    try:
        publish(out_path, store.readings)
    except (OSError, StorageError) as exc:
        _say(console, f"warning: the frames stay in {out_path.name}.frames only: {exc}")


def _resumed_beam_watch(store: RunStore, table, policy) -> BeamWatch | None:
    """The beam watch of a resumed run, settled on its first shutter-open readings (None if none)."""
    rows = store.summary.first_beam_rows
    if not rows:
        return None
    levels = [monitor_levels("measure", row["values"], float(row["reference_w"]), table) for row in rows]
    return settled_watch(levels, policy.beam_loss_fraction, policy.drift_fraction)


def _as_mask(done, total: int) -> np.ndarray:
    if isinstance(done, np.ndarray) and done.dtype == bool:
        return done[:total]
    mask = np.zeros(total, dtype=bool)
    mask[[i for i in done if 0 <= i < total]] = True
    return mask


def _run_start(store: RunStore, now: Callable[[], float]) -> float:
    """When the run started (UNIX s): its first event, so a resumed run keeps the passes' start times."""
    starts = [e.t for e in store.events if e.kind == "start"]
    if starts:
        return float(starts[0])
    t_first = store.summary.t_first
    return t_first if t_first is not None else now()

"""``lightloom advise FILE.h5 --target NAME_OR_STATE [--json]``: the correction-stack settings that
turn the measured beam into the target, the fidelity they reach (with its bootstrap std), and the
best fidelity any local transformation could reach."""

from __future__ import annotations

import argparse
import json
from pathlib import Path

# Within this of the best local fidelity, the remaining error is the source's, not the settings'.
SETTINGS_MATCH = 1e-6


def add_parser(sub) -> None:
    p = sub.add_parser(
        "advise",
        help="settings of a quarter-half-quarter stack, mode converter and image rotator that steer the measured beam to a target",
        description=(
            "Reconstruct the joint state of a run (or take a state given on the command line) and find "
            "the angles of the correction stack (quarter-, half-, quarter-wave plate on the polarization; "
            "pi/2 mode converter and image rotator on the spatial mode) that maximise the fidelity to "
            "the target; report that fidelity with its bootstrap std and the best fidelity any local "
            "transformation could reach."
        ),
    )
    p.add_argument("source", metavar="FILE_OR_STATE",
                   help="a joint run file (FILE.h5), a saved `analyze --json` document (FILE.json), or a "
                        "state: a name (radial, azimuthal, hybrid_plus, hybrid_minus, a product such as H,h) "
                        "or four amplitudes such as '0.6,0,0,0.8j'")
    p.add_argument("--target", required=True, metavar="NAME_OR_STATE",
                   help="the beam wanted: a name or four amplitudes (basis |H,h>, |H,v>, |V,h>, |V,v>)")
    p.add_argument("--json", action="store_true", help="print the result as JSON")
    p.add_argument("--converter-axis", type=float, metavar="DEG", default=None,
                   help="the mode converter is mounted at this fixed axis angle (default: a stage turns it)")
    p.add_argument("--tolerance", type=float, default=1e-3, metavar="F",
                   help="certify the optimum to within this fidelity where no closed form exists (default 1e-3)")
    p.add_argument("--bootstrap", type=int, default=200, metavar="N", help="bootstrap resamples (default 200)")
    p.add_argument("--seed", type=int, default=0, help="seed of the bootstrap (default 0)")
    p.set_defaults(handler=run)


def parse_state(text: str, what: str):
    """A 4-ket from a name (joint mode or product ``P,s``) or four comma-separated amplitudes.

    Raises
    ------
    UsageError
        With the names and the format expected.
    """
    import numpy as np

    from lightloom.sequencer.errors import UsageError
    from lightloom.sequencer.optics.states import (
        JOINT_KETS, POLARIZATION_KETS, SPATIAL_KETS, normalize_ket, parse_complex,
    )

    name = text.strip()
    if name in JOINT_KETS:
        return np.array(JOINT_KETS[name]), name
    parts = [p.strip() for p in name.split(",")]
    if len(parts) == 2 and parts[0] in POLARIZATION_KETS and parts[1] in SPATIAL_KETS:
        return np.kron(POLARIZATION_KETS[parts[0]], SPATIAL_KETS[parts[1]]), name
    expected = (f"{what}: expected a joint mode ({', '.join(JOINT_KETS)}), a product such as H,h or D,l+, "
                "or four amplitudes in the basis |H,h>, |H,v>, |V,h>, |V,v> such as '1,0,0,1'")
    if len(parts) != 4:
        raise UsageError(f"{expected}; got {text!r}")
    try:
        amps = np.array([parse_complex(p) for p in parts])
        return normalize_ket(amps), "ket(" + ",".join(parts) + ")"
    except Exception as exc:  # a bad number or a zero vector
        raise UsageError(f"{expected}; got {text!r} ({exc})") from None


def _fmt_vs(figure: dict) -> str:
    text = f"{figure['value']:.4f}"
    if figure.get("std") is not None:
        text += f" ± {figure['std']:.2g}"
    if figure.get("interval"):
        lo, hi = figure["interval"]
        text += f"  (95% {lo:.4f} to {hi:.4f})"
    return text


def run(args: argparse.Namespace) -> int:
    import numpy as np

    from lightloom.sequencer.analysis.advice import advise, pulled_back_target
    from lightloom.sequencer.errors import UsageError

    if args.bootstrap < 2:
        raise UsageError("--bootstrap needs at least 2 resamples")
    if args.converter_axis is not None and not np.isfinite(args.converter_axis):
        raise UsageError("--converter-axis: expected a finite angle in degrees")
    if not (np.isfinite(args.tolerance) and 1e-6 <= args.tolerance <= 0.1):
        raise UsageError("--tolerance: expected a fidelity between 1e-6 and 0.1 (smaller takes longer)")
    target, target_label = parse_state(args.target, "--target")
    estimates = None
    if Path(args.source).suffix == ".json":
        rho = _from_analysis_json(args.source)
        source = {"kind": "analysis", "file": args.source}
    elif Path(args.source).suffix in (".h5", ".journal") or Path(args.source).exists():
        rho, estimates = _measured(args)
        source = {"kind": "run", "file": args.source}
    else:
        ket, label = parse_state(args.source, "FILE_OR_STATE (not an existing run file)")
        rho = np.outer(ket, ket.conj())
        source = {"kind": "state", "state": label}
    adv = advise(rho, target, converter_axis_deg=args.converter_axis, tol=args.tolerance,
                 rng=np.random.default_rng(args.seed))

    std_fidelity = std_best = std_now = (None, None)
    if estimates is not None:
        std_now = estimates(np.outer(target, target.conj()))
        std_fidelity = estimates(pulled_back_target(target, adv.unitary))
        same = np.allclose(abs(np.vdot(adv.unitary.conj().T @ target, adv.best_unitary.conj().T @ target)), 1.0,
                           atol=1e-9)
        std_best = std_fidelity if same else estimates(pulled_back_target(target, adv.best_unitary))
    limited = "source" if adv.fidelity >= adv.best_local.value - SETTINGS_MATCH else "elements"
    doc = {
        "source": source,
        "target": {
            "name": target_label,
            "ket": {"real": target.real.tolist(), "imag": target.imag.tolist()},
            "concurrence": adv.target_concurrence,
        },
        "settings": adv.settings.as_json(),
        "fidelity": {"value": adv.fidelity, "std": std_fidelity[0], "interval": std_fidelity[1]},
        "fidelity_without_correction": {"value": adv.fidelity_now, "std": std_now[0], "interval": std_now[1]},
        "best_local_fidelity": {
            "value": adv.best_local.value, "std": std_best[0], "interval": std_best[1],
            "upper_bound": adv.best_local.upper_bound, "method": adv.best_local.method,
        },
        "certificate": {
            "upper_bound": adv.fidelity_upper_bound,
            "gap": adv.fidelity_upper_bound - adv.fidelity,
            "how": adv.search,
        },
        "remaining_error": limited,
        "std_from": ("bootstrap replicates of the reconstructed state (the best local fidelity's std "
                     "is that of the fidelity at its optimal unitaries, to first order)")
        if estimates is not None else "a state given without its replicates: no std",
    }
    if args.json:
        print(json.dumps(doc, indent=1))
    else:
        _print_text(doc)
    return 0


def _from_analysis_json(path: str):
    """The density matrix of a saved ``analyze --json`` document (no replicates: no std)."""
    import numpy as np

    from lightloom.sequencer.errors import OpticsError, UsageError
    from lightloom.sequencer.optics.states import normalize_density

    try:
        doc = json.loads(Path(path).read_text(encoding="utf-8"))
        dm = doc["density_matrix"]
        rho = np.asarray(dm["real"], dtype=float) + 1j * np.asarray(dm["imag"], dtype=float)
    except FileNotFoundError:
        raise UsageError(f"{path}: no such file") from None
    except (OSError, ValueError, KeyError, TypeError) as exc:
        raise UsageError(f"{path}: expected the JSON document of `lightloom analyze --json` with a "
                         f"density_matrix {{real, imag}} ({type(exc).__name__}: {exc})") from None
    if rho.shape != (4, 4):
        raise UsageError(f"{path}: the advisor needs a joint (4x4) density matrix, this one is {rho.shape[0]}x{rho.shape[1]}"
                         if rho.ndim == 2 else f"{path}: density_matrix is not a matrix")
    try:
        return normalize_density(rho, tol=1e-6)
    except OpticsError as exc:
        raise UsageError(f"{path}: {exc}") from None


def _measured(args: argparse.Namespace):
    """The maximum-likelihood 4x4 state of the run, and a function giving the bootstrap std and 95%
    interval of the fidelity to any (pulled-back) target density matrix."""
    import numpy as np

    from lightloom.sequencer.analysis.pipeline import AnalysisError, estimate, prepare
    from lightloom.sequencer.errors import UsageError
    from lightloom.sequencer.storage.store import load_run

    data = load_run(args.source)
    if len(data.header.analyzes) != 2:
        raise UsageError(
            f"{args.source}: the run measured only the {data.header.analyzes[0]} factor; the advisor needs a "
            "joint (4x4) state, e.g. from joint-16 or joint-36"
        )
    try:
        prep = prepare(data)
        first = estimate(prep, target=None, rng=np.random.default_rng(args.seed), n_bootstrap=2)
    except AnalysisError as exc:
        raise UsageError(f"{args.source}: {exc}") from None

    def std_of_fidelity_to(target_rho) -> tuple[float, list[float] | None]:
        # Same seed for every call: the same replicates, so the stds are comparable.
        est = estimate(prep, target=target_rho, rng=np.random.default_rng(args.seed), n_bootstrap=args.bootstrap)
        fig = est.figures["fidelity"]
        interval = [float(fig[2][0]), float(fig[2][1])] if len(fig) > 2 else None
        return float(fig[1]), interval

    return first.rho, std_of_fidelity_to


def _print_text(doc: dict) -> None:
    from rich.console import Console
    from rich.table import Table

    console = Console()
    s = doc["settings"]
    src = doc["source"].get("file") or doc["source"].get("state")
    console.print(f"[bold]advice[/bold]: {src} -> {doc['target']['name']}", highlight=False)
    table = Table(show_header=True, header_style="bold", box=None, pad_edge=False)
    table.add_column("element (in the order the beam meets them)")
    table.add_column("setting", justify="right")
    table.add_row("quarter-wave plate 1", f"{s['quarter_wave_plate_1_deg']:.2f} deg")
    table.add_row("half-wave plate", f"{s['half_wave_plate_deg']:.2f} deg")
    table.add_row("quarter-wave plate 2", f"{s['quarter_wave_plate_2_deg']:.2f} deg")
    table.add_row("pi/2 mode converter", "out" if s["mode_converter"] == "out" else f"in, axis {s['mode_converter_deg']:.2f} deg")
    table.add_row("image rotator", "out" if s["image_rotator"] == "out" else f"in, {s['image_rotator_deg']:.2f} deg")
    console.print(table)
    f, b, n = doc["fidelity"], doc["best_local_fidelity"], doc["fidelity_without_correction"]
    console.print(f"  fidelity after these settings   {_fmt_vs(f)}", highlight=False)
    console.print(f"  best with any local transform   {_fmt_vs(b)}", highlight=False)
    console.print(f"  fidelity as measured            {_fmt_vs(n)}", highlight=False)
    if doc["remaining_error"] == "source":
        console.print("  these settings reach the best any local transformation can:", highlight=False)
        console.print("  what is left is in the source", highlight=False)
    else:
        console.print("  the elements on hand cannot reach the local optimum: a more general", highlight=False)
        console.print("  spatial transformation would gain the difference", highlight=False)
    c = doc["certificate"]
    console.print(f"  certified: at most {c['upper_bound']:.4f} reachable (gap {c['gap']:.1e})", highlight=False)
    console.print(f"  how: {c['how']}", highlight=False)

"""Benchmark: coverage of bootstrap 95% intervals for concurrence, purity and fidelity (joint 36 set, Poisson counts).

Run on demand: ``PYTHONPATH=. python tests/benchmarks/bench_interval_coverage.py [--runs N] [--resamples M]``.
For each true state and signal level, simulates N experiments, estimates by maximum likelihood,
bootstraps (M replicates drawn around the fitted state, as sequencer.estimate.bootstrap does,
and, for comparison, around the raw counts), and prints the fraction of intervals that contain
the true value: estimate +- 1.96 sd, and the 2.5-97.5% percentile interval. It also prints the
bias of the estimate in units of its spread, which is where low counts hurt.
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from lightloom.sequencer.analysis.estimate import merit, mle_poisson_batch
from lightloom.sequencer.analysis.estimate.bootstrap import parametric_bootstrap

R2 = 1 / np.sqrt(2)
KETS = [np.array(k, dtype=complex) for k in ([1, 0], [0, 1], [R2, R2], [R2, -R2], [R2, 1j * R2], [R2, -1j * R2])]
JOINT36 = np.array([np.outer(np.kron(a, b), np.kron(a, b).conj()) for a in KETS for b in KETS])
RADIAL = np.array([1, 0, 0, 1], dtype=complex) * R2

FIGURES = {
    "concurrence": merit.concurrence,
    "purity": merit.purity,
    "fidelity": lambda rho: merit.fidelity_to_ket(rho, RADIAL),
}


def source_state(visibility: float) -> np.ndarray:
    """A radial mode mixed with white noise, its polarization rotated by 0.2 rad (our own scenario)."""
    c, s = np.cos(0.2), np.sin(0.2)
    u = np.kron(np.array([[c, -s], [s, c]]), np.eye(2))
    rho = visibility * np.outer(RADIAL, RADIAL.conj()) + (1 - visibility) * np.eye(4) / 4
    return u @ rho @ u.T


def raw_count_bootstrap(counts: np.ndarray, n_resamples: int, rng: np.random.Generator) -> dict[str, np.ndarray]:
    """The alternative: Poisson replicates around the measured counts themselves."""
    draws = rng.poisson(counts, size=(n_resamples, counts.size)).astype(float)
    draws[draws.sum(axis=1) == 0, 0] = 1.0
    rho = mle_poisson_batch(JOINT36, draws).rho
    return {name: f(rho) for name, f in FIGURES.items()}


def run_level(truth: np.ndarray, per_setting: float, runs: int, resamples: int, rng: np.random.Generator) -> None:
    expected = per_setting * 36 * np.real(np.einsum("nij,ji->n", JOINT36, truth)) / 9.0
    true_values = {name: float(f(truth[None])[0]) for name, f in FIGURES.items()}
    hits = {key: {name: 0 for name in FIGURES} for key in ("fit_sd", "fit_pct", "raw_sd", "raw_pct")}
    estimates = {name: [] for name in FIGURES}
    sds = {name: [] for name in FIGURES}
    for _ in range(runs):
        counts = rng.poisson(expected).astype(float)
        result = parametric_bootstrap(JOINT36, counts, FIGURES, rng=rng, n_resamples=resamples)
        raw = raw_count_bootstrap(counts, resamples, rng)
        for name in FIGURES:
            value, truth_value = result.figures[name].value, true_values[name]
            estimates[name].append(value)
            sds[name].append(result.figures[name].std)
            for key, samples in (("fit", result.samples[name]), ("raw", raw[name])):
                sd = np.std(samples, ddof=1)
                hits[f"{key}_sd"][name] += abs(value - truth_value) <= 1.96 * sd
                lo, hi = np.percentile(samples, [2.5, 97.5])
                hits[f"{key}_pct"][name] += lo <= truth_value <= hi
    print(f"  {per_setting:>7.0f} counts per setting, {runs} runs, {resamples} replicates each")
    print("    figure        true    mean est  bias/sd  boot sd/emp sd | coverage: fit+-1.96sd  fit pct  raw+-1.96sd  raw pct")
    for name in FIGURES:
        est = np.array(estimates[name])
        emp = np.std(est, ddof=1)
        bias = (est.mean() - true_values[name]) / emp
        print(f"    {name:<12} {true_values[name]:7.4f}  {est.mean():8.4f}  {bias:+7.2f}  {np.mean(sds[name]) / emp:10.2f}    |"
              f"      {hits['fit_sd'][name] / runs:6.3f}      {hits['fit_pct'][name] / runs:6.3f}"
              f"      {hits['raw_sd'][name] / runs:6.3f}     {hits['raw_pct'][name] / runs:6.3f}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--runs", type=int, default=400)
    parser.add_argument("--resamples", type=int, default=100)
    args = parser.parse_args()
    rng = np.random.default_rng(31415)
    start = time.perf_counter()
    for visibility in (0.85, 0.98):
        print(f"true state: radial mode, visibility {visibility} (white noise), polarization rotated 0.2 rad")
        for per_setting in (100.0, 10000.0):
            run_level(source_state(visibility), per_setting, args.runs, args.resamples, rng)
    print(f"elapsed {time.perf_counter() - start:.0f} s")


if __name__ == "__main__":
    main()

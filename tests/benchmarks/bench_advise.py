"""Benchmark: the advisor's time and certificate gap on random mixed states and random pure targets.

Run on demand: ``python tests/benchmarks/bench_advise.py [--trials N] [--seed S]``.
For each trial, a random rank-2 joint state and a random pure target: the best local fidelity
(value, certified upper bound), the correction-stack optimum, the time of each, and how often the
stack's elements reach the best local fidelity. A maximally entangled target (closed form) is
timed for comparison.
"""

from __future__ import annotations

import argparse
import time

import numpy as np

from lightloom.sequencer.analysis.advice import advise, best_local
from lightloom.sequencer.optics.states import JOINT_KETS


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--trials", type=int, default=20)
    parser.add_argument("--seed", type=int, default=1)
    args = parser.parse_args()
    rng = np.random.default_rng(args.seed)
    t_local, t_advise, gaps, lab_gaps, reached = [], [], [], [], 0
    for _ in range(args.trials):
        g = rng.normal(size=(4, 2)) + 1j * rng.normal(size=(4, 2))
        rho = g @ g.conj().T
        rho /= np.trace(rho).real
        target = rng.normal(size=4) + 1j * rng.normal(size=4)
        t0 = time.perf_counter()
        local = best_local(rho, target)
        t1 = time.perf_counter()
        a = advise(rho, target)
        t2 = time.perf_counter()
        t_local.append(t1 - t0)
        t_advise.append(t2 - t1)
        gaps.append(local.upper_bound - local.value)
        lab_gaps.append(a.fidelity_upper_bound - a.fidelity)
        reached += a.fidelity >= local.value - 1e-9
    t0 = time.perf_counter()
    for _ in range(args.trials):
        advise(rho, JOINT_KETS["radial"])
    t_closed = (time.perf_counter() - t0) / args.trials
    print(f"trials: {args.trials} random rank-2 states, random pure targets")
    print(f"best local:  median {np.median(t_local):.2f} s, max {np.max(t_local):.2f} s; "
          f"certificate gap median {np.median(gaps):.1e}, max {np.max(gaps):.1e}")
    print(f"advise:      median {np.median(t_advise):.2f} s, max {np.max(t_advise):.2f} s; "
          f"certificate gap median {np.median(lab_gaps):.1e}, max {np.max(lab_gaps):.1e}")
    print(f"the stack's elements reach the best local fidelity in {reached} of {args.trials}")
    print(f"maximally entangled target (closed form): {t_closed * 1e3:.1f} ms per advice")


if __name__ == "__main__":
    main()

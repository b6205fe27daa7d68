"""Benchmark: batched Poisson maximum likelihood against cvxpy (CLARABEL, tight tolerances), d = 4 and d = 8.

Run on demand: ``PYTHONPATH=. python tests/benchmarks/bench_mle_speed.py [--quick]``. Prints, from
one run, the median time per data set of each solver, their ratio, and the worst difference of
log-likelihood (ours minus cvxpy's, evaluated at each solver's state; >= -1e-6 is the requirement).
Requirement: the batch at least 10x faster than cvxpy at d = 4 and 50x at d = 8.
"""

from __future__ import annotations

import sys
import time
import warnings

import cvxpy as cp
import numpy as np

from lightloom.sequencer.analysis.estimate import mle_poisson, mle_poisson_batch

R2 = 1 / np.sqrt(2)
KETS = [np.array(k, dtype=complex) for k in ([1, 0], [0, 1], [R2, R2], [R2, -R2], [R2, 1j * R2], [R2, -1j * R2])]


def product_projectors(factors: int) -> np.ndarray:
    """All 6^factors products of the six single-qubit analyzer states (36 for d = 4, 216 for d = 8)."""
    kets = [np.ones(1, dtype=complex)]
    for _ in range(factors):
        kets = [np.kron(k, q) for k in kets for q in KETS]
    return np.array([np.outer(k, k.conj()) for k in kets])


def random_state(d: int, rng: np.random.Generator, rank: int) -> np.ndarray:
    g = rng.normal(size=(d, rank)) + 1j * rng.normal(size=(d, rank))
    rho = g @ g.conj().T
    return rho / np.trace(rho).real


def log_likelihood(operators: np.ndarray, t: np.ndarray, counts: np.ndarray) -> float:
    mu = np.real(np.einsum("nij,ji->n", operators, t))
    used = counts > 0
    return float(np.sum(counts[used] * np.log(mu[used])) - np.sum(mu))


class CvxpyPoisson:
    """The same problem in cvxpy, compiled once (counts as a parameter) and solved per data set."""

    def __init__(self, operators: np.ndarray) -> None:
        n, d, _ = operators.shape
        self.x = cp.Variable((d, d), hermitian=True)
        self.counts = cp.Parameter(n, nonneg=True)
        mu = cp.real(operators.transpose(0, 2, 1).reshape(n, d * d) @ cp.vec(self.x, order="C"))
        objective = cp.sum(cp.multiply(self.counts, cp.log(mu))) - cp.real(cp.trace(operators.sum(0) @ self.x))
        self.problem = cp.Problem(cp.Maximize(objective), [self.x >> 0])

    def solve(self, counts: np.ndarray) -> np.ndarray:
        self.counts.value = counts
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            self.problem.solve(solver="CLARABEL", tol_gap_abs=1e-10, tol_gap_rel=1e-10, tol_feas=1e-10,
                               max_iter=500)
        w, v = np.linalg.eigh((self.x.value + self.x.value.conj().T) / 2)
        return (v * np.maximum(w, 0.0)) @ v.conj().T


def data_sets(operators: np.ndarray, batch: int, per_setting: float, rng: np.random.Generator) -> np.ndarray:
    """Poisson counts from true states of every rank (boundary and interior optima), ~per_setting each."""
    d = operators.shape[1]
    out = []
    for i in range(batch):
        rho = random_state(d, rng, 1 + i % d)
        p = np.real(np.einsum("nij,ji->n", operators, rho))
        out.append(rng.poisson(per_setting * p / p.mean()))
    return np.array(out, dtype=float)


def run(d_factors: int, batch: int, n_cvx: int, rng: np.random.Generator) -> tuple[float, float]:
    ops = product_projectors(d_factors)
    d = ops.shape[1]
    counts = data_sets(ops, batch, 100.0, rng)
    mle_poisson_batch(ops, counts[:2])  # warm-up
    start, cpu = time.perf_counter(), time.process_time()
    ours = mle_poisson_batch(ops, counts)
    batch_time = (time.perf_counter() - start) / batch
    batch_cpu = (time.process_time() - cpu) / batch
    single = []
    for c in counts[:n_cvx]:
        start = time.perf_counter()
        mle_poisson(ops, c)
        single.append(time.perf_counter() - start)
    solver = CvxpyPoisson(ops)
    solver.solve(counts[0])  # compile once, outside the timing
    cvx_times, cvx_cpu, diffs = [], [], []
    for i, c in enumerate(counts[:n_cvx]):
        start, cpu = time.perf_counter(), time.process_time()
        t_ref = solver.solve(c)
        cvx_times.append(time.perf_counter() - start)
        cvx_cpu.append(time.process_time() - cpu)
        diffs.append(ours.log_likelihood[i] - log_likelihood(ops, t_ref, c))
    cvx_median = float(np.median(cvx_times))
    ratio = cvx_median / batch_time
    print(f"d={d}: {len(ops)} operators, batch of {batch} data sets (~100 counts per setting)")
    print(f"  ours, batched     : {batch_time * 1e3:8.3f} ms per data set (CPU {batch_cpu * 1e3:.3f} ms) "
          f"(iterations median {np.median(ours.iterations):.0f}, max {ours.iterations.max()}, "
          f"all certified: {bool(ours.converged.all())}, largest certified gap {ours.certified_gap.max():.2e})")
    print(f"  ours, one at a time: {np.median(single) * 1e3:7.3f} ms median")
    print(f"  cvxpy CLARABEL    : {cvx_median * 1e3:8.3f} ms median over {n_cvx} data sets "
          f"(CPU {np.median(cvx_cpu) * 1e3:.3f} ms)")
    print(f"  ratio cvxpy / ours batched: {ratio:.1f}x wall-clock, {np.median(cvx_cpu) / batch_cpu:.1f}x CPU time")
    print(f"  log-likelihood ours - cvxpy: worst {min(diffs):+.2e}, best {max(diffs):+.2e}")
    return ratio, min(diffs)


def main() -> int:
    quick = "--quick" in sys.argv
    rng = np.random.default_rng(20240611)
    r4, w4 = run(2, 100 if quick else 400, 20 if quick else 60, rng)
    r8, w8 = run(3, 40 if quick else 200, 5 if quick else 20, rng)
    ok = r4 >= 10 and r8 >= 50 and min(w4, w8) >= -1e-6
    print(f"requirement (>=10x at d=4, >=50x at d=8, log-likelihood >= cvxpy - 1e-6): {'met' if ok else 'NOT met'}")
    return 0 if ok else 1


if __name__ == "__main__":
    sys.exit(main())

"""Benchmark: `occfuse evaluate` core, 8 rules x 10 nodes x 100,000 trials, against a bare numpy baseline.

The baseline is what a straightforward script would do for the same job size: for each of the 8 rules,
draw 10 x 100,000 energies under H0 and under H1 (the same laws as evaluate: Gamma(N, 1) and
ncx2(2N, 2N snr |h|^2)/2 with Rayleigh |h|^2) and threshold them.  evaluate does more (ROC sweep, Pd at
the target Pf with intervals, falsifier sensitivity for 0..6 falsifiers, the optimal k, the analytic
curves and a fuse() calibration run) but draws once for all rules.  Run: python tests/bench/bench_evaluate.py
"""

import os
import time

os.environ.setdefault("OMP_NUM_THREADS", "1")

import numpy as np  # noqa: E402

from sim_nodes import evaluate as ev  # noqa: E402

N_RULES, N_NODES, TRIALS, N, SNR_DB = 8, 10, 100_000, 1000, -8.0
RULES = "or,and,k_of_n:3,majority,chair_varshney,egc,llr,weighted_llr"


def baseline(seed=0):
    rng = np.random.default_rng(seed)
    snr = 10 ** (SNR_DB / 10)
    tau = 1000.0
    hits = 0
    for _ in range(N_RULES):
        t0 = rng.gamma(N, 1.0, (N_NODES, TRIALS))
        h2 = rng.exponential(1.0, (N_NODES, TRIALS))
        t1 = rng.noncentral_chisquare(2 * N, 2 * N * snr * h2) / 2
        hits += int(np.count_nonzero(t0 > tau)) + int(np.count_nonzero(t1 > tau))
    return hits


def main():
    setup = ev.homogeneous_setup(N_NODES, SNR_DB, N, "rayleigh")
    specs = ev.parse_rules(RULES, N_NODES)
    assert len(specs) == N_RULES
    a = time.perf_counter()
    baseline()
    base = time.perf_counter() - a
    a = time.perf_counter()
    report = ev.evaluate(setup, specs, trials=TRIALS, target_pf=0.1, seed=1)
    ours = time.perf_counter() - a
    assert report["trials"] == TRIALS
    print(f"bare numpy draw-and-threshold (8 rules x 10 nodes x 100,000 trials): {base:.2f} s")
    print(f"sim_nodes.evaluate (same size, full report):                        {ours:.2f} s")
    print(f"ratio evaluate / baseline: {ours / base:.2f}  (targets: < 10 s and ratio <= 2)")


if __name__ == "__main__":
    main()

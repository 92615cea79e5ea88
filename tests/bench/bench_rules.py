"""One epoch's fusion math for 1,000 nodes x 256 channels with weighted_llr, against bare numpy.

Issue target: rules.fuse well under 100 ms, and within 3x of a bare numpy expression doing
the same arithmetic on the same arrays. The bare expression computes the same statistic
(mask, trust-weighted clipped LLR, sum over nodes), the same null cumulants (Wilson-Hilferty
form, closed form), the Pearson shifted-gamma threshold and the posterior, with no input
checks, no special cases and no result object, on whole arrays (rules.fuse works through the
cumulants in cache-sized blocks, so it can beat the bare form). Also printed: the statistic
and posterior alone, the floor of any implementation.

Run: python tests/bench/bench_rules.py [--nodes N] [--channels C] [--repeat R]
"""

from __future__ import annotations

import argparse
import time

import numpy as np
from scipy import special, stats

from fusion.detection import rules


def best_of(fn, repeat):
    times = []
    for _ in range(repeat):
        t0 = time.perf_counter()
        fn()
        times.append(time.perf_counter() - t0)
    return min(times)


def bare_statistic(t, n, g, s, prior, c):
    mask = ~np.isnan(t)
    a = g / (1.0 + g)
    term = np.clip(s * (a * np.where(mask, t, 0.0) - n * np.log1p(g)), -c, c)
    llr = np.sum(np.where(mask, term, 0.0), axis=0)
    return llr, special.expit(np.log(prior / (1 - prior)) + llr)


def bare_threshold(t, n, g, s, c, pf):
    mask = ~np.isnan(t)
    alpha, beta = s * g / (1 + g), s * n * np.log1p(g)
    m, sd = 1 - 1 / (9 * n), 1 / (3 * np.sqrt(n))
    u_a, u_b = np.cbrt(np.maximum(beta - c, 0) / (alpha * n)), np.cbrt((beta + c) / (alpha * n))
    z_a, z_b = (u_a - m) / sd, (u_b - m) / sd
    f_lo, s_hi = special.ndtr(z_a), special.ndtr(-z_b)
    p_a, p_b = np.exp(-0.5 * z_a**2) * sd / np.sqrt(2 * np.pi), np.exp(-0.5 * z_b**2) * sd / np.sqrt(2 * np.pi)
    i = [1 - f_lo - s_hi]
    i.append(m * i[0] + p_a - p_b)
    ua, ub = u_a, u_b
    for j in range(2, 10):
        i.append(m * i[j - 1] + sd * sd * (j - 1) * i[j - 2] + ua * p_a - ub * p_b)
        ua, ub = ua * u_a, ub * u_b
    k = alpha * n
    m1 = c * (s_hi - f_lo) + k * i[3] - beta * i[0]
    m2 = c * c * (f_lo + s_hi) + k * k * i[6] - 2 * k * beta * i[3] + beta * beta * i[0]
    m3 = c**3 * (s_hi - f_lo) + k**3 * i[9] - 3 * k * k * beta * i[6] + 3 * k * beta * beta * i[3] - beta**3 * i[0]
    k1 = np.sum(np.where(mask, m1, 0), axis=0)
    k2 = np.sum(np.where(mask, m2 - m1**2, 0), axis=0)
    k3 = np.sum(np.where(mask, m3 - 3 * m1 * m2 + 2 * m1**3, 0), axis=0)
    shape, scale = 4 * k2**3 / k3**2, k3 / (2 * k2)
    return stats.gamma.isf(pf, shape, loc=k1 - shape * scale, scale=scale)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--nodes", type=int, default=1000)
    ap.add_argument("--channels", type=int, default=256)
    ap.add_argument("--repeat", type=int, default=7)
    args = ap.parse_args(argv)

    rng = np.random.default_rng(1)
    shape = (args.nodes, args.channels)
    n = np.full(shape, 1000.0)                                   # as the engine passes it: per cell
    snr = 10 ** (rng.uniform(-15, -5, size=shape) / 10)          # learned per node and channel
    occ = rng.random(args.channels) < 0.3
    t = rng.gamma(n, np.where(occ, 1.0 + snr, 1.0))
    t[rng.random(shape) < 0.05] = np.nan                         # some reports missing
    trust = rng.uniform(0.5, 1.0, size=args.nodes)
    prior, c, pf = np.full(args.channels, 0.3), rules.DEFAULT_CLIP, 0.01

    print(f"weighted_llr, {args.nodes} nodes x {args.channels} channels, best of {args.repeat} runs")
    floor = best_of(lambda: bare_statistic(t, n, snr, trust[:, None], prior, c), args.repeat)
    bare = best_of(lambda: (bare_statistic(t, n, snr, trust[:, None], prior, c),
                            bare_threshold(t, n, snr, trust[:, None], c, pf)), args.repeat)
    fuse = best_of(lambda: rules.fuse(t, n, rule="weighted_llr", target_pf=pf, snr=snr, trust=trust,
                                      prior=prior), args.repeat)
    print(f"  bare numpy, statistic + posterior only   : {floor * 1e3:7.1f} ms")
    print(f"  bare numpy, same arithmetic (+ threshold): {bare * 1e3:7.1f} ms")
    print(f"  rules.fuse                               : {fuse * 1e3:7.1f} ms   ratio to bare {fuse / bare:.2f}x")
    print(f"  target: rules.fuse under 100 ms ({'met' if fuse < 0.1 else 'NOT met'}), "
          f"ratio under 3x ({'met' if fuse / bare < 3 else 'NOT met'})")


if __name__ == "__main__":
    main()

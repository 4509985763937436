"""Benchmark: batched fit of the whole candidate set against a plain per-window scipy loop.

Run from the repository root::

    .venv/bin/python tests/benchmarks/bench_fit.py [--windows 2000] [--n 250] [--loop-every 10]

Data: rolling windows of length n over one simulated path whose copula changes from Gaussian
to Clayton to Student-t (demo data, invented). Every window is ranked into pseudo-observations.

Baseline, written as a practitioner would: one ``scipy.optimize`` call per window and family
slot (``minimize_scalar(method="bounded")`` for one parameter, ``minimize(method="L-BFGS-B")``
from tau inversion for two), with ``scipy.stats`` quantile functions inside the Gaussian and
Student-t likelihoods and the same closed-form densities as the library for the Archimedean
families. The loop runs on every ``loop-every``-th window; its time is scaled to all windows.
Agreement: |loglik(batched) - loglik(loop)| on those windows, and the largest amount by which
the batched optimum falls short of the loop's ("loop-batch"; negative means the batched fit
was at least as good everywhere). Prints per-family and total ratios; nothing here is a
pass/fail test.
"""

from __future__ import annotations

import argparse
import time

import numpy as np
from numpy.lib.stride_tricks import sliding_window_view
from scipy import optimize, special, stats

from monitor.stats.copulas import FAMILY_NAMES, family
from monitor.stats.empirical import kendall_tau, pseudo_observations
from monitor.stats.fitting import candidate_slots, fit_batched


def rolling_pseudo_observations(windows: int, n: int, seed: int):
    rng = np.random.default_rng(seed)
    total = windows + n - 1
    seg = total // 3
    parts = [
        family("gaussian").sample(seg, (0.5,), rng),
        family("clayton").sample(seg, (1.0,), rng),
        family("student_t").sample(total - 2 * seg, (0.5, 5.0), rng),
    ]
    uv = np.vstack(parts)
    u = pseudo_observations(sliding_window_view(uv[:, 0], n))
    v = pseudo_observations(sliding_window_view(uv[:, 1], n))
    return u, v


# ----------------------------------------------------------------------------- the plain loop
def _gaussian_nll(rho, u, v):
    x = stats.norm.ppf(u)
    y = stats.norm.ppf(v)
    r2 = 1.0 - rho * rho
    return -np.sum(-0.5 * np.log(r2) - (rho * rho * (x * x + y * y) - 2 * rho * x * y) / (2 * r2))


def _student_nll(params, u, v):
    rho, nu = params
    x = stats.t.ppf(u, nu)
    y = stats.t.ppf(v, nu)
    r2 = 1.0 - rho * rho
    q = (x * x - 2 * rho * x * y + y * y) / (nu * r2)
    log_f2 = (special.gammaln((nu + 2) / 2) - special.gammaln(nu / 2) - np.log(nu * np.pi)
              - 0.5 * np.log(r2) - (nu + 2) / 2 * np.log1p(q))
    return -np.sum(log_f2 - stats.t.logpdf(x, nu) - stats.t.logpdf(y, nu))


def loop_fit(fam, u, v, tau):
    """One window, one family slot: the practitioner's scipy call. Returns the loglik."""
    if fam.n_params == 0:
        return 0.0
    if fam.rotation in (0, 180) and len(fam.rotations) > 1 and tau < 0:
        fam = family(fam.name, fam.rotation + 90)
    if fam.name == "gaussian":
        res = optimize.minimize_scalar(_gaussian_nll, bounds=fam.fit_bounds[0], args=(u, v),
                                       method="bounded")
        return -res.fun
    if fam.name == "student_t":
        x0 = [float(a) for a in fam.start_params(tau)]
        res = optimize.minimize(_student_nll, x0, args=(u, v), method="L-BFGS-B",
                                bounds=fam.fit_bounds)
        return -res.fun
    if fam.n_params == 1:
        res = optimize.minimize_scalar(
            lambda t: -np.sum(fam.rotated_logpdf(u, v, (t,))), bounds=fam.fit_bounds[0],
            method="bounded")
        return -res.fun
    x0 = [float(a) for a in fam.start_params(tau)]
    res = optimize.minimize(lambda p: -np.sum(fam.rotated_logpdf(u, v, tuple(p))), x0,
                            method="L-BFGS-B", bounds=fam.fit_bounds)
    return -res.fun


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--windows", type=int, default=2000)
    ap.add_argument("--n", type=int, default=250)
    ap.add_argument("--loop-every", type=int, default=10)
    ap.add_argument("--seed", type=int, default=20261201)
    ap.add_argument("--chain", type=int, default=8, help="warm-start lattice step (0: none)")
    args = ap.parse_args()

    u, v = rolling_pseudo_observations(args.windows, args.n, args.seed)
    t0 = time.perf_counter()
    tau = kendall_tau(u, v)
    t_tau = time.perf_counter() - t0
    sample = np.arange(0, args.windows, args.loop_every)
    print(f"{args.windows} rolling windows of n = {args.n}; loop on {sample.size} of them "
          f"(every {args.loop_every}th), scaled to all; Kendall's tau batch {t_tau:.3f} s")
    print(f"{'slot':<15}{'batched s':>10}{'loop s':>10}{'ratio':>8}{'max|dll|':>11}"
          f"{'share<=1e-3':>12}{'loop-batch':>11}{'iters':>7}{'conv':>7}")
    tot_b = tot_l = 0.0
    worst = 0.0
    for fam in candidate_slots(FAMILY_NAMES):
        t0 = time.perf_counter()
        fit = fit_batched(fam, u, v, tau=tau, rotation_by_sign=True, chain=args.chain)
        tb = time.perf_counter() - t0
        t0 = time.perf_counter()
        ll = np.array([loop_fit(fam, u[w], v[w], tau[w]) for w in sample])
        tl = (time.perf_counter() - t0) * args.windows / sample.size
        d = np.abs(fit.loglik[sample] - ll)
        # Positive where the batched optimum is below the loop's (batched worse).
        behind = float(np.max(ll - fit.loglik[sample]))
        tot_b += tb
        tot_l += tl
        worst = max(worst, float(d.max()))
        ratio = tl / tb if tb > 0 else float("inf")
        print(f"{fam.label:<15}{tb:>10.3f}{tl:>10.2f}{ratio:>8.1f}{d.max():>11.2e}"
              f"{np.mean(d <= 1e-3):>12.3f}{behind:>11.1e}{fit.iterations.mean():>7.2f}"
              f"{fit.converged.mean():>7.3f}")
    print(f"{'total':<15}{tot_b:>10.3f}{tot_l:>10.2f}{tot_l / tot_b:>8.1f}{worst:>11.2e}")


if __name__ == "__main__":
    main()

"""Benchmark: the window study with a goodness-of-fit bootstrap, batched against a plain loop.

Run from the repository root::

    .venv/bin/python tests/benchmarks/bench_drilldown.py [--n 500] [--replicates 200]
        [--loop-replicates 3] [--repeat 3]

Data: the ``tail-shift`` scenario (invented; Clayton copula with Kendall's tau 0.35 after the
change), ranked log returns of two assets on their last n common days.

Timed (single process, best of ``--repeat``):

- **one window**: :func:`monitor.engine.window_study.study_window` with ``bootstrap=B`` -- every
  candidate slot fitted, one parametric bootstrap of B replicates per slot (sampling,
  re-ranking, all B refits in one :func:`monitor.stats.fitting.fit_batched` call, Cramer-von Mises
  statistics) giving every slot's p-value and the selected family's intervals -- plus the
  page's extra numbers (:func:`monitor.views.drilldown.window_result`);
- **page study**: two such windows (the study and a reference window of the same length), which
  is what the Drill-down page computes for one click;
- figures and the HTML report of that study;
- a per-slot breakdown of the bootstrap.

Baseline, written as a practitioner would: per replicate and slot, draw n points from the
fitted copula, rank them with ``scipy.stats.rankdata``, refit with the independent
``scipy.optimize`` path :func:`monitor.stats.fitting.fit_copula_reference` and compute the
Cramer-von Mises statistic with an n x n comparison. It runs ``--loop-replicates`` replicates
per slot and its time is scaled to B. Prints seconds and ratios; nothing here is a pass/fail
test.
"""

from __future__ import annotations

import argparse
import time

import numpy as np
import pandas as pd
from scipy import stats

from monitor.engine.window_study import study_window
from monitor.stats.fitting import fit_copula_reference
from monitor.stats.inference import bootstrap_candidates, fit_uncertainty, goodness_of_fit
from monitor.views.drilldown import PairStudy, window_result
from monitor.views.report import report_html
from synthetic_feeds import generate


def _returns(n: int, seed: int) -> tuple[pd.DataFrame, str, str]:
    scen = generate("tail-shift", seed=seed, calm_years=1.0, shifted_years=2.5, n_assets=2)
    a, b = scen.prices.columns[:2]
    ret = np.log(scen.prices[[a, b]]).diff().dropna()
    return ret.iloc[-2 * n:], a, b


def _one_window(frame, a, b, lo, hi, replicates, seed, role):
    t0 = time.perf_counter()
    w = study_window(frame, a, b, kind="returns", start=lo, end=hi, bootstrap=replicates,
                     rng=seed, filter_info={"mode": "none"})
    t1 = time.perf_counter()
    res = window_result(w, frame.loc[lo:hi].index, role, t1 - t0)
    return res, t1 - t0, time.perf_counter() - t1


def _plain_loop(res, replicates: int, seed: int) -> dict[str, float]:
    """Seconds per replicate and slot of the per-replicate scipy loop."""
    rng = np.random.default_rng(seed)
    w = res.window
    n = w.n
    out = {}
    for fit in w.selection.fits:
        fam = fit.copula
        t0 = time.perf_counter()
        for _ in range(replicates):
            uv = fam.sample(n, fit.param_tuple, rng)
            u = stats.rankdata(uv[:, 0]) / (n + 1)
            v = stats.rankdata(uv[:, 1]) / (n + 1)
            refit = fit_copula_reference(fam, u, v)
            emp = np.mean((u[None, :] <= u[:, None]) & (v[None, :] <= v[:, None]), axis=1)
            model = fam.cdf(u, v, refit.param_tuple)
            _ = float(np.sum((emp - model) ** 2))
        out[fit.label] = (time.perf_counter() - t0) / replicates
    return out


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--n", type=int, default=500)
    ap.add_argument("--replicates", type=int, default=200)
    ap.add_argument("--loop-replicates", type=int, default=3)
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--seed", type=int, default=11)
    args = ap.parse_args()
    frame, a, b = _returns(args.n, args.seed)
    dates = frame.index
    study_lo, study_hi = dates[-args.n], dates[-1]
    ref_lo, ref_hi = dates[0], dates[args.n - 1]
    fmt = "%Y-%m-%d"
    print(f"pair {a} / {b}; n = {args.n}; B = {args.replicates} replicates per candidate slot")

    best_one = best_page = best_cpu = np.inf
    for _ in range(args.repeat):
        t0, c0 = time.perf_counter(), time.process_time()
        study, fit_s, extra_s = _one_window(frame, a, b, study_lo.strftime(fmt),
                                            study_hi.strftime(fmt), args.replicates, 1, "study")
        one, cpu = time.perf_counter() - t0, time.process_time() - c0
        ref, *_ = _one_window(frame, a, b, ref_lo.strftime(fmt), ref_hi.strftime(fmt),
                              args.replicates, 2, "reference")
        page = time.perf_counter() - t0
        best_one, best_page, best_cpu = min(best_one, one), min(best_page, page), min(best_cpu,
                                                                                     cpu)
        print(f"  one window {one:6.2f} s wall, {cpu:.2f} s CPU (study_window {fit_s:.2f} s, "
              f"crash/tails {extra_s:.3f} s); page study (two windows) {page:6.2f} s")
    print(f"best: one window {best_one:.2f} s wall / {best_cpu:.2f} s CPU (target <= 3 s); "
          f"page study {best_page:.2f} s")

    # The same bootstrap through the one-family functions: a GoF bootstrap per candidate,
    # then a separate bootstrap for the selected family's intervals.
    w = study.window
    t0 = time.perf_counter()
    for f in w.selection.fits:
        goodness_of_fit(w.u, w.v, f, replicates=args.replicates, rng=5)
    fit_uncertainty(w.selection.selected, replicates=args.replicates, rng=6)
    separate = time.perf_counter() - t0
    t0 = time.perf_counter()
    bootstrap_candidates(w.u, w.v, w.selection.fits, replicates=args.replicates,
                         selected=w.selection.selected, rng=5)
    shared = time.perf_counter() - t0
    print(f"bootstrap alone: shared refits {shared:.2f} s; separate GoF + intervals "
          f"{separate:.2f} s ({separate / shared:.2f}x)")

    pair_study = PairStudy(pair=(a, b), study=study, reference=ref, reference_rule="bench",
                           marginal_mode="none", marginal_key="bench", criterion="aic",
                           families=("all",), replicates=args.replicates, seed=0,
                           seconds=best_page)
    t0 = time.perf_counter()
    doc = report_html(pair_study)
    print(f"figures + HTML report: {time.perf_counter() - t0:.2f} s ({len(doc) / 1e6:.1f} MB)")

    # Per-slot breakdown of the batched bootstrap.
    stamps = [time.perf_counter()]
    labels = []

    def tick(done, total, label):
        stamps.append(time.perf_counter())
        labels.append(label)

    bootstrap_candidates(w.u, w.v, w.selection.fits, replicates=args.replicates,
                         selected=w.selection.selected, rng=3, progress=tick)
    batched = dict(zip(labels, np.diff(stamps), strict=True))
    loop = _plain_loop(study, args.loop_replicates, seed=4)
    print(f"\n{'slot':<14}{'batched s':>10}{'loop s (scaled)':>17}{'ratio':>8}")
    total_b = total_l = 0.0
    for label, sec in batched.items():
        scaled = loop[label] * args.replicates
        total_b += sec
        total_l += scaled
        print(f"{label:<14}{sec:>10.3f}{scaled:>17.2f}{scaled / sec:>8.1f}")
    print(f"{'total':<14}{total_b:>10.3f}{total_l:>17.2f}{total_l / total_b:>8.1f}")
    print(f"(loop: {args.loop_replicates} replicates per slot, scaled to {args.replicates})")


if __name__ == "__main__":
    main()

"""Audit: which ends of each copula family's search box bind, and how often, on real data.

The open daily S&P 500, NASDAQ and WTI series that ship in ``arch`` (1999-2018) are filtered
in-sample with the default marginal candidates; every pair's standardised residuals are
ranked in rolling windows of 250 days (every 5th window end) and every candidate slot is
fitted with the batched estimator. For each slot and parameter the script prints the share
of windows whose estimate sits at the lower or the upper end of the box
(:attr:`monitor.stats.fitting.CopulaFit.at_bound`), how many of those windows select that
slot by AIC, and, where the end is (or approaches) a limit at which the family becomes a
simpler one that is also fitted (BB1's theta -> 0 is Gumbel, delta = 1 Clayton; BB7's theta
= 1 is Clayton, delta -> 0 Joe; the t's nu -> infinity the Gaussian; Clayton, Gumbel and Joe
at their lower ends the independence copula, log-likelihood 0; Joe 1997, sections 4.2 and
5.2), the most log-likelihood the simpler family gains over the fit at the end: a positive
figure is what the box cost.

Run: ``.venv/bin/python tests/benchmarks/audit_fit_box.py [--window 250] [--step 5]``
(about two minutes). Figures are in docs/method.md, "The search box".
"""

from __future__ import annotations

import argparse
from itertools import combinations

import numpy as np
import pandas as pd
from arch.data import nasdaq, sp500, wti
from numpy.lib.stride_tricks import sliding_window_view

from monitor.stats.copulas import FAMILY_NAMES
from monitor.stats.empirical import kendall_tau, pseudo_observations
from monitor.stats.fitting import bounds_hit, candidate_slots, select_batched
from monitor.stats.marginals import filter_series


def _residuals() -> pd.DataFrame:
    out = {}
    for name, mod in (("SP500", sp500), ("NASDAQ", nasdaq), ("WTI", wti)):
        frame = mod.load()
        price = frame["Adj Close"] if "Adj Close" in frame else frame.iloc[:, 0]
        price = price[price > 0].dropna()
        r = np.log(price).diff().dropna().rename(name)
        f = filter_series(r, mode="in-sample")
        out[name] = pd.Series(f.residuals, index=pd.DatetimeIndex(f.dates))
    return pd.DataFrame(out).dropna()


#: (slot's family, end) -> the nested family its limit is (None: independence).
NESTED = {("bb1", "theta lower"): "gumbel", ("bb1", "delta lower"): "clayton",
          ("bb7", "theta lower"): "clayton", ("bb7", "delta lower"): "joe",
          ("student_t", "nu upper"): "gaussian", ("clayton", "theta lower"): None,
          ("gumbel", "theta lower"): None, ("joe", "theta lower"): None}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--window", type=int, default=250)
    ap.add_argument("--step", type=int, default=5)
    args = ap.parse_args()
    z = _residuals()
    print(f"{len(z)} common days {z.index[0]:%Y-%m-%d} to {z.index[-1]:%Y-%m-%d}; "
          f"window {args.window}, every {args.step}th window end")
    slots = candidate_slots(FAMILY_NAMES)
    hits: dict[tuple[str, str], list[float]] = {}
    total = 0
    for a, b in combinations(z.columns, 2):
        u = pseudo_observations(sliding_window_view(z[a].to_numpy(), args.window)[::args.step])
        v = pseudo_observations(sliding_window_view(z[b].to_numpy(), args.window)[::args.step])
        sel = select_batched(u, v, FAMILY_NAMES, "aic", tau=kendall_tau(u, v))
        total += len(u)
        by_slot = {(f.name, f.rotation): fit for f, fit in zip(slots, sel.fits, strict=True)}
        for s, (fam, fit) in enumerate(zip(slots, sel.fits, strict=True)):
            label = fam.name if fam.rotation == 0 else f"{fam.name} {fam.rotation}"
            for w in range(len(u)):
                for end in bounds_hit(fam, tuple(fit.params[w])):
                    counts = hits.setdefault((label, end), [0, 0, -np.inf])
                    counts[0] += 1
                    counts[1] += int(sel.best[w] == s)
                    if (fam.name, end) in NESTED:
                        name = NESTED[fam.name, end]
                        nested = 0.0 if name is None else by_slot.get(
                            (name, fam.rotation), by_slot.get((name, 0))).loglik[w]
                        counts[2] = max(counts[2], nested - fit.loglik[w])
    print(f"{total} windows over 3 pairs; slots never at an end are not listed")
    print(f"{'slot':14s} {'end':14s} {'share':>7s} {'selected there':>15s} "
          f"{'nested gains at most':>21s}")
    for (label, end), (n, chosen, gain) in sorted(hits.items()):
        shown = f"{gain:21.2e}" if np.isfinite(gain) else f"{'-':>21s}"
        print(f"{label:14s} {end:14s} {n / total:7.1%} {int(chosen):>15d} {shown}")


if __name__ == "__main__":
    main()

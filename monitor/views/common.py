"""What the dashboard reads: a store opened with the configuration's settings keys.

The dashboard, the HTML report and the alert e-mails read results through a :class:`StoreView`
so that every number they show carries the settings that produced it (window, families,
criterion, marginal model and mode, signal thresholds).
"""

from __future__ import annotations

import re
from dataclasses import dataclass

from monitor.config import Config
from monitor.data.store import Store
from monitor.engine.pipeline import marginal_settings, rolling_key, rolling_settings, signals_key
from monitor.stats.copulas import FAMILY_NAMES
from monitor.stats.marginals import MarginalSettings
from monitor.stats.rolling import RollingSettings
from monitor.stats.signals import SignalSettings

__all__ = ["SETTINGS_KEY_PATTERN", "StoreView", "settings_words"]

_NUM = r"[-+]?(?:inf|nan|[0-9]*\.?[0-9]+(?:e[-+]?[0-9]+)?)"
_ROLLING = re.compile(rf"^w(?P<window>\d+)/s(?P<step>\d+)/(?P<criterion>[a-z]+)/"
                      rf"q(?P<q>{_NUM})/(?P<families>[a-z0-9_+]+)/v\d+$")
_SIGNALS = re.compile(
    rf"^cusum(?P<ref>{_NUM}):(?P<ce>{_NUM})-(?P<cx>{_NUM}):cap(?P<cap>{_NUM})"
    rf"/window(?P<we>{_NUM})-(?P<wx>{_NUM}):gate(?P<gate>{_NUM})-(?P<hold>{_NUM})"
    rf"/spike(?P<se>{_NUM})-(?P<sx>{_NUM}):ref(?P<refw>\d+)"
    rf"/switch(?P<swe>{_NUM})-(?P<swx>{_NUM}):tail(?P<tail>{_NUM}):aic(?P<aic>{_NUM})"
    rf":last(?P<last>\d+)/days(?P<ed>\d+)-(?P<xd>\d+)"
    rf"(?:/(?:base(?P<z>{_NUM}):min(?P<bmin>\d+)|(?P<gauss>gaussian)):material(?P<mat>{_NUM}))?"
    rf"/v\d+$")
#: What a stored settings key looks like in text (marginal, rolling or signal part): no page
#: may show one (tests search every page for it).
SETTINGS_KEY_PATTERN = re.compile(
    r"cusum[0-9.e+-]+:|(?:real-time|in-sample)/(?:refit|min)\d+|\bw\d+/s\d+/[a-z]+/q")


def _marginal_words(key: str) -> str:
    m = MarginalSettings.from_key(key)
    if m.candidates == MarginalSettings().candidates:
        among = f"BIC choice among the {len(m.candidates)} standard specifications"
    else:
        among = "BIC choice among " + ", ".join(c.label for c in m.candidates)
    if m.mode == "in-sample":
        return (f"marginals: GARCH-type filter, in-sample mode (one fit on all data, at least "
                f"{m.min_obs} observations), {among}")
    every = (f"re-selected every {m.reselect_every} refits" if m.reselect_every
             else "selected once")
    return (f"marginals: GARCH-type filter, real-time mode (refit every {m.refit_every} days "
            f"on data up to that day, first fit on {m.min_obs} observations, specification "
            f"{every}), {among}")


def _rolling_words(part: str) -> str:
    m = _ROLLING.match(part)
    if m is None:
        raise ValueError(part)
    fams = ("all families" if m["families"] == "all"
            else "families " + ", ".join(m["families"].split("+")))
    return (f"rolling copulas: window {m['window']} days, step {m['step']}, {fams}, selection "
            f"by {m['criterion'].upper()}, tail level q = {float(m['q']):g}")


def _signal_words(part: str) -> str:
    m = _SIGNALS.match(part)
    if m is None:
        raise ValueError(part)
    default = part == SignalSettings().key
    head = ("signal thresholds: the calibrated defaults" if default
            else "signal thresholds: set by the configuration")
    if m["z"] is not None:
        against = (f"measured against the pair's own {m['refw']} window ends before the "
                   f"current window, the sequential sum centred {m['z']} standard errors "
                   f"above their mean, from {m['bmin']} of them on")
    else:
        against = "measured against the Gaussian copula at the window's Kendall's tau"
    switch = ("family switch off" if m["swe"] == "inf" else
              f"family switch {m['swe']}/{m['swx']} over the last {m['last']} windows")
    material = ("" if m["mat"] is None else
                f"; no episode opens on a tail whose model-averaged coefficient is below "
                f"{m['mat']}")
    return (f"{head} ({against}; sequential divergence enters at {m['ce']} and leaves below "
            f"{m['cx']}, {m['ref']} nats a day taken off at least, capped at {m['cap']}; "
            f"window divergence {m['we']}/{m['wx']} with tail-excess gate "
            f"{m['gate']}/{m['hold']}; tail spike z {m['se']}/{m['sx']} against "
            f"{m['refw']} reference windows; {switch}{material}; an episode opens after "
            f"{m['ed']} active days and closes after {m['xd']} quiet days)")


def settings_words(key: str, *, short: bool = False) -> str:
    """A stored settings key in words, for every page, report and e-mail.

    Parameters
    ----------
    key : str
        A marginal key (:attr:`monitor.stats.marginals.MarginalSettings.key`), a rolling key
        (marginal key ``|`` rolling part, :func:`monitor.engine.pipeline.rolling_key`) or a signals
        key (rolling key ``|`` :attr:`monitor.stats.signals.SignalSettings.key`).
    short : bool
        Only the parts' headlines (mode, window, whether the thresholds are the defaults).

    Returns
    -------
    str
        The parts in words, joined by "; ". A part that cannot be read is named as "stored
        settings of another version" rather than shown raw.

    Examples
    --------
    >>> settings_words("real-time/refit21/min250/reselect12/all8/v1|w120/s1/aic/q0.1/all/v1",
    ...                short=True)
    'real-time marginals; window 120 days, step 1, all families, AIC'
    """
    if not isinstance(key, str):
        raise TypeError(f"key must be a str, got {type(key).__name__}")
    parts = key.split("|")
    out = []
    for i, part in enumerate(parts):
        try:
            if i == 0:
                if short:
                    out.append(f"{MarginalSettings.from_key(part).mode} marginals")
                else:
                    out.append(_marginal_words(part))
            elif i == 1:
                words = _rolling_words(part)
                if short:
                    m = _ROLLING.match(part)
                    fams = "all families" if m["families"] == "all" else "some families"
                    words = (f"window {m['window']} days, step {m['step']}, {fams}, "
                             f"{m['criterion'].upper()}")
                out.append(words)
            else:
                words = _signal_words(part)
                if short:
                    words = words.split(" (", 1)[0]
                out.append(words)
        except ValueError:
            out.append("stored settings of another version")
    return "; ".join(out)


@dataclass(frozen=True, slots=True)
class StoreView:
    """A store and the keys of the results the configuration selects.

    Parameters
    ----------
    cfg : Config
    store : Store
        Open store (the view does not own it; close the store when done).
    """

    cfg: Config
    store: Store
    marginal_key: str
    rolling_key: str
    signals_key: str
    rolling: RollingSettings

    @classmethod
    def open(cls, cfg: Config, store: Store) -> StoreView:
        """The view of ``store`` under ``cfg``'s settings."""
        return cls(cfg, store, marginal_settings(cfg).key, rolling_key(cfg), signals_key(cfg),
                   rolling_settings(cfg))

    def provenance(self) -> str:
        """One line naming what produced the stored results (shown in every page's footer)."""
        r = self.rolling
        fams = "all families" if set(r.families) == set(FAMILY_NAMES) else ", ".join(r.families)
        return (f"window {r.window} days, step {r.step}, {fams}, selection by "
                f"{r.criterion.upper()}, tail level q = {r.tail_q:g}; marginals: GARCH-type "
                f"filter, {self.cfg.marginals.mode} mode (refit every "
                f"{self.cfg.marginals.refit_every} days); store {self.store.shown_url}")

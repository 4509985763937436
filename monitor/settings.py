"""Every setting that keys stored results, derived from the configuration in one place.

:class:`Settings` turns a :class:`monitor.config.Config` into the statistics layer's settings
(marginal filter, rolling copulas, signal thresholds) and their settings keys; the update job,
the dashboard's view of the store, the report and the e-mails all take their keys and their
provenance line from it. :func:`settings_words` reads a stored key back into words: no page
shows a raw key.

The key strings are part of the store's contract (results stay valid across releases); they
are built by the statistics layer's ``key`` methods and only combined here.
"""

from __future__ import annotations

import re
from dataclasses import dataclass, field, fields

from monitor.config import Config
from monitor.stats.copulas import FAMILY_NAMES
from monitor.stats.marginals import MarginalSettings
from monitor.stats.rolling import RollingSettings
from monitor.stats.signals import SignalSettings

__all__ = ["SETTINGS_KEY_PATTERN", "Settings", "marginal_settings", "rolling_key",
           "rolling_settings", "settings_words", "signals_key"]


@dataclass(frozen=True, slots=True)
class Settings:
    """The settings a configuration asks for, and the keys of the results they produce.

    Parameters
    ----------
    marginal : MarginalSettings
    rolling : RollingSettings
    signals : SignalSettings
        The calibrated defaults unless given (thresholds are not configured in the file).

    Examples
    --------
    >>> Settings.of(Config()).rolling_key
    'real-time/refit21/min250/reselect12/all8/v2|w250/s1/aic/q0.1/all/v1'
    """

    marginal: MarginalSettings
    rolling: RollingSettings
    signals: SignalSettings = field(default_factory=SignalSettings)

    @classmethod
    def of(cls, cfg: Config, signals: SignalSettings | None = None) -> Settings:
        """The settings of ``cfg`` (``signals`` overrides the default thresholds)."""
        m, r = cfg.marginals, cfg.rolling
        rolling = {f.name: getattr(r, f.name) for f in fields(RollingSettings)}
        return cls(MarginalSettings(mode=m.mode, refit_every=m.refit_every),
                   RollingSettings(**rolling),
                   signals if signals is not None else SignalSettings())

    @property
    def marginal_key(self) -> str:
        """Key of the stored marginal fits and residuals."""
        return self.marginal.key

    @property
    def rolling_key(self) -> str:
        """Key of the stored rolling metrics: the marginal key ``|`` the rolling part."""
        return self.rolling.key(self.marginal.key)

    @property
    def signals_key(self) -> str:
        """Key of the stored episodes and pair states: the rolling key ``|`` the thresholds."""
        return f"{self.rolling_key}|{self.signals.key}"

    def provenance(self) -> str:
        """One line naming what produces the stored results (every page, report and e-mail).

        Examples
        --------
        >>> Settings.of(Config()).provenance()
        'window 250 days, step 1, all families, selection by AIC, tail level q = 0.1; \
marginals: GARCH-type filter, real-time mode (refit every 21 days)'
        """
        r, m = self.rolling, self.marginal
        fams = "all families" if set(r.families) == set(FAMILY_NAMES) else ", ".join(r.families)
        refit = (f" (refit every {m.refit_every} days)" if m.mode == "real-time" else "")
        return (f"window {r.window} days, step {r.step}, {fams}, selection by "
                f"{r.criterion.upper()}, tail level q = {r.tail_q:g}; marginals: GARCH-type "
                f"filter, {m.mode} mode{refit}")


def marginal_settings(cfg: Config) -> MarginalSettings:
    """The marginal settings ``cfg`` asks for."""
    return Settings.of(cfg).marginal


def rolling_settings(cfg: Config) -> RollingSettings:
    """The rolling settings ``cfg`` asks for."""
    return Settings.of(cfg).rolling


def rolling_key(cfg: Config) -> str:
    """Settings key of the stored rolling metrics (marginal settings plus rolling ones)."""
    return Settings.of(cfg).rolling_key


def signals_key(cfg: Config, settings: SignalSettings | None = None) -> str:
    """Settings key of stored episodes: rolling key plus the signal thresholds."""
    return Settings.of(cfg, settings).signals_key


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


def _matched(pattern: re.Pattern[str], part: str) -> re.Match[str]:
    m = pattern.match(part)
    if m is None:
        raise ValueError(part)
    return m


def _rolling_words(part: str, short: bool = False) -> str:
    m = _matched(_ROLLING, part)
    every = m["families"] == "all"
    if short:
        return (f"window {m['window']} days, step {m['step']}, "
                f"{'all families' if every else 'some families'}, {m['criterion'].upper()}")
    fams = "all families" if every else "families " + ", ".join(m["families"].split("+"))
    return (f"rolling copulas: window {m['window']} days, step {m['step']}, {fams}, selection "
            f"by {m['criterion'].upper()}, tail level q = {float(m['q']):g}")


def _signal_words(part: str) -> str:
    m = _matched(_SIGNALS, part)
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
        (marginal key ``|`` rolling part, :attr:`Settings.rolling_key`) or a signals
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
    >>> settings_words("real-time/refit21/min250/reselect12/all8/v2|w120/s1/aic/q0.1/all/v1",
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
                out.append(_rolling_words(part, short))
            else:
                words = _signal_words(part)
                if short:
                    words = words.split(" (", 1)[0]
                out.append(words)
        except ValueError:
            out.append("stored settings of another version")
    return "; ".join(out)

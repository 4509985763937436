"""What the dashboard reads: a store opened with the configuration's settings keys.

The dashboard, the HTML report and the alert e-mails read results through a :class:`StoreView`
so that every number they show carries the settings that produced it (window, families,
criterion, marginal model and mode, signal thresholds).
"""

from __future__ import annotations

from dataclasses import dataclass

from .config import Config
from .copulas import FAMILY_NAMES
from .pipeline import marginal_settings, rolling_key, rolling_settings, signals_key
from .rolling import RollingSettings
from .store import Store


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

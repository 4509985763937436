"""Fictional-market scenario generators with exact ground truth, for the demo and the tests.

Every scenario simulates daily prices of invented assets whose dependence follows copula
regimes laid out over known date ranges, so the true copula, Kendall's tau and tail
coefficients of every pair are known on every date. Assets have GARCH-type margins and their
own trading calendars.

>>> from synthetic_feeds import SCENARIOS, generate, write_scenario
>>> sorted(SCENARIOS)
['marrowmere-decade', 'steady-pair', 'tail-shift', 'wide-grid']
>>> s = generate("tail-shift", seed=7)
>>> s.segment("MRW40", "OSV25", "2021-06-01")["family"]
'clayton'

``write_scenario(name, out_dir, seed)`` writes ``prices.csv`` (wide, ``date`` + one column
per asset, empty where an asset does not trade) and ``truth.json``.
"""

from .scenario import (
    PRICES_FILE,
    SCENARIOS,
    TRUTH_FILE,
    Scenario,
    generate,
    prices_csv_text,
    scenario_options,
    true_segment,
    truth_json_text,
    truth_table,
    write_scenario,
)

__all__ = [
    "PRICES_FILE", "SCENARIOS", "TRUTH_FILE", "Scenario", "generate", "prices_csv_text",
    "scenario_options", "true_segment", "truth_json_text", "truth_table", "write_scenario",
]

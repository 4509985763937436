"""Alert episodes scored against a scenario's truth: precision and recall of tail alerts.

A scenario's truth lists, per pair, segments of constant copula with their true lower and
upper tail dependence coefficients. For one tail of one pair, a *change* is a segment whose
coefficient differs from the previous segment's by at least ``min_change``; a *rise* is a
change upwards, the event a tail alert is built to flag.

- An episode of that tail is **true** when it overlaps a change segment, extended by
  ``lag_days`` business days after its end: a rolling window still holds days of the
  segment that long after it (the window length is the natural lag).
- A rise is **detected** when an episode of that tail overlaps its extended segment.

Precision is true episodes over all episodes; recall is detected rises over all rises. A fall
(a tail going away) may make an episode true but is not counted in the recall, since the
signals are built for tails growing, not vanishing.

>>> truth = {"end": "2021-06-30", "pairs": [{"pair": ["A", "B"], "segments": [
...     {"start": "2020-01-01", "end": "2020-12-31", "tail_lower": 0.0, "tail_upper": 0.0},
...     {"start": "2021-01-01", "end": "2021-06-30", "tail_lower": 0.6, "tail_upper": 0.0}]}]}
>>> eps = {("A", "B"): [{"tail": "lower", "start": "2021-03-01", "end": "2021-05-01"},
...                     {"tail": "upper", "start": "2020-03-01", "end": "2020-04-01"}]}
>>> s = score_episodes(truth, eps, lag_days=20)
>>> s.precision, s.recall
(0.5, 1.0)
"""

from __future__ import annotations

from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from itertools import pairwise

import pandas as pd

__all__ = ["EpisodeScore", "score_episodes", "tail_changes"]

_TAILS = ("lower", "upper")


@dataclass(frozen=True, slots=True)
class EpisodeScore:
    """Precision and recall of a set of episodes against a truth.

    Attributes
    ----------
    episodes : pandas.DataFrame
        One row per scored episode: ``pair``, ``tail``, ``start``, ``end`` and ``true``.
    rises : pandas.DataFrame
        One row per rise: ``pair``, ``tail``, ``start``, ``end`` (of the segment, before the
        lag), ``before``, ``after`` (the coefficients) and ``detected``.
    """

    episodes: pd.DataFrame
    rises: pd.DataFrame

    @property
    def precision(self) -> float:
        """True episodes over all episodes (NaN without episodes)."""
        return float(self.episodes["true"].mean()) if len(self.episodes) else float("nan")

    @property
    def recall(self) -> float:
        """Detected rises over all rises (NaN without rises)."""
        return float(self.rises["detected"].mean()) if len(self.rises) else float("nan")


def tail_changes(truth: Mapping, min_change: float = 0.1) -> pd.DataFrame:
    """Every change of a tail coefficient between consecutive segments of a pair.

    Returns
    -------
    pandas.DataFrame
        ``pair`` ("A/B"), ``tail``, ``start``, ``end`` (the new segment), ``before``,
        ``after``.
    """
    rows = []
    for entry in truth["pairs"]:
        pair = "/".join(entry["pair"])
        segs = entry["segments"]
        for prev, seg in pairwise(segs):
            for tail in _TAILS:
                before, after = float(prev[f"tail_{tail}"]), float(seg[f"tail_{tail}"])
                if abs(after - before) >= min_change:
                    rows.append({"pair": pair, "tail": tail,
                                 "start": pd.Timestamp(seg["start"]),
                                 "end": pd.Timestamp(seg["end"]),
                                 "before": before, "after": after})
    return pd.DataFrame(rows, columns=["pair", "tail", "start", "end", "before", "after"])


def score_episodes(truth: Mapping, episodes: Mapping[tuple[str, str], Iterable],
                   lag_days: int, min_change: float = 0.1,
                   last_day: str | pd.Timestamp | None = None) -> EpisodeScore:
    """Score alert episodes against a scenario's truth (module docstring).

    Parameters
    ----------
    truth : mapping
        A scenario's truth (``truth.json``), with ``pairs`` -> ``segments``.
    episodes : mapping of (asset, asset) -> iterable of episodes
        Each episode an object or mapping with ``tail``, ``start`` and ``end`` (None while
        open: it then runs to ``last_day``).
    lag_days : int
        Business days a segment is extended by (the rolling window's length).
    min_change : float
        Least change of a tail coefficient that counts.
    last_day : date-like, optional
        End of open episodes (default: the truth's ``end``).
    """
    last = pd.Timestamp(last_day if last_day is not None else truth["end"])
    changes = tail_changes(truth, min_change)
    changes = changes[changes["pair"].isin(["/".join(k) for k in episodes])].copy()
    changes["reach"] = changes["end"] + pd.offsets.BDay(int(lag_days))

    def field(e: object, name: str) -> object:
        return e[name] if isinstance(e, Mapping) else getattr(e, name)

    rows = []
    for (a, b), eps in episodes.items():
        for e in eps:
            end = field(e, "end")
            rows.append({"pair": f"{a}/{b}", "tail": field(e, "tail"),
                         "start": pd.Timestamp(field(e, "start")),
                         "end": last if end is None else pd.Timestamp(end)})
    eps_frame = pd.DataFrame(rows, columns=["pair", "tail", "start", "end"])

    def overlaps(ep: pd.Series, ch: pd.DataFrame) -> pd.Series:
        return ((ch["pair"] == ep["pair"]) & (ch["tail"] == ep["tail"])
                & (ch["start"] <= ep["end"]) & (ch["reach"] >= ep["start"]))

    eps_frame["true"] = [bool(overlaps(ep, changes).any()) for _, ep in eps_frame.iterrows()]
    rises = changes[changes["after"] > changes["before"]].reset_index(drop=True)
    detected = []
    for _, r in rises.iterrows():
        hit = ((eps_frame["pair"] == r["pair"]) & (eps_frame["tail"] == r["tail"])
               & (eps_frame["start"] <= r["reach"]) & (eps_frame["end"] >= r["start"]))
        detected.append(bool(hit.any()))
    rises["detected"] = detected
    return EpisodeScore(eps_frame, rises.drop(columns="reach"))

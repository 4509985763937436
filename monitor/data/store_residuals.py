"""Marginal filtering results in the store: per marginal settings key and asset, every fit
with its diagnostics, the input the residuals were computed from, and the standardised
residuals with their conditional sigma (see :mod:`monitor.stats.marginals`).

Tables (:mod:`monitor.data.schema`): ``marginal_fits``, ``marginal_state``, ``residuals``.
"""

from __future__ import annotations

import datetime as dt
import json
from collections.abc import Iterable, Mapping
from dataclasses import dataclass
from typing import TYPE_CHECKING

import pandas as pd
import sqlalchemy as sa

from monitor.data.schema import marginal_fits, marginal_state, residuals
from monitor.data.store_base import StoreBase, raw_date, row_frame, utc_now

if TYPE_CHECKING:
    from monitor.stats.marginals import FilteredSeries


@dataclass(frozen=True, slots=True)
class StoredMarginals:
    """What is stored of the marginal models under one settings key, per asset
    (:meth:`ResidualStore.marginal_overview`).

    Attributes
    ----------
    latest : tuple of (str, int, int, str)
        Per asset with stored fits: ``(asset, refits, fallback_fits, payload)``, the number
        of refits, how many of them use the EWMA fallback and the latest refit's stored
        record (the JSON of :meth:`monitor.stats.marginals.MarginalFit.to_dict`).
    specs : tuple of (str, str, int)
        ``(asset, spec, refits)``: how many refits of the asset use each spec.
    residuals : mapping of str to (int, date, date)
        Per asset with stored residuals: their count, first and last date.
    current : frozenset of str
        Assets whose stored residuals were computed from the stored input (a revision of
        the input drops the asset from here until the next update).
    """

    latest: tuple[tuple[str, int, int, str], ...]
    specs: tuple[tuple[str, str, int], ...]
    residuals: Mapping[str, tuple[int, dt.date, dt.date]]
    current: frozenset[str]


class ResidualStore(StoreBase):
    """The marginal filtering results of a store (a part of :class:`~monitor.data.store.Store`)."""

    def load_filtered(self, settings_key: str, asset: str, conn: sa.Connection | None = None
                      ) -> FilteredSeries | None:
        """The stored :class:`~monitor.stats.marginals.FilteredSeries` of an asset, or None."""
        from monitor.stats.marginals import FilteredSeries

        with self._conn(conn) as c:
            state = c.execute(sa.select(marginal_state).where(sa.and_(
                marginal_state.c.settings == settings_key,
                marginal_state.c.asset == asset))).mappings().one_or_none()
            if state is None:
                return None
            fits = c.execute(sa.select(marginal_fits.c.payload).where(sa.and_(
                marginal_fits.c.settings == settings_key, marginal_fits.c.asset == asset))
                .order_by(marginal_fits.c.seq)).scalars().all()
            rows = c.execute(sa.select(raw_date(residuals.c.date), residuals.c.value,
                                       residuals.c.sigma, residuals.c.fit_seq).where(sa.and_(
                residuals.c.settings == settings_key, residuals.c.asset == asset))
                .order_by(residuals.c.date)).all()
        return FilteredSeries.from_dict({
            "asset": asset, "settings": settings_key,
            "dates": [str(r[0]) for r in rows], "residuals": [r[1] for r in rows],
            "sigma": [r[2] for r in rows], "fit_index": [r[3] for r in rows],
            "fits": [json.loads(f) for f in fits],
            "input": {"n": state["n_input"], "start": state["input_start"].isoformat(),
                      "end": state["input_end"].isoformat(), "digest": state["input_digest"]},
        })

    @staticmethod
    def save_filtered(conn: sa.Connection, series: FilteredSeries,
                      previous: FilteredSeries | None = None) -> int:
        """Store a FilteredSeries, writing only what is new relative to ``previous`` (the
        stored result it extends; None replaces whatever is stored). Returns the number of
        residual rows written."""
        key, asset = series.key, series.asset
        where_r = sa.and_(residuals.c.settings == key, residuals.c.asset == asset)
        where_f = sa.and_(marginal_fits.c.settings == key, marginal_fits.c.asset == asset)
        if previous is None:
            conn.execute(residuals.delete().where(where_r))
            conn.execute(marginal_fits.delete().where(where_f))
            old_rows, old_fits = 0, 0
        else:
            old_rows = len(previous.dates)
            # The last stored fit may have grown (it applies to more days now): rewrite it.
            old_fits = max(len(previous.fits) - 1, 0)
            conn.execute(marginal_fits.delete().where(sa.and_(
                where_f, marginal_fits.c.seq >= old_fits)))
        fits = series.fits[old_fits:]
        if fits:
            conn.execute(marginal_fits.insert(), [
                {"settings": key, "asset": asset, "seq": old_fits + i, "fit_end": f.sample_end,
                 "spec": f.spec.key, "converged": bool(f.converged),
                 "fallback": f.fallback or "", "payload": json.dumps(f.to_dict())}
                for i, f in enumerate(fits)])
        new = slice(old_rows, None)
        dates = [pd.Timestamp(d).date() for d in series.dates[new]]
        if dates:
            conn.execute(residuals.insert(), [
                {"settings": key, "asset": asset, "date": d, "value": float(z),
                 "sigma": float(sg), "fit_seq": int(k)}
                for d, z, sg, k in zip(dates, series.residuals[new], series.sigma[new],
                                       series.fit_index[new], strict=True)])
        conn.execute(marginal_state.delete().where(sa.and_(
            marginal_state.c.settings == key, marginal_state.c.asset == asset)))
        conn.execute(marginal_state.insert().values(
            settings=key, asset=asset, n_input=series.n_input, input_start=series.input_start,
            input_end=series.input_end, input_digest=series.input_digest, updated_at=utc_now()))
        return len(dates)

    def residual_count(self, settings_key: str, asset: str) -> int:
        """Stored residual rows of an asset under a settings key."""
        with self.engine.connect() as conn:
            return int(conn.execute(sa.select(sa.func.count()).select_from(residuals).where(
                sa.and_(residuals.c.settings == settings_key,
                        residuals.c.asset == asset))).scalar_one())

    def residual_assets(self, settings_key: str) -> list[str]:
        """Assets with stored residuals under a marginal settings key, sorted."""
        with self.engine.connect() as conn:
            return sorted(conn.execute(sa.select(residuals.c.asset).where(
                residuals.c.settings == settings_key).distinct()).scalars())

    def read_residuals(self, settings_key: str, assets: Iterable[str] | None = None,
                       since: dt.date | None = None) -> pd.DataFrame:
        """Stored standardised residuals as a wide frame (date x asset), dated ``since`` or
        later when given."""
        stmt = sa.select(residuals.c.asset, raw_date(residuals.c.date), residuals.c.value).where(
            residuals.c.settings == settings_key)
        if since is not None:
            stmt = stmt.where(residuals.c.date >= since)
        if assets is not None:
            stmt = stmt.where(residuals.c.asset.in_(list(assets)))
        with self.engine.connect() as conn:
            rows = conn.execute(stmt.order_by(residuals.c.date)).all()
        frame = row_frame(rows, ["asset", "date", "value"])
        frame["date"] = pd.to_datetime(frame["date"])
        wide = frame.pivot(index="date", columns="asset", values="value")
        wide.columns = [str(c) for c in wide.columns]
        wide.columns.name = None
        return wide

    def fallback_spans(self, settings_key: str, assets: Iterable[str] | None = None
                       ) -> pd.DataFrame:
        """The stored residuals filtered by a fallback fit, one row per fit.

        Parameters
        ----------
        settings_key : str
            A marginal settings key.
        assets : iterable of str, optional
            Only these assets (default all).

        Returns
        -------
        DataFrame
            ``asset, fallback, first, last, days``: per fallback fit (``fallback`` names it,
            e.g. ``"ewma-0.94-t"``) the first and last date of the residuals it filtered
            (Timestamps) and their number; sorted by asset and date, empty when no fallback
            filtered anything.
        """
        r, f = residuals, marginal_fits
        stmt = (sa.select(r.c.asset, f.c.fallback, raw_date(sa.func.min(r.c.date)),
                          raw_date(sa.func.max(r.c.date)), sa.func.count())
                .join(f, sa.and_(f.c.settings == r.c.settings, f.c.asset == r.c.asset,
                                 f.c.seq == r.c.fit_seq))
                .where(r.c.settings == settings_key, f.c.fallback != "")
                .group_by(r.c.asset, f.c.seq, f.c.fallback))
        if assets is not None:
            stmt = stmt.where(r.c.asset.in_(list(assets)))
        with self.engine.connect() as conn:
            rows = conn.execute(stmt).all()
        frame = row_frame(rows, ["asset", "fallback", "first", "last", "days"])
        for c in ("first", "last"):
            frame[c] = pd.to_datetime(frame[c])
        frame["days"] = frame["days"].astype(int)
        return frame.sort_values(["asset", "first"], ignore_index=True)

    def marginal_overview(self, settings_key: str) -> StoredMarginals:
        """Per asset, the stored fits, specs and residuals under a marginal settings key.

        Four grouped queries, whatever the number of refits: per asset the fit counts with
        the latest fit's stored record, the specs used, the residual counts and the assets
        whose input record is stored.
        """
        f = marginal_fits
        key = f.c.settings == settings_key
        latest = (sa.select(f.c.asset, sa.func.max(f.c.seq).label("seq"),
                            sa.func.count().label("refits"),
                            sa.func.sum(sa.case((f.c.fallback != "", 1), else_=0)).label("fb"))
                  .where(key).group_by(f.c.asset).subquery())
        payloads = (sa.select(latest.c.asset, latest.c.refits, latest.c.fb, f.c.payload)
                    .join(f, sa.and_(key, f.c.asset == latest.c.asset,
                                     f.c.seq == latest.c.seq)))
        specs = (sa.select(f.c.asset, f.c.spec, sa.func.count().label("n")).where(key)
                 .group_by(f.c.asset, f.c.spec))
        r = residuals
        counts = (sa.select(r.c.asset, sa.func.count().label("n"), sa.func.min(r.c.date),
                            sa.func.max(r.c.date))
                  .where(r.c.settings == settings_key).group_by(r.c.asset))
        states = sa.select(marginal_state.c.asset).where(
            marginal_state.c.settings == settings_key)
        with self.engine.connect() as conn:
            fits = conn.execute(payloads).all()
            used = conn.execute(specs).all()
            stored = {a: (n, lo, hi) for a, n, lo, hi in conn.execute(counts).all()}
            current = frozenset(conn.execute(states).scalars())
        return StoredMarginals(latest=tuple((a, n, fb, p) for a, n, fb, p in fits),
                               specs=tuple((a, s, n) for a, s, n in used),
                               residuals=stored, current=current)

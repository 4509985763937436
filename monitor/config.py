"""Configuration: ``comove.toml`` read into frozen dataclasses, validated key by key.

Precedence: ``--config FILE`` over the environment variable ``COMOVE_CONFIG`` over
``./comove.toml`` (if present) over the defaults; ``--store URL`` over ``COMOVE_STORE`` over
``[store] url``. Unknown sections or keys are refused, naming the key, so a typo never silently
falls back to a default.
"""

from __future__ import annotations

import datetime as dt
import os
import re
import tomllib
from dataclasses import dataclass, field, fields, replace
from pathlib import Path
from typing import Any

from monitor.common.errors import InputError
from monitor.data.tables import NAME_CHARS_CAP, Limits, ReadOptions, read_options
from monitor.stats.copulas import FAMILY_NAMES
from monitor.stats.rolling import RollingSettings

DEFAULT_STORE_URL = "sqlite:///comove-data/store.sqlite"


@dataclass(frozen=True, slots=True)
class StoreConfig:
    url: str = DEFAULT_STORE_URL


@dataclass(frozen=True, slots=True)
class RollingConfig(RollingSettings):
    """``[rolling]``: the rolling settings (:class:`monitor.stats.rolling.RollingSettings`)
    and the pairs to monitor."""

    #: Pairs to monitor as "A/B" strings; empty means every pair of stored assets.
    pairs: tuple[str, ...] = ()


@dataclass(frozen=True, slots=True)
class MarginalsConfig:
    mode: str = "real-time"
    refit_every: int = 21


@dataclass(frozen=True, slots=True)
class ComputeConfig:
    backend: str = "local"
    scheduler: str = ""
    workers: int = 0


@dataclass(frozen=True, slots=True)
class EmailConfig:
    host: str = ""
    port: int = 25
    sender: str = ""
    recipients: tuple[str, ...] = ()
    starttls: bool = False
    ssl: bool = False
    username_env: str = ""
    password_env: str = ""


#: Kinds of alert rule (see :mod:`monitor.alerts.rules`).
RULE_KINDS = ("episode", "tail-level", "tail-rise", "universe")
RULE_TAILS = ("lower", "upper", "both")
RULE_MEASURES = ("nonparametric", "model")


@dataclass(frozen=True, slots=True)
class AlertRule:
    """One ``[[alerts.rules]]`` table: when a pair (or the universe) is worth an e-mail.

    - ``episode``: a tail/centre divergence episode starts (and, with ``on_end``, ends);
    - ``tail-level``: the tail coefficient (``measure``) rises above ``above``;
    - ``tail-rise``: it rose by at least ``rise`` over the last ``days`` window ends;
    - ``universe``: the share of pairs in alert reaches ``share``.
    """

    name: str = ""
    kind: str = "episode"
    tail: str = "both"
    measure: str = "nonparametric"
    above: float = 0.0
    rise: float = 0.0
    days: int = 60
    share: float = 0.0
    on_end: bool = False


@dataclass(frozen=True, slots=True)
class AlertsConfig:
    email: EmailConfig = field(default_factory=EmailConfig)
    #: Rules in force; empty means the default: one rule of kind "episode".
    rules: tuple[AlertRule, ...] = ()
    #: Pairs "A/B" that alert on every rule and also on entering the watch state.
    watchlist: tuple[str, ...] = ()
    #: Pairs "A/B" or single assets that never alert (the watchlist wins).
    quiet: tuple[str, ...] = ()
    #: Only events within this many days of the newest data are queued (a first backfill
    #: does not mail a decade of history).
    max_age_days: int = 5
    #: A new episode of a pair's tail this many days or fewer after its previous one ended
    #: is recorded but not mailed.
    cooldown_days: int = 30
    #: One daily digest instead of one message per event.
    digest: bool = False
    #: First retry after a failed delivery while the server keeps failing, doubling per
    #: attempt up to 30 minutes (a reachable server gets every pending message at once).
    retry_seconds: int = 300
    #: ``alerts send`` exits 1 while a message queued longer ago than this is undelivered.
    late_after_minutes: int = 60


@dataclass(frozen=True, slots=True)
class ColumnsConfig:
    """``columns = { date = "Date", asset = "Ticker", value = "Close" }`` of a source: the
    file's columns holding each role (empty: the column is named after its role)."""

    date: str = ""
    asset: str = ""
    value: str = ""


@dataclass(frozen=True, slots=True)
class SourceConfig:
    """One configured input pulled by ``comove update``: a file path or glob (``path``), or a
    SQL source (``url`` with ``table`` or ``query``); ``kind`` says prices or returns.
    Credentials belong in the URL's environment, never in the file: ``url_env`` names an
    environment variable holding the URL instead of ``url``."""

    path: str = ""
    url: str = ""
    url_env: str = ""
    table: str = ""
    query: str = ""
    kind: str = "prices"
    accept_revisions: bool = False
    #: Store returns beyond ``ingest.max_abs_log_return`` (as ``ingest --accept-outliers``).
    accept_outliers: bool = False
    #: Reading options of a file source (see :class:`monitor.data.tables.ReadOptions`).
    sep: str = ","
    decimal: str = "."
    thousands: str = ""
    date_format: str = ""
    columns: ColumnsConfig = field(default_factory=ColumnsConfig)


def source_read_options(src: SourceConfig, where: str) -> ReadOptions:
    """The reading options of a ``[[sources]]`` entry, checked; messages name its keys
    (``where`` is e.g. ``"comove.toml: sources[1]"``)."""
    names = {k: f"{where}.{k}" for k in ("sep", "decimal", "thousands", "date_format",
                                          "columns")}
    cols = {"date": src.columns.date, "asset": src.columns.asset, "value": src.columns.value}
    return read_options(sep=src.sep, decimal=src.decimal, thousands=src.thousands,
                        date_format=src.date_format, columns=cols, names=names, style="key")


@dataclass(frozen=True, slots=True)
class Config:
    """The whole configuration; ``source`` names the file it came from (or ``"defaults"``)."""

    store: StoreConfig = field(default_factory=StoreConfig)
    rolling: RollingConfig = field(default_factory=RollingConfig)
    marginals: MarginalsConfig = field(default_factory=MarginalsConfig)
    compute: ComputeConfig = field(default_factory=ComputeConfig)
    alerts: AlertsConfig = field(default_factory=AlertsConfig)
    #: ``[ingest]``: the limits every input is read within (:class:`monitor.data.tables.Limits`).
    ingest: Limits = field(default_factory=Limits)
    sources: tuple[SourceConfig, ...] = ()
    source: str = "defaults"


#: Fields that hold arrays of tables, and the dataclass of each element.
_TABLE_ARRAYS: dict[tuple[type, str], type] = {(AlertsConfig, "rules"): AlertRule}

_SECTIONS: dict[str, type] = {
    "store": StoreConfig, "rolling": RollingConfig, "marginals": MarginalsConfig,
    "compute": ComputeConfig, "alerts": AlertsConfig, "ingest": Limits, "sources": SourceConfig,
}


def _coerce(where: str, value: Any, default: Any) -> Any:
    """Check ``value`` has the type of ``default`` (tuples from TOML arrays)."""
    if isinstance(default, bool):
        if not isinstance(value, bool):
            raise InputError(f"{where} must be true or false, got {value!r}")
        return value
    if isinstance(default, int):
        if isinstance(value, bool) or not isinstance(value, int):
            raise InputError(f"{where} must be an integer, got {value!r}")
        return value
    if isinstance(default, float):
        if isinstance(value, bool) or not isinstance(value, int | float):
            raise InputError(f"{where} must be a number, got {value!r}")
        return float(value)
    if isinstance(default, str):
        if not isinstance(value, str):
            raise InputError(f"{where} must be a string, got {value!r}")
        return value
    if isinstance(default, dt.date):
        if isinstance(value, dt.datetime) or not isinstance(value, dt.date | str):
            raise InputError(f"{where} must be a date (YYYY-MM-DD), got {value!r}")
        try:
            return value if isinstance(value, dt.date) else dt.date.fromisoformat(value)
        except ValueError:
            raise InputError(f"{where} must be a date (YYYY-MM-DD), got {value!r}") from None
    if isinstance(default, tuple):
        if not isinstance(value, list) or not all(isinstance(x, str) for x in value):
            raise InputError(f"{where} must be a list of strings, got {value!r}")
        return tuple(value)
    raise AssertionError(where)  # pragma: no cover


def _section(cls: type, table: Any, where: str, path: str):
    if not isinstance(table, dict):
        raise InputError(f"{path}: [{where}] must be a table")
    defaults = cls()
    known = {f.name: f for f in fields(cls)}
    values = {}
    for key, value in table.items():
        if key not in known:
            raise InputError(f"{path}: unknown key {where}.{key}; known: {', '.join(known)}")
        default = getattr(defaults, key)
        element = _TABLE_ARRAYS.get((cls, key))
        if element is not None:
            if not isinstance(value, list) or not all(isinstance(t, dict) for t in value):
                raise InputError(f"{path}: {where}.{key} must be an array of tables "
                                 f"([[{where}.{key}]])")
            values[key] = tuple(_section(element, t, f"{where}.{key}[{i}]", path)
                                for i, t in enumerate(value, start=1))
        elif hasattr(default, "__dataclass_fields__"):
            values[key] = _section(type(default), value, f"{where}.{key}", path)
        else:
            values[key] = _coerce(f"{path}: {where}.{key}", value, default)
    return replace(defaults, **values)


def _sources(value: Any, path: str) -> tuple[SourceConfig, ...]:
    if not isinstance(value, list) or not all(isinstance(t, dict) for t in value):
        raise InputError(f"{path}: sources must be an array of tables ([[sources]])")
    out = []
    for i, table in enumerate(value, start=1):
        where = f"sources[{i}]"
        src = _section(SourceConfig, table, where, path)
        if bool(src.path) == bool(src.url or src.url_env):
            raise InputError(f"{path}: {where} needs exactly one of path and url (or url_env)")
        if src.url and src.url_env:
            raise InputError(f"{path}: {where}: give url or url_env, not both")
        if (src.url or src.url_env) and bool(src.table) == bool(src.query):
            raise InputError(f"{path}: {where} needs exactly one of table and query")
        if src.path and (src.table or src.query):
            raise InputError(f"{path}: {where}: table and query go with url")
        if src.kind not in ("prices", "returns"):
            raise InputError(f"{path}: {where}.kind must be \"prices\" or \"returns\", "
                             f"got {src.kind!r}")
        options = source_read_options(src, f"{path}: {where}")
        if not src.path and options != ReadOptions(style="key"):
            raise InputError(f"{path}: {where}: sep, decimal, thousands, date_format and "
                             "columns go with path (a SQL source's cells are typed)")
        out.append(src)
    return tuple(out)


def _validate(cfg: Config, path: str) -> None:
    if not cfg.store.url.strip():
        raise InputError(f"{path}: store.url must not be empty")
    r = cfg.rolling
    if r.window < 30:
        raise InputError(f"{path}: rolling.window must be at least 30, got {r.window}")
    if r.step < 1:
        raise InputError(f"{path}: rolling.step must be at least 1, got {r.step}")
    if not r.families:
        raise InputError(f"{path}: rolling.families must name at least one family")
    for name in r.families:
        if name not in FAMILY_NAMES:
            raise InputError(f"{path}: rolling.families: unknown family {name!r}; "
                             f"known: {', '.join(FAMILY_NAMES)}")
    if len(set(r.families)) != len(r.families):
        raise InputError(f"{path}: rolling.families lists a family twice")
    if r.criterion not in ("aic", "bic"):
        raise InputError(f"{path}: rolling.criterion must be \"aic\" or \"bic\", got {r.criterion!r}")
    for pair in r.pairs:
        parts = pair.split("/")
        if len(parts) != 2 or not all(p.strip() for p in parts) or parts[0] == parts[1]:
            raise InputError(f"{path}: rolling.pairs: {pair!r} is not of the form \"A/B\" "
                             "with two different assets")
    if not 0 < r.tail_q < 0.5:
        raise InputError(f"{path}: rolling.tail_q must lie in (0, 0.5), got {r.tail_q}")
    m = cfg.marginals
    if m.mode not in ("real-time", "in-sample"):
        raise InputError(f"{path}: marginals.mode must be \"real-time\" or \"in-sample\", "
                         f"got {m.mode!r}")
    if m.refit_every < 1:
        raise InputError(f"{path}: marginals.refit_every must be at least 1, got {m.refit_every}")
    g = cfg.ingest
    for name in ("max_megabytes", "max_columns", "max_line_bytes", "max_name_chars",
                 "max_abs_log_return"):
        if not getattr(g, name) > 0:
            raise InputError(f"{path}: ingest.{name} must be positive, got {getattr(g, name)}")
    if g.max_name_chars > NAME_CHARS_CAP:
        raise InputError(f"{path}: ingest.max_name_chars must be at most {NAME_CHARS_CAP} (the "
                         f"longest asset name every store column holds), got {g.max_name_chars}")
    if g.max_future_days < 0:
        raise InputError(f"{path}: ingest.max_future_days must be 0 or more, "
                         f"got {g.max_future_days}")
    c = cfg.compute
    if c.backend not in ("local", "dask"):
        raise InputError(f"{path}: compute.backend must be \"local\" or \"dask\", got {c.backend!r}")
    if c.backend == "dask" and not c.scheduler:
        raise InputError(f"{path}: compute.scheduler must give the Dask scheduler address "
                         "when compute.backend = \"dask\"")
    if c.workers < 0:
        raise InputError(f"{path}: compute.workers must be 0 (automatic) or more, got {c.workers}")
    _validate_alerts(cfg.alerts, path)
    e = cfg.alerts.email
    if e.ssl and e.starttls:
        raise InputError(f"{path}: alerts.email.ssl and alerts.email.starttls exclude each other")
    if not 0 < e.port < 65536:
        raise InputError(f"{path}: alerts.email.port must be a TCP port, got {e.port}")


_ADDRESS = re.compile(r"^[A-Za-z0-9.!#$%&'*+/=?^_`{|}~-]+@[A-Za-z0-9-]+(\.[A-Za-z0-9-]+)+$")
_ENV_NAME = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")


def is_address(text: str) -> bool:
    """A plain e-mail address (local@domain.tld, no display name or spaces)."""
    return bool(_ADDRESS.match(text)) and ".." not in text


def _pair_or_asset(text: str, allow_asset: bool) -> bool:
    parts = text.split("/")
    if len(parts) == 1:
        return allow_asset and bool(text.strip())
    return len(parts) == 2 and all(p.strip() for p in parts) and parts[0] != parts[1]


def _validate_alerts(a: AlertsConfig, path: str) -> None:
    e = a.email
    where = f"{path}: alerts.email"
    if e.sender and not is_address(e.sender):
        raise InputError(f"{where}.sender: {e.sender!r} is not an e-mail address")
    for i, recipient in enumerate(e.recipients, start=1):
        if not is_address(recipient):
            raise InputError(f"{where}.recipients[{i}]: {recipient!r} is not an e-mail address")
    if len(set(e.recipients)) != len(e.recipients):
        raise InputError(f"{where}.recipients lists an address twice")
    if e.recipients and not (e.host and e.sender):
        raise InputError(f"{where}: recipients need host and sender too")
    for key in ("username_env", "password_env"):
        name = getattr(e, key)
        if name and not _ENV_NAME.match(name):
            raise InputError(f"{where}.{key} must name an environment variable (letters, "
                             f"digits, underscore), got {name!r}")
    if bool(e.username_env) != bool(e.password_env):
        raise InputError(f"{where}: give both username_env and password_env, or neither")
    names = set()
    for i, r in enumerate(a.rules, start=1):
        at = f"{path}: alerts.rules[{i}]"
        if r.kind not in RULE_KINDS:
            raise InputError(f"{at}.kind must be one of {', '.join(RULE_KINDS)}; got {r.kind!r}")
        if r.tail not in RULE_TAILS:
            raise InputError(f"{at}.tail must be one of {', '.join(RULE_TAILS)}; got {r.tail!r}")
        if r.measure not in RULE_MEASURES:
            raise InputError(f"{at}.measure must be one of {', '.join(RULE_MEASURES)}; "
                             f"got {r.measure!r}")
        name = r.name or r.kind
        if name in names:
            raise InputError(f"{at}.name: {name!r} names two rules")
        names.add(name)
        if r.kind == "tail-level" and not 0 < r.above < 1:
            raise InputError(f"{at}.above must lie in (0, 1) for a tail-level rule, "
                             f"got {r.above}")
        if r.kind == "tail-rise" and not (0 < r.rise < 1 and r.days >= 1):
            raise InputError(f"{at}: a tail-rise rule needs rise in (0, 1) and days >= 1, "
                             f"got rise {r.rise}, days {r.days}")
        if r.kind == "universe" and not 0 < r.share <= 1:
            raise InputError(f"{at}.share must lie in (0, 1] for a universe rule, "
                             f"got {r.share}")
    for key, allow in (("watchlist", False), ("quiet", True)):
        for item in getattr(a, key):
            if not _pair_or_asset(item, allow):
                form = '"A/B" or an asset' if allow else '"A/B"'
                raise InputError(f"{path}: alerts.{key}: {item!r} is not of the form {form}")
    if a.max_age_days < 0:
        raise InputError(f"{path}: alerts.max_age_days must be 0 or more, got {a.max_age_days}")
    if a.cooldown_days < 0:
        raise InputError(f"{path}: alerts.cooldown_days must be 0 or more, "
                         f"got {a.cooldown_days}")
    if a.late_after_minutes < 1:
        raise InputError(f"{path}: alerts.late_after_minutes must be at least 1, "
                         f"got {a.late_after_minutes}")
    if a.retry_seconds < 0:
        raise InputError(f"{path}: alerts.retry_seconds must be 0 or more, "
                         f"got {a.retry_seconds}")


def load_config(path: str | os.PathLike | None = None, store_url: str | None = None) -> Config:
    """Load and validate the configuration.

    Parameters
    ----------
    path : path, optional
        Config file; default ``$COMOVE_CONFIG`` or ``./comove.toml`` when present.
    store_url : str, optional
        Overrides the store URL (``--store``); default ``$COMOVE_STORE`` or the file's.

    Raises
    ------
    InputError
        A missing or unreadable file, bad TOML, an unknown key or an invalid value; the
        message names the file and the key.
    """
    if path is None:
        path = os.environ.get("COMOVE_CONFIG") or (
            "comove.toml" if Path("comove.toml").is_file() else None)
    cfg = Config()
    if path is not None:
        p = Path(path)
        if not p.is_file():
            raise InputError(f"config file {str(p)!r} not found")
        try:
            # utf-8-sig: editors on Windows start the file with a byte-order mark.
            raw = tomllib.loads(p.read_text(encoding="utf-8-sig"))
        except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
            raise InputError(f"{p}: not valid TOML ({exc})") from None
        values: dict[str, Any] = {}
        for key, table in raw.items():
            if key == "sources":
                values[key] = _sources(table, str(p))
                continue
            if key not in _SECTIONS:
                what = f"section [{key}]" if isinstance(table, dict) else f"top-level key {key}"
                raise InputError(f"{p}: unknown {what}; known sections: {', '.join(_SECTIONS)}")
            values[key] = _section(_SECTIONS[key], table, key, str(p))
        cfg = replace(cfg, **values, source=str(p))
        _validate(cfg, str(p))
    url = store_url or os.environ.get("COMOVE_STORE")
    if url:
        cfg = replace(cfg, store=replace(cfg.store, url=url))
    return cfg

"""Configuration: ``comove.toml`` read into frozen dataclasses, validated key by key.

Precedence: ``--config FILE`` over the environment variable ``COMOVE_CONFIG`` over
``./comove.toml`` (if present) over the defaults; ``--store URL`` over ``COMOVE_STORE`` over
``[store] url``. Unknown sections or keys are refused, naming the key, so a typo never silently
falls back to a default.
"""

from __future__ import annotations

import os
import tomllib
from dataclasses import dataclass, field, fields, replace
from pathlib import Path
from typing import Any

from .copulas import FAMILY_NAMES
from .errors import InputError

DEFAULT_STORE_URL = "sqlite:///comove-data/store.sqlite"


@dataclass(frozen=True, slots=True)
class StoreConfig:
    url: str = DEFAULT_STORE_URL


@dataclass(frozen=True, slots=True)
class RollingConfig:
    window: int = 250
    step: int = 1
    families: tuple[str, ...] = FAMILY_NAMES
    criterion: str = "aic"
    tail_q: float = 0.10
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


@dataclass(frozen=True, slots=True)
class AlertsConfig:
    email: EmailConfig = field(default_factory=EmailConfig)


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


@dataclass(frozen=True, slots=True)
class Config:
    """The whole configuration; ``source`` names the file it came from (or ``"defaults"``)."""

    store: StoreConfig = field(default_factory=StoreConfig)
    rolling: RollingConfig = field(default_factory=RollingConfig)
    marginals: MarginalsConfig = field(default_factory=MarginalsConfig)
    compute: ComputeConfig = field(default_factory=ComputeConfig)
    alerts: AlertsConfig = field(default_factory=AlertsConfig)
    sources: tuple[SourceConfig, ...] = ()
    source: str = "defaults"


_SECTIONS: dict[str, type] = {
    "store": StoreConfig, "rolling": RollingConfig, "marginals": MarginalsConfig,
    "compute": ComputeConfig, "alerts": AlertsConfig, "sources": SourceConfig,
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
        if hasattr(default, "__dataclass_fields__"):
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
    c = cfg.compute
    if c.backend not in ("local", "dask"):
        raise InputError(f"{path}: compute.backend must be \"local\" or \"dask\", got {c.backend!r}")
    if c.backend == "dask" and not c.scheduler:
        raise InputError(f"{path}: compute.scheduler must give the Dask scheduler address "
                         "when compute.backend = \"dask\"")
    if c.workers < 0:
        raise InputError(f"{path}: compute.workers must be 0 (automatic) or more, got {c.workers}")
    e = cfg.alerts.email
    if e.ssl and e.starttls:
        raise InputError(f"{path}: alerts.email.ssl and alerts.email.starttls exclude each other")
    if not 0 < e.port < 65536:
        raise InputError(f"{path}: alerts.email.port must be a TCP port, got {e.port}")


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
        values = {}
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

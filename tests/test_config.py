"""Tests for monitor.config: defaults, file and store precedence, and refusal of bad keys.

The expected defaults and keys are the ``comove.toml`` contract in docs/contracts.md ("Config") and the
precedence rule under "Contracts": ``--config FILE`` over ``$COMOVE_CONFIG`` over
``./comove.toml``; ``--store URL`` over ``$COMOVE_STORE`` over ``[store] url``.
"""

from __future__ import annotations

import dataclasses
import re
from pathlib import Path

import pytest

from monitor.common.errors import InputError
from monitor.config import Config, load_config

# docs/contracts.md, "Family names".
CONTRACT_FAMILIES = ("independence", "gaussian", "student_t", "clayton", "gumbel", "frank",
                     "joe", "bb1", "bb7")


@pytest.fixture(autouse=True)
def clean_environment(monkeypatch, tmp_path):
    """No config or store from the machine running the tests; an empty working directory."""
    monkeypatch.delenv("COMOVE_CONFIG", raising=False)
    monkeypatch.delenv("COMOVE_STORE", raising=False)
    work = tmp_path / "cwd"
    work.mkdir()
    monkeypatch.chdir(work)
    return work


def toml(path: Path, text: str) -> Path:
    path.write_text(text, encoding="utf-8")
    return path


# ---------------------------------------------------------------------------------- defaults
def test_defaults_match_the_design():
    cfg = load_config()
    assert cfg.source == "defaults"
    # docs/contracts.md, "Config comove.toml (at least these keys; defaults in brackets)".
    assert cfg.store.url == "sqlite:///comove-data/store.sqlite"
    assert cfg.rolling.window == 250
    assert cfg.rolling.step == 1
    assert cfg.rolling.families == CONTRACT_FAMILIES
    assert cfg.rolling.criterion == "aic"
    assert cfg.marginals.mode == "real-time"
    assert cfg.marginals.refit_every == 21
    assert cfg.compute.backend == "local"
    assert cfg.compute.scheduler == ""
    email = cfg.alerts.email
    assert (email.starttls, email.ssl) == (False, False)
    assert email.recipients == ()
    assert (email.username_env, email.password_env) == ("", "")


def test_config_is_frozen():
    cfg = load_config()
    with pytest.raises(dataclasses.FrozenInstanceError):
        cfg.rolling.window = 10  # type: ignore[misc]
    with pytest.raises(dataclasses.FrozenInstanceError):
        cfg.store = None  # type: ignore[misc]


def test_empty_file_gives_the_defaults(tmp_path):
    path = toml(tmp_path / "empty.toml", "")
    cfg = load_config(path)
    assert cfg.source == str(path)
    assert dataclasses.replace(cfg, source="defaults") == Config()


def test_every_key_is_read(tmp_path):
    path = toml(tmp_path / "full.toml", """
[store]
url = "postgresql+psycopg://risk@db.example/comove"

[rolling]
window = 500
step = 5
families = ["gaussian", "student_t", "clayton"]
criterion = "bic"
tail_q = 0.05

[marginals]
mode = "in-sample"
refit_every = 63

[compute]
backend = "dask"
scheduler = "tcp://scheduler.example:8786"
workers = 4

[alerts.email]
host = "smtp.example"
port = 587
sender = "comove@example.org"
recipients = ["risk@example.org", "desk@example.org"]
starttls = true
ssl = false
username_env = "COMOVE_SMTP_USER"
password_env = "COMOVE_SMTP_PASSWORD"
""")
    cfg = load_config(path)
    assert cfg.store.url == "postgresql+psycopg://risk@db.example/comove"
    assert (cfg.rolling.window, cfg.rolling.step, cfg.rolling.criterion) == (500, 5, "bic")
    assert cfg.rolling.families == ("gaussian", "student_t", "clayton")
    assert cfg.rolling.tail_q == 0.05
    assert (cfg.marginals.mode, cfg.marginals.refit_every) == ("in-sample", 63)
    assert cfg.compute == dataclasses.replace(cfg.compute, backend="dask",
                                              scheduler="tcp://scheduler.example:8786",
                                              workers=4)
    e = cfg.alerts.email
    assert (e.host, e.port, e.sender) == ("smtp.example", 587, "comove@example.org")
    assert e.recipients == ("risk@example.org", "desk@example.org")
    assert (e.starttls, e.ssl) == (True, False)
    assert (e.username_env, e.password_env) == ("COMOVE_SMTP_USER", "COMOVE_SMTP_PASSWORD")


def test_partial_file_keeps_other_defaults(tmp_path):
    cfg = load_config(toml(tmp_path / "c.toml", "[rolling]\nwindow = 120\n"))
    assert cfg.rolling.window == 120
    assert cfg.rolling.families == CONTRACT_FAMILIES
    assert cfg.marginals.refit_every == 21


def test_byte_order_mark_is_accepted(tmp_path):
    path = tmp_path / "bom.toml"
    path.write_bytes("\ufeff[rolling]\nwindow = 120\n".encode())
    assert load_config(path).rolling.window == 120


# -------------------------------------------------------------------------------- precedence
def test_config_file_precedence(clean_environment, tmp_path, monkeypatch):
    cwd_file = toml(clean_environment / "comove.toml", "[rolling]\nwindow = 100\n")
    env_file = toml(tmp_path / "env.toml", "[rolling]\nwindow = 120\n")
    arg_file = toml(tmp_path / "arg.toml", "[rolling]\nwindow = 140\n")

    cfg = load_config()                                  # ./comove.toml in the cwd
    assert (cfg.rolling.window, Path(cfg.source).name) == (100, "comove.toml")
    assert Path(cfg.source).resolve() == cwd_file.resolve()

    monkeypatch.setenv("COMOVE_CONFIG", str(env_file))   # $COMOVE_CONFIG over ./comove.toml
    cfg = load_config()
    assert (cfg.rolling.window, cfg.source) == (120, str(env_file))

    cfg = load_config(arg_file)                          # --config over both
    assert (cfg.rolling.window, cfg.source) == (140, str(arg_file))


def test_no_file_in_cwd_means_defaults(clean_environment):
    (clean_environment / "comove.toml").mkdir()          # a directory is not a config file
    assert load_config().source == "defaults"


def test_missing_config_files_are_refused(tmp_path, monkeypatch):
    missing = tmp_path / "nowhere.toml"
    with pytest.raises(InputError, match=rf"config file '{re.escape(str(missing))}' not found"):
        load_config(missing)
    monkeypatch.setenv("COMOVE_CONFIG", str(missing))
    with pytest.raises(InputError, match=r"nowhere\.toml' not found"):
        load_config()


def test_store_url_precedence(tmp_path, monkeypatch):
    path = toml(tmp_path / "c.toml", '[store]\nurl = "sqlite:///from-file.sqlite"\n')
    assert load_config(path).store.url == "sqlite:///from-file.sqlite"

    monkeypatch.setenv("COMOVE_STORE", "sqlite:///from-env.sqlite")
    assert load_config(path).store.url == "sqlite:///from-env.sqlite"
    assert load_config().store.url == "sqlite:///from-env.sqlite"

    cfg = load_config(path, store_url="postgresql://from-option/db")
    assert cfg.store.url == "postgresql://from-option/db"
    assert cfg.source == str(path)            # the rest still comes from the file


def test_store_option_without_any_file():
    assert load_config(store_url="sqlite:///x.sqlite").store.url == "sqlite:///x.sqlite"


# ---------------------------------------------------------------------------------- refusals
INVALID = [
    ("[rolling]\nwindow = 10\n", r"rolling\.window must be at least 30, got 10"),
    ("[rolling]\nwindow = 250.0\n", r"rolling\.window must be an integer, got 250\.0"),
    ("[rolling]\nwindow = true\n", r"rolling\.window must be an integer, got True"),
    ("[rolling]\nwindow = \"250\"\n", r"rolling\.window must be an integer, got '250'"),
    ("[rolling]\nstep = 0\n", r"rolling\.step must be at least 1, got 0"),
    ("[rolling]\nfamilies = []\n", r"rolling\.families must name at least one family"),
    ("[rolling]\nfamilies = \"gaussian\"\n", r"rolling\.families must be a list of strings"),
    ("[rolling]\nfamilies = [\"gaussian\", 3]\n", r"rolling\.families must be a list of strings"),
    ("[rolling]\nfamilies = [\"gaussian\", \"gausian\"]\n",
     r"rolling\.families: unknown family 'gausian'; known: independence, gaussian, "),
    ("[rolling]\nfamilies = [\"frank\", \"frank\"]\n", r"rolling\.families lists a family twice"),
    ("[rolling]\ncriterion = \"hqc\"\n", r"rolling\.criterion must be \"aic\" or \"bic\", got 'hqc'"),
    ("[rolling]\ncriterion = \"AIC\"\n", r"rolling\.criterion must be"),
    ("[rolling]\ntail_q = 0.5\n", r"rolling\.tail_q must lie in \(0, 0\.5\), got 0\.5"),
    ("[rolling]\ntail_q = 0.0\n", r"rolling\.tail_q must lie in"),
    ("[marginals]\nmode = \"realtime\"\n",
     r"marginals\.mode must be \"real-time\" or \"in-sample\", got 'realtime'"),
    ("[marginals]\nrefit_every = 0\n", r"marginals\.refit_every must be at least 1, got 0"),
    ("[compute]\nbackend = \"threads\"\n",
     r"compute\.backend must be \"local\" or \"dask\", got 'threads'"),
    ("[compute]\nbackend = \"dask\"\n", r"compute\.scheduler must give the Dask scheduler"),
    ("[compute]\nworkers = -2\n", r"compute\.workers must be 0 \(automatic\) or more, got -2"),
    ("[store]\nurl = 5\n", r"store\.url must be a string, got 5"),
    ("[store]\nurl = \"\"\n", r"store\.url must not be empty"),
    ("[alerts.email]\nport = 70000\n", r"alerts\.email\.port must be a TCP port, got 70000"),
    ("[alerts.email]\nport = \"587\"\n", r"alerts\.email\.port must be an integer"),
    ("[alerts.email]\nstarttls = \"yes\"\n",
     r"alerts\.email\.starttls must be true or false, got 'yes'"),
    ("[alerts.email]\nssl = true\nstarttls = true\n",
     r"alerts\.email\.ssl and alerts\.email\.starttls exclude each other"),
    ("[alerts.email]\nrecipients = \"risk@example.org\"\n",
     r"alerts\.email\.recipients must be a list of strings"),
    ("[rollin]\nwindow = 100\n", r"unknown section \[rollin\]; known sections: store, rolling, "),
    ("window = 100\n", r"unknown top-level key window"),
    ("rolling = 5\n", r"\[rolling\] must be a table"),
    ("[rolling]\nwindw = 100\n", r"unknown key rolling\.windw; known: window, step, families"),
    ("[rolling.extra]\nx = 1\n", r"unknown key rolling\.extra"),
    ("[alerts.sms]\nto = 1\n", r"unknown key alerts\.sms; known: email, rules, watchlist"),
    ("[alerts.email]\nhots = \"smtp\"\n", r"unknown key alerts\.email\.hots; known: host, "),
    ("[alerts.email]\npassword = \"hunter2\"\n", r"unknown key alerts\.email\.password;"),
    ("[alerts]\nemail = 3\n", r"\[alerts\.email\] must be a table"),
]


@pytest.mark.parametrize(("text", "message"), INVALID,
                         ids=[" ".join(text.split()) for text, _ in INVALID])
def test_invalid_values_are_refused_naming_file_and_key(tmp_path, text, message):
    path = toml(tmp_path / "bad.toml", text)
    with pytest.raises(InputError, match="^" + re.escape(str(path)) + ": " + message):
        load_config(path)


def test_invalid_file_found_through_the_environment(tmp_path, monkeypatch):
    path = toml(tmp_path / "env.toml", "[rolling]\nstep = -1\n")
    monkeypatch.setenv("COMOVE_CONFIG", str(path))
    with pytest.raises(InputError, match=re.escape(str(path)) + r": rolling\.step"):
        load_config()


def test_invalid_file_in_cwd_is_not_ignored(clean_environment):
    toml(clean_environment / "comove.toml", "[marginals]\nmode = \"future\"\n")
    with pytest.raises(InputError, match=r"comove\.toml: marginals\.mode"):
        load_config()


@pytest.mark.parametrize(("text", "where"), [
    ("[rolling\nwindow = 100\n", r"line 1"),
    ("[rolling]\nwindow = \n", r"line 2"),
    ("[rolling]\nwindow = 100\nwindow = 200\n", r"line 3"),
], ids=["unclosed_table", "missing_value", "repeated_key"])
def test_bad_toml_is_refused_naming_file_and_line(tmp_path, text, where):
    path = toml(tmp_path / "broken.toml", text)
    with pytest.raises(InputError, match="^" + re.escape(str(path)) + r": not valid TOML \(.*"
                                         + where):
        load_config(path)


def test_non_utf8_config_is_refused(tmp_path):
    path = tmp_path / "latin1.toml"
    path.write_bytes("[alerts.email]\nsender = \"caf\u00e9\"\n".encode("latin-1"))
    with pytest.raises(InputError, match="^" + re.escape(str(path)) + r": not valid TOML"):
        load_config(path)

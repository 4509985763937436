"""The ``comove`` command line.

Exit codes (docs/contracts.md): 0 success; 2 bad input or usage, with one line ``error: ...`` on stderr
naming the file, row/date, column or option at fault; 1 unexpected failure. No traceback reaches
the user unless ``COMOVE_DEBUG=1`` is set.
"""

from __future__ import annotations

import argparse
import datetime as dt
import json
import os
import sys
import traceback
from collections.abc import Sequence

import pandas as pd

from monitor.common.errors import InputError
from monitor.common.wording import CAUTION
from monitor.config import Config, load_config
from monitor.data.tables import FORMULA_STARTS


class _Parser(argparse.ArgumentParser):
    """argparse with the contract's one-line error and exit code 2."""

    def error(self, message: str) -> None:  # type: ignore[override]
        sys.stderr.write(f"error: {message} (see '{self.prog} --help')\n")
        raise SystemExit(2)


def _common(p: argparse.ArgumentParser) -> None:
    p.add_argument("--config", metavar="FILE",
                   help="configuration file (default $COMOVE_CONFIG, else ./comove.toml if present)")
    p.add_argument("--store", metavar="URL",
                   help="store URL, overriding the config (default $COMOVE_STORE)")


def _reading(p: argparse.ArgumentParser) -> None:
    """The options that read files as spreadsheets and terminals export them."""
    g = p.add_argument_group("reading CSV files exported by other programs")
    g.add_argument("--sep", default=",", metavar="CHAR",
                   help="field separator (default ','; e.g. ';' or '\\t')")
    g.add_argument("--decimal", default=".", metavar="MARK",
                   help="decimal mark of numbers: '.' (default) or ','")
    g.add_argument("--thousands", default="", metavar="MARK",
                   help="thousands separator inside numbers (default none; e.g. ',' or '.')")
    g.add_argument("--date-format", default="", metavar="FORMAT",
                   help="date layout as strftime codes, e.g. '%%d/%%m/%%Y' (default ISO "
                        "YYYY-MM-DD; day-first or month-first dates are refused without it)")
    g.add_argument("--columns", default="", metavar="ROLE=NAME,...",
                   help="the file's columns for date, asset and value, e.g. "
                        "date=Date,asset=Ticker,value=Close (a long file from those three "
                        "columns) or date=Day (a wide file's date column)")


def _read_options(args: argparse.Namespace):
    """The reading options of the command line, checked."""
    from monitor.data.tables import parse_columns, read_options

    columns = parse_columns(args.columns) if args.columns else None
    return read_options(sep=args.sep, decimal=args.decimal, thousands=args.thousands,
                        date_format=args.date_format, columns=columns)


def build_parser() -> argparse.ArgumentParser:
    """The argument parser with every subcommand of the contract."""
    parser = _Parser(
        prog="comove",
        description="Monitor time-varying dependence between daily asset returns: GARCH-filtered "
                    "rolling copulas, Kendall's tau and tail dependence, regime alerts.",
        epilog=CAUTION,
    )
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    sub.required = True
    for add in (_add_demo, _add_synth, _add_ingest, _add_update, _add_fit, _add_export,
                _add_alerts, _add_serve):
        add(sub)
    return parser


def _add_demo(sub) -> None:
    """``comove demo``: the synthetic market end to end, then the dashboard."""
    p = sub.add_parser("demo", help="synthetic scenario -> store -> update -> dashboard")
    _common(p)
    p.add_argument("--port", type=int, default=8050, help="dashboard port (default 8050)")
    p.add_argument("--no-browser", action="store_true", help="do not open a web browser")


def _add_synth(sub) -> None:
    """``comove synth``: write a synthetic scenario."""
    p = sub.add_parser("synth", help="write a synthetic scenario (prices.csv, truth.json)")
    _common(p)
    p.add_argument("scenario", help="scenario name: marrowmere-decade (the demo market), "
                   "tail-shift, steady-pair, wide-grid")
    p.add_argument("--out", required=True, metavar="DIR", help="output directory")
    p.add_argument("--seed", type=int, default=0, help="random seed (default 0)")


def _add_ingest(sub) -> None:
    """``comove ingest``: validate and store price or return tables."""
    p = sub.add_parser(
        "ingest", help="validate and store price or return files",
        description="Validate price or return tables and store them. A bad file is refused "
                    "whole and nothing stored changes; all sources of one call are stored "
                    "together or not at all.")
    _common(p)
    p.add_argument("files", nargs="*", metavar="FILE",
                   help="CSV or Parquet, wide (date + one column per asset) or long "
                        "(date, asset, value); glob patterns allowed")
    p.add_argument("--kind", choices=("prices", "returns"), default="prices",
                   help="what the values are (default prices: log returns are derived)")
    p.add_argument("--accept-revisions", action="store_true",
                   help="replace stored values that differ, keeping the old ones in the audit "
                        "table (default: refuse)")
    p.add_argument("--accept-outliers", action="store_true",
                   help="store returns beyond ingest.max_abs_log_return (default 1.0) instead "
                        "of refusing the file; they are named in the ingest history")
    p.add_argument("--sql", metavar="URL", help="read from a database (SQLAlchemy URL) instead")
    grp = p.add_mutually_exclusive_group()
    grp.add_argument("--table", help="with --sql: a table to read whole")
    grp.add_argument("--query", help="with --sql: a SELECT statement")
    _reading(p)


def _add_update(sub) -> None:
    """``comove update``: the daily job."""
    p = sub.add_parser("update", help="marginals, rolling metrics, signals, alert queue")
    _common(p)
    p.add_argument("--wait", type=float, default=0.0, metavar="SECONDS",
                   help="wait this long for an update already running on the store (default "
                        "0: refuse at once, exit 2)")


def _add_fit(sub) -> None:
    """``comove fit``: the one-window study of a pair."""
    p = sub.add_parser(
        "fit", help="one-window study of a pair: every candidate family",
        description="Fit every candidate copula family to one window of a pair by maximum "
                    "pseudo-likelihood and rank them by AIC (or BIC).", epilog=CAUTION)
    _common(p)
    p.add_argument("file", metavar="FILE", help="CSV or Parquet, wide or long")
    p.add_argument("--pair", nargs=2, required=True, metavar=("A", "B"), help="the two columns")
    p.add_argument("--start", metavar="D", help="first date of the window (YYYY-MM-DD)")
    p.add_argument("--end", metavar="D", help="last date of the window (YYYY-MM-DD)")
    p.add_argument("--kind", choices=("prices", "returns", "uniforms"), default="returns",
                   help="what the columns hold (default returns); prices become log returns, "
                        "uniforms are taken as pseudo-observations as given")
    p.add_argument("--filter", choices=("real-time", "in-sample", "none"),
                   help="GARCH-type marginal filter before ranking, using data up to --end only "
                        "(default: marginals.mode of the config, real-time); none ranks raw "
                        "returns")
    p.add_argument("--families", nargs="+", metavar="NAME",
                   help="candidate families (default: rolling.families of the config)")
    p.add_argument("--criterion", choices=("aic", "bic"),
                   help="selection criterion (default: rolling.criterion of the config)")
    p.add_argument("--tail-q", type=float, help="level q of the empirical tail dependence "
                   "(default: rolling.tail_q of the config, 0.10)")
    p.add_argument("--bootstrap", type=int, default=0, metavar="B",
                   help="parametric-bootstrap replicates for goodness-of-fit p-values and "
                        "intervals (0 skips; 200 is a good choice)")
    p.add_argument("--seed", type=int, default=0, help="seed of the bootstrap (default 0)")
    p.add_argument("--json", action="store_true", help="print one JSON object")
    _reading(p)


def _add_export(sub) -> None:
    """``comove export timeline|returns``: stored data as CSV."""
    p = sub.add_parser("export", help="export stored data as CSV")
    _common(p)
    esub = p.add_subparsers(dest="what", metavar="WHAT", parser_class=_Parser)
    esub.required = True
    q = esub.add_parser("timeline", help="a pair's metrics timeline")
    _common(q)
    q.add_argument("--pair", nargs=2, required=True, metavar=("A", "B"))
    q.add_argument("--out", metavar="FILE", help="output file (default stdout)")
    q = esub.add_parser("returns", help="stored log returns, wide")
    _common(q)
    q.add_argument("--assets", nargs="+", metavar="A", help="columns to export (default all)")
    q.add_argument("--out", metavar="FILE", help="output file (default stdout)")


def _add_alerts(sub) -> None:
    """``comove alerts send``: deliver the queued e-mails."""
    p = sub.add_parser("alerts", help="alert e-mail")
    _common(p)
    asub = p.add_subparsers(dest="action", metavar="ACTION", parser_class=_Parser)
    asub.required = True
    q = asub.add_parser(
        "send", help="deliver queued alert e-mails; failures stay queued",
        description="Try every pending alert once when the SMTP server answers (back-off "
                    "only spaces attempts while it does not). Exit 1 when a message failed or "
                    "was refused in this run, or one queued longer ago than "
                    "alerts.late_after_minutes is still undelivered.")
    _common(q)
    q.add_argument("--dry-run", action="store_true", help="print what would be sent")
    q.add_argument("--retry-failed", action="store_true",
                   help="first put the messages the server refused for good back in the "
                        "queue (after fixing the cause, e.g. a recipient)")


def _add_serve(sub) -> None:
    """``comove serve``: the dashboard."""
    p = sub.add_parser("serve", help="the dashboard")
    _common(p)
    p.add_argument("--host", default="127.0.0.1", help="bind address (default 127.0.0.1)")
    p.add_argument("--port", type=int, default=8050, help="port (default 8050)")
    p.add_argument("--server-name", action="append", default=[], metavar="NAME",
                   help="a host name the dashboard answers to besides the loopback names and "
                        "the bind address (e.g. a team's name behind a reverse proxy); "
                        "repeatable. Requests naming any other host get 400")
    p.add_argument("--processes", type=int, default=None, metavar="N",
                   help="server processes answering side by side (default: one per core, at "
                        "most 4); 1 serves from this process alone")


# ----------------------------------------------------------------------------- commands
def _cmd_fit(args: argparse.Namespace, cfg: Config) -> int:
    from monitor.data.tables import read_series
    from monitor.engine.window_study import filtered_pair, study_window
    from monitor.stats.copulas import FAMILY_NAMES
    from monitor.stats.marginals import MarginalSettings

    families = tuple(args.families) if args.families else cfg.rolling.families
    for name in families:
        if name not in FAMILY_NAMES:
            raise InputError(f"--families: unknown family {name!r}; known: "
                             f"{', '.join(FAMILY_NAMES)}")
    for name in families:
        if families.count(name) > 1:
            raise InputError(f"--families: {name!r} is listed twice")
    mode = args.filter or cfg.marginals.mode
    settings = None if mode == "none" else MarginalSettings(
        mode=mode, refit_every=cfg.marginals.refit_every)
    frame = read_series(args.file, _read_options(args))
    series, info = filtered_pair(frame, args.pair[0], args.pair[1], kind=args.kind,
                                 end=args.end, settings=settings, source=args.file)
    study = study_window(
        series, args.pair[0], args.pair[1], kind=args.kind, start=args.start, end=args.end,
        families=families, criterion=args.criterion or cfg.rolling.criterion,
        tail_q=args.tail_q if args.tail_q is not None else cfg.rolling.tail_q,
        bootstrap=args.bootstrap, rng=args.seed, source=args.file, filter_info=info,
    )
    if args.json:
        print(json.dumps(study.to_json(), allow_nan=False, default=float))
        return 0
    print(render_study(study))
    return 0


def render_study(study) -> str:
    """The readable table ``comove fit`` prints."""
    a, b = study.pair
    info = study.filter_info
    if study.kind == "uniforms":
        how = "pseudo-observations as given"
    elif info.get("mode", "none") == "none":
        how = "rank pseudo-observations of raw returns, no marginal filter"
    else:
        models = ", ".join(f"{c}: {m['spec']}" + (" (EWMA-t fallback)" if m["fallback"] else "")
                           for c, m in info["models"].items())
        how = (f"rank pseudo-observations of {info['mode']} GARCH-filtered residuals; "
               f"models at the window end {models}")
    kt = study.kendall_tau
    lines = [
        f"Pair {a} / {b}: {study.start.date()} to {study.end.date()}, n = {study.n} ({how})",
    ]
    if study.dropped:
        lines.append(f"  {study.dropped} date(s) in the range had only one of the two columns "
                     "and were left out")
    lines += [
        (f"  Kendall's tau {kt.estimate:.3f} (95% interval {kt.lower:.3f} to {kt.upper:.3f}), "
        f"Spearman's rho {study.spearman_rho:.3f}"),
        (f"  Empirical tail dependence at q = {study.tail_q:g}: lower {study.tail_lower_emp:.3f}, "
        f"upper {study.tail_upper_emp:.3f}"),
        "",
    ]
    header = (f"  {'family':<13}{'rot':>4}  {'parameters':<24}{'loglik':>9}{'AIC':>10}{'BIC':>10}"
              f"{'tau':>7}{'tailL':>7}{'tailU':>7}")
    if study.gof:
        header += f"{'GoF p':>7}"
    lines.append(header)
    crit = study.selection.criterion
    for f in sorted(study.selection.fits, key=lambda f: getattr(f, crit)):
        params = ", ".join(f"{k}={v:.4g}" for k, v in f.params.items()) or "-"
        row = (f"  {f.family:<13}{f.rotation:>4}  {params:<24}{f.loglik:>9.2f}{f.aic:>10.2f}"
               f"{f.bic:>10.2f}{f.kendall_tau:>7.3f}{f.tail_lower:>7.3f}{f.tail_upper:>7.3f}")
        if study.gof:
            row += f"{study.gof[f.label].p_value:>7.3f}"
        if not f.converged:
            row += "  (did not converge)"
        if f is study.selection.selected:
            row += "  <- selected"
        lines.append(row)
    sel = study.selection.selected
    lines += ["", f"Selected by {crit.upper()}: {sel.label}."]
    if study.uncertainty is not None:
        unc = study.uncertainty
        lines.append(f"  {int(unc.level * 100)}% intervals ({unc.method}, "
                     f"{unc.replicates} replicates):")
        for k, q in unc.quantities.items():
            lines.append(f"    {k:<12} {q.estimate:8.4f}  s.e. {q.std_error:.4f}  "
                         f"[{q.lower:.4f}, {q.upper:.4f}]")
    lines += ["", CAUTION]
    return "\n".join(lines)


def _cmd_ingest(args: argparse.Namespace, cfg: Config) -> int:
    from monitor.data.ingest import (
        expand_paths,
        ingest_sources,
        read_file_source,
        read_sql_table_source,
    )
    from monitor.data.store import Store

    if args.sql and args.files:
        raise InputError("give files or --sql, not both")
    if (args.table or args.query) and not args.sql:
        raise InputError("--table and --query go with --sql")
    if args.sql:
        if not (args.table or args.query):
            raise InputError("--sql needs --table or --query")
        if _read_options(args) != _read_options(build_parser().parse_args(["ingest"])):
            raise InputError("--sep, --decimal, --thousands, --date-format and --columns go "
                             "with files (a SQL source's cells are typed)")
        sources = [read_sql_table_source(args.sql, args.kind, query=args.query,
                                         table=args.table, limits=cfg.ingest,
                                         accept_outliers=args.accept_outliers)]
    else:
        if not args.files:
            raise InputError("name at least one file (or --sql)")
        options = _read_options(args)
        paths = [p for pattern in args.files for p in expand_paths(pattern)]
        # Every source is read and checked before the store is opened.
        sources = [read_file_source(p, args.kind, options, cfg.ingest,
                                    accept_outliers=args.accept_outliers) for p in paths]
    with Store(cfg.store.url) as store:
        for report in ingest_sources(store, sources, accept_revisions=args.accept_revisions):
            print("\n".join(report.lines()))
    return 0


def _defused(value):
    """A text cell a spreadsheet would run as a formula, with a leading apostrophe (OWASP,
    "CSV Injection"); numbers and other cells unchanged. Ingest refuses such asset names;
    this covers a store written before it did."""
    if isinstance(value, str) and value.startswith(FORMULA_STARTS):
        return "'" + value
    return value


def _write_csv(frame, out: str | None) -> None:
    frame = frame.rename(columns=_defused)
    for col in frame.columns[frame.dtypes == object]:
        frame[col] = frame[col].map(_defused)
    text = frame.to_csv(date_format="%Y-%m-%d")  # floats as the shortest exact repr
    if out:
        try:
            with open(out, "w", encoding="utf-8", newline="") as fh:
                fh.write(text)
        except OSError as exc:
            raise InputError(f"--out {out}: cannot write ({exc.strerror})") from None
    else:
        sys.stdout.write(text)


def _cmd_export(args: argparse.Namespace, cfg: Config) -> int:
    from monitor.data.store import Store

    if args.what == "timeline":
        return _export_timeline(args, cfg)
    with Store(cfg.store.url, create=False) as store:
        known = store.assets()
        if args.assets:
            unknown = [a for a in args.assets if a not in known]
            if unknown:
                raise InputError(f"--assets: no stored returns for {unknown[0]!r} "
                                 f"(stored: {', '.join(known) or 'none'})")
        frame = store.read_returns(args.assets or known)
    frame.index.name = "date"
    _write_csv(frame, args.out)
    return 0


def _cmd_update(args: argparse.Namespace, cfg: Config) -> int:
    from monitor.engine.pipeline import run_update

    if args.wait < 0:
        raise InputError(f"--wait must be 0 or more seconds, got {args.wait:g}")
    summary = run_update(cfg, progress=True, wait=args.wait)
    print("\n".join(summary.lines()), flush=True)
    problem = summary.shortfall()
    if problem is not None:
        raise InputError(problem)
    return 0


def _cmd_synth(args: argparse.Namespace, cfg: Config) -> int:
    from synthetic_feeds import SCENARIOS, write_scenario

    prices_path, truth_path = write_scenario(args.scenario, args.out, seed=args.seed)
    print(f"{args.scenario} (seed {args.seed}): {SCENARIOS[args.scenario]}")
    print(f"  wrote {prices_path} and {truth_path} (invented data, for demos and tests)")
    return 0


#: docs/contracts.md's timeline columns, in contract order; the rest follow.
TIMELINE_COLUMNS = ("date", "n", "kendall_tau", "spearman_rho", "family", "rotation",
                    "tail_lower", "tail_upper", "tail_lower_emp", "tail_upper_emp", "alert")


def _export_timeline(args: argparse.Namespace, cfg: Config) -> int:
    from monitor.data.store import Store
    from monitor.engine.pipeline import read_pair_signals
    from monitor.settings import marginal_settings

    a, b = args.pair
    if a == b:
        raise InputError("--pair: the two assets must differ")
    with Store(cfg.store.url, create=False) as store:
        swapped = False
        sig = read_pair_signals(store, cfg, a, b)
        if sig is None:
            sig = read_pair_signals(store, cfg, b, a)
            swapped = sig is not None
        if sig is None:
            known = store.assets()
            for asset in (a, b):
                if asset not in known:
                    raise InputError(f"--pair: no stored returns for {asset!r} "
                                     f"(stored: {', '.join(known) or 'none'})")
            raise InputError(f"--pair {a} {b}: no rolling metrics stored under the current "
                             "settings (run 'comove update')")
    frame = sig.frame.copy()
    if swapped:
        # Swapping the columns turns a 90-degree rotation into a 270-degree one.
        frame["rotation"] = frame["rotation"].replace({90: 270, 270: 90})
    frame["marginal_mode"] = marginal_settings(cfg).mode
    rest = [c for c in frame.columns if c not in TIMELINE_COLUMNS]
    frame = frame[[*TIMELINE_COLUMNS, *rest]]
    frame["date"] = pd.to_datetime(frame["date"]).dt.strftime("%Y-%m-%d")
    frame["start"] = pd.to_datetime(frame["start"]).dt.strftime("%Y-%m-%d")
    _write_csv(frame.set_index("date"), args.out)
    return 0


def _cmd_serve(args: argparse.Namespace, cfg: Config) -> int:
    # The dashboard lives outside the library (monitor/ does not depend on dash).
    from callbacks.serve import DEFAULT_PROCESSES, serve

    processes = DEFAULT_PROCESSES if args.processes is None else args.processes
    serve(cfg, args.host, args.port, server_names=tuple(args.server_name), processes=processes)
    return 0


def _cmd_demo(args: argparse.Namespace, cfg: Config) -> int:
    from callbacks.serve import demo

    demo(args.port, open_browser=not args.no_browser, store_url=args.store)
    return 0


def _utc_now() -> dt.datetime:
    return dt.datetime.now(dt.UTC).replace(tzinfo=None)


def _cmd_alerts(args: argparse.Namespace, cfg: Config) -> int:
    from monitor.alerts.charts import chart_maker
    from monitor.alerts.mailer import send_pending
    from monitor.data.store import Store
    from monitor.settings import rolling_key

    with Store(cfg.store.url, create=False) as store:
        if args.dry_run:
            report = send_pending(store, cfg, dry_run=True)
        else:
            if args.retry_failed:
                print(f"alerts: {store.requeue_failed(_utc_now())} refused message(s) queued "
                      "again")
            with chart_maker(store, rolling_key(cfg)) as chart:
                report = send_pending(store, cfg, chart=chart)
    print("\n".join(report.lines()))
    if report.ok:
        return 0
    problems = []
    if report.failed:
        problems.append(f"{report.failed} message(s) not delivered; they stay queued and are "
                        "retried")
    if report.refused:
        problems.append(f"{report.refused} message(s) refused for good (see the Episodes "
                        "page's outbox; --retry-failed after fixing the cause)")
    if report.late:
        problems.append(f"{report.late} alert(s) queued more than "
                        f"{cfg.alerts.late_after_minutes} min ago are still undelivered")
    why = f" ({report.errors[0]})" if len(report.errors) == 1 else " (reasons above)"
    sys.stderr.write(f"error: {'; '.join(problems)}{why if report.errors else ''}\n")
    return 1


_COMMANDS = {
    "fit": _cmd_fit,
    "demo": _cmd_demo,
    "synth": _cmd_synth,
    "ingest": _cmd_ingest,
    "update": _cmd_update,
    "export": _cmd_export,
    "alerts": _cmd_alerts,
    "serve": _cmd_serve,
}


def main(argv: Sequence[str] | None = None) -> int:
    """Run ``comove``; returns the exit code."""
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:
        return int(exc.code or 0)
    try:
        cfg = load_config(args.config, args.store)
        return _COMMANDS[args.command](args, cfg)
    except InputError as exc:
        sys.stderr.write(f"error: {exc}\n")
        return 2
    except KeyboardInterrupt:
        sys.stderr.write("error: interrupted\n")
        return 130
    except BrokenPipeError:
        return 0
    except Exception as exc:  # noqa: BLE001 - the contract: no traceback, exit 1
        if os.environ.get("COMOVE_DEBUG") == "1":
            traceback.print_exc()
        first = str(exc).splitlines()[0] if str(exc) else ""
        sys.stderr.write(f"error: unexpected failure: {type(exc).__name__}: {first} "
                         "(set COMOVE_DEBUG=1 for details)\n")
        return 1

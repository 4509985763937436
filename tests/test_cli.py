"""Tests for the ``comove`` command line, run as the installed console script.

The contract is docs/contracts.md ("Contracts"): exit 0 on success, 2 on bad input or usage with exactly
one ``error: ...`` line on stderr naming the file, row/date, column or option at fault and no
traceback, 1 on an unexpected failure; and the ``comove fit --json`` object. The numbers in that
object are checked against scipy (Kendall's tau-b, Spearman's rho, multivariate t density), the
closed forms of docs/check-values.md, and the definitions of AIC (Akaike 1974) and BIC
(Schwarz 1978).

The data are simulated (fictional assets, correlated Student-t returns) so nothing here
depends on a real market. Every subprocess takes about a second, so each distinct command runs
once (module-scoped fixtures) and the tests share its output.
"""

from __future__ import annotations

import json
import math
import os
import re
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import integrate, stats

from monitor import cli

CONTRACT_FAMILIES = ("independence", "gaussian", "student_t", "clayton", "gumbel", "frank",
                     "joe", "bb1", "bb7")
# Families without radial symmetry, fitted at rotation 0 and its survival rotation 180 (or at
# 90 and 270 when tau < 0); Gaussian, t and Frank are radially symmetric and cover tau < 0
# with their own parameter.
ROTATABLE = ("clayton", "gumbel", "joe", "bb1", "bb7")
# Parameter names per family (docs/contracts.md: "parameters rho, nu, theta, delta").
CONTRACT_PARAMS = {
    "independence": set(), "gaussian": {"rho"}, "student_t": {"rho", "nu"},
    "clayton": {"theta"}, "gumbel": {"theta"}, "frank": {"theta"}, "joe": {"theta"},
    "bb1": {"theta", "delta"}, "bb7": {"theta", "delta"},
}
FIT_KEYS = {"family", "rotation", "params", "loglik", "aic", "bic", "kendall_tau",
            "tail_lower", "tail_upper"}
TOP_KEYS = {"n", "start", "end", "kendall_tau", "spearman_rho", "empirical_tail", "fits",
            "selected"}
WINDOW = ("2021-03-06", "2022-03-31")   # 2021-03-06 is a Saturday: the window opens on Monday
SUBCOMMANDS = [["demo"], ["synth"], ["ingest"], ["update"], ["fit"], ["export"],
               ["export", "timeline"], ["export", "returns"], ["alerts"], ["alerts", "send"],
               ["serve"]]


def _comove() -> str:
    found = shutil.which("comove", path=str(Path(sys.executable).parent))
    if found is None:
        pytest.fail("the comove console script is not installed next to this Python; run "
                    "'pip install -e .' first")
    return found


def run(args: list[str], cwd: Path, env: dict[str, str] | None = None,
        timeout: float = 60) -> subprocess.CompletedProcess:
    """Run ``comove ARGS`` in ``cwd`` with no COMOVE_* variables from the caller."""
    base = {k: v for k, v in os.environ.items() if not k.startswith("COMOVE_")}
    return subprocess.run([_comove(), *args], cwd=cwd, env={**base, **(env or {})},
                          capture_output=True, text=True, timeout=timeout, check=False)


def assert_one_error_line(proc: subprocess.CompletedProcess, code: int = 2) -> str:
    """Exit ``code``, nothing on stdout, exactly one stderr line ``error: ...``; returns it."""
    assert proc.returncode == code, (proc.returncode, proc.stderr)
    assert proc.stdout == ""
    lines = proc.stderr.splitlines()
    assert len(lines) == 1, proc.stderr
    assert lines[0].startswith("error: ")
    assert "Traceback" not in proc.stderr
    return lines[0]


# ---------------------------------------------------------------------------------- the data
def simulate_returns(n: int = 420, seed: int = 20240611) -> pd.DataFrame:
    """Daily returns of fictional assets: ALDER and BIRCH t-dependent (rho 0.6, 4 d.o.f.),
    ELM negatively dependent on ALDER, FLAT constant, SPARSE with only 12 values."""
    rng = np.random.default_rng(seed)
    cov = np.array([[1.0, 0.6, -0.5], [0.6, 1.0, -0.3], [-0.5, -0.3, 1.0]])
    z = rng.multivariate_normal(np.zeros(3), cov, size=n)
    w = np.sqrt(rng.chisquare(4, size=n) / 4)[:, None]
    r = 0.01 * z / w
    dates = pd.bdate_range("2021-01-04", periods=n)
    frame = pd.DataFrame({"date": dates.strftime("%Y-%m-%d"), "ALDER": r[:, 0],
                          "BIRCH": r[:, 1], "ELM": r[:, 2], "FLAT": 0.0, "SPARSE": np.nan})
    frame.loc[3::17, "BIRCH"] = np.nan                 # BIRCH misses some dates ALDER has
    frame.loc[frame.index[100:112], "SPARSE"] = r[100:112, 0]
    return frame


@pytest.fixture(scope="module")
def work(tmp_path_factory) -> Path:
    """A working directory with no comove.toml, holding the input files."""
    path = tmp_path_factory.mktemp("cli")
    frame = simulate_returns()
    frame.to_csv(path / "returns.csv", index=False)
    long = frame.melt(id_vars="date", var_name="asset", value_name="value").dropna()
    long["date"] = pd.to_datetime(long["date"])
    long.sample(frac=1.0, random_state=3).to_parquet(path / "returns_long.parquet", index=False)

    nan_text = (path / "returns.csv").read_text().splitlines()
    head = nan_text[0].split(",")
    cells = nan_text[9].split(",")
    cells[head.index("BIRCH")] = "NaN"
    nan_text[9] = ",".join(cells)
    (path / "nan_text.csv").write_text("\n".join(nan_text) + "\n")

    # Uniforms: probability transforms of the t-returns through the t(4) cdf, so in (0, 1).
    u = stats.t.cdf(frame["ALDER"] / 0.01, 4)
    v = stats.t.cdf(frame["ELM"] / 0.01, 4)
    bad = v.copy()
    bad[50] = 1.0                                       # on the boundary: not a uniform
    pd.DataFrame({"date": frame["date"], "U": u, "V": v, "W": bad}).to_csv(
        path / "uniforms.csv", index=False)
    return path


def window_columns(work: Path, a: str, b: str, start: str | None = None,
                   end: str | None = None, name: str = "returns.csv") -> pd.DataFrame:
    """The rows of the window with both columns, read with plain pandas (not monitor)."""
    frame = pd.read_csv(work / name, parse_dates=["date"]).set_index("date")[[a, b]]
    if start:
        frame = frame[frame.index >= pd.Timestamp(start)]
    if end:
        frame = frame[frame.index <= pd.Timestamp(end)]
    return frame.dropna()


def fit_json(work: Path, *args: str, env: dict[str, str] | None = None) -> dict:
    # These files are short: rank raw returns (the GARCH filter has its own tests) unless the
    # test asks for a filter.
    extra = [] if "--filter" in args else ["--filter", "none"]
    proc = run(["fit", *args, *extra, "--json"], work, env)
    assert proc.returncode == 0, proc.stderr
    assert proc.stderr == ""
    assert len(proc.stdout.splitlines()) == 1          # one object, nothing else on stdout
    return json.loads(proc.stdout)


@pytest.fixture(scope="module")
def study(work) -> dict:
    return fit_json(work, "returns.csv", "--pair", "ALDER", "BIRCH",
                    "--start", WINDOW[0], "--end", WINDOW[1])


@pytest.fixture(scope="module")
def negative_study(work) -> dict:
    return fit_json(work, "returns.csv", "--pair", "ALDER", "ELM", "--end", "2021-12-31")


# ------------------------------------------------------------------ closed forms (docs/check-values.md)
def pseudo_obs(x: np.ndarray) -> np.ndarray:
    # Ranks / (n + 1), ties averaged (docs/check-values.md conventions; Genest, Ghoudi & Rivest 1995).
    return stats.rankdata(x) / (len(x) + 1.0)


def gaussian_loglik(u, v, rho):
    # Gaussian copula density (docs/check-values.md sec. 1, "Densities"):
    # c = (1-rho^2)^(-1/2) exp{-[rho^2 (x^2+y^2) - 2 rho x y] / [2 (1-rho^2)]}.
    x, y = stats.norm.ppf(u), stats.norm.ppf(v)
    q = (rho**2 * (x**2 + y**2) - 2 * rho * x * y) / (2 * (1 - rho**2))
    return float(np.sum(-0.5 * np.log1p(-rho**2) - q))


def student_t_loglik(u, v, rho, nu):
    # t copula density c = f2(x, y) / (f_nu(x) f_nu(y)), x = t_nu^{-1}(u) (docs/check-values.md
    # sec. 1), with f2 from scipy.stats.multivariate_t.
    x, y = stats.t.ppf(u, nu), stats.t.ppf(v, nu)
    joint = stats.multivariate_t(loc=[0, 0], shape=[[1, rho], [rho, 1]], df=nu)
    return float(np.sum(joint.logpdf(np.column_stack([x, y]))
                        - stats.t.logpdf(x, nu) - stats.t.logpdf(y, nu)))


def clayton_loglik(u, v, theta):
    # c = (1+theta)(uv)^(-theta-1)(u^-theta + v^-theta - 1)^(-1/theta-2) (docs/check-values.md sec. 1).
    s = u**-theta + v**-theta - 1
    return float(np.sum(np.log1p(theta) - (theta + 1) * np.log(u * v)
                        - (1 / theta + 2) * np.log(s)))


def debye1(x: float) -> float:
    # D_1(x) = (1/x) int_0^x t/(e^t - 1) dt (docs/check-values.md sec. 1; D_1(-x) = D_1(x) + x/2).
    if x < 0:
        return debye1(-x) - x / 2
    return integrate.quad(lambda t: t / math.expm1(t) if t > 0 else 1.0, 0, x)[0] / x


def implied(family: str, p: dict) -> tuple[float | None, float, float]:
    """(tau, lambda_L, lambda_U) of the unrotated family, docs/check-values.md sec. 1 table and notes;
    tau is None where only a numeric or from-memory form exists."""
    if family == "independence":
        return 0.0, 0.0, 0.0
    if family == "gaussian":
        return 2 / math.pi * math.asin(p["rho"]), 0.0, 0.0
    if family == "student_t":
        rho, nu = p["rho"], p["nu"]
        lam = 2 * stats.t.cdf(-math.sqrt((nu + 1) * (1 - rho) / (1 + rho)), nu + 1)
        return 2 / math.pi * math.asin(rho), lam, lam
    if family == "clayton":
        return p["theta"] / (p["theta"] + 2), 2 ** (-1 / p["theta"]), 0.0
    if family == "gumbel":
        return 1 - 1 / p["theta"], 0.0, 2 - 2 ** (1 / p["theta"])
    if family == "frank":
        return 1 - 4 / p["theta"] * (1 - debye1(p["theta"])), 0.0, 0.0
    if family == "joe":
        # tau = 1 - 4 sum_k 1/[k(theta k + 2)(theta(k-1) + 2)] (docs/check-values.md sec. 1, series).
        t, k = p["theta"], np.arange(1, 200_001, dtype=float)
        return 1 - 4 * np.sum(1 / (k * (t * k + 2) * (t * (k - 1) + 2))), 0.0, 2 - 2 ** (1 / t)
    if family == "bb1":
        t, d = p["theta"], p["delta"]
        return 1 - 2 / (d * (t + 2)), 2 ** (-1 / (t * d)), 2 - 2 ** (1 / d)
    if family == "bb7":
        return None, 2 ** (-1 / p["delta"]), 2 - 2 ** (1 / p["theta"])
    raise AssertionError(family)


# ------------------------------------------------------------------------------------- help
@pytest.mark.parametrize("words", [[], *SUBCOMMANDS], ids=lambda w: " ".join(w) or "top")
def test_help_works_for_every_command(work, words):
    proc = run([*words, "--help"], work)
    assert proc.returncode == 0, proc.stderr
    assert proc.stderr == ""
    assert proc.stdout.startswith("usage: comove")
    if words and words not in (["export"], ["alerts"]):
        # docs/contracts.md: every subcommand takes --config FILE and --store URL.
        assert "--config FILE" in proc.stdout and "--store URL" in proc.stdout


def test_fit_help_lists_the_contract_options(work):
    out = run(["fit", "--help"], work).stdout
    for option in ("--pair A B", "--start D", "--end D", "--kind", "--json", "--families",
                   "--bootstrap"):
        assert option in out
    assert "{prices,returns,uniforms}" in out


# ------------------------------------------------------------------------------ usage errors
@pytest.mark.parametrize(("args", "message"), [
    ([], r"^error: the following arguments are required: COMMAND"),
    (["bogus"], r"^error: argument COMMAND: invalid choice: 'bogus'"),
    (["fit", "returns.csv"], r"^error: the following arguments are required: --pair"),
    (["fit", "returns.csv", "--pair", "ALDER"], r"^error: argument --pair: expected 2 arguments"),
    (["fit", "returns.csv", "--pair", "ALDER", "BIRCH", "--kind", "levels"],
     r"^error: argument --kind: invalid choice: 'levels'"),
    (["fit", "returns.csv", "--pair", "ALDER", "BIRCH", "--bootstrap", "many"],
     r"^error: argument --bootstrap: invalid int value: 'many'"),
    (["fit", "returns.csv", "--pair", "ALDER", "BIRCH", "--windw", "5"],
     r"^error: unrecognized arguments: --windw 5"),
    (["export"], r"^error: the following arguments are required: WHAT"),
    (["alerts"], r"^error: the following arguments are required: ACTION"),
    (["serve", "--port", "http"], r"^error: argument --port: invalid int value: 'http'"),
], ids=["no_command", "unknown_command", "fit_no_pair", "pair_one_name", "bad_kind",
        "bootstrap_not_int", "unknown_option", "export_no_what", "alerts_no_action",
        "port_not_int"])
def test_usage_errors_exit_2_with_one_line(work, args, message):
    line = assert_one_error_line(run(args, work))
    assert re.search(message, line), line


# -------------------------------------------------------------------------- fit: the contract
def test_fit_json_has_the_contract_keys(study):
    assert TOP_KEYS <= set(study)
    assert isinstance(study["n"], int)
    assert set(study["empirical_tail"]) >= {"q", "lower", "upper"}
    assert set(study["selected"]) >= {"family", "rotation"}
    for fit in study["fits"]:
        assert FIT_KEYS <= set(fit)
        assert fit["family"] in CONTRACT_FAMILIES
        assert fit["rotation"] in (0, 90, 180, 270)
        assert set(fit["params"]) == CONTRACT_PARAMS[fit["family"]]
        for key in ("loglik", "aic", "bic", "kendall_tau", "tail_lower", "tail_upper"):
            assert isinstance(fit[key], float) and math.isfinite(fit[key]), (fit, key)
        assert all(math.isfinite(x) for x in fit["params"].values())
        # at_bound names parameters at an end of the family's search box, as "<name> <end>"
        assert all(p.split()[0] in fit["params"] and p.split()[1] in ("lower", "upper")
                   for p in fit["at_bound"])


def test_fit_window_matches_start_and_end(work, study):
    both = window_columns(work, "ALDER", "BIRCH", *WINDOW)
    assert study["n"] == len(both)
    assert study["start"] == "2021-03-08"              # the Monday after the Saturday --start
    assert study["start"] == both.index[0].strftime("%Y-%m-%d")
    assert study["end"] == both.index[-1].strftime("%Y-%m-%d") == WINDOW[1]
    in_range = pd.read_csv(work / "returns.csv", parse_dates=["date"]).set_index("date")
    in_range = in_range.loc[WINDOW[0]:WINDOW[1], ["ALDER", "BIRCH"]]
    assert study["dropped_dates"] == int(in_range.notna().any(axis=1).sum() - len(both))
    assert study["dropped_dates"] > 0                  # BIRCH's gaps are counted, not hidden


def test_fit_sample_tau_and_rho_equal_scipy(work, study):
    both = window_columns(work, "ALDER", "BIRCH", *WINDOW)
    x, y = both["ALDER"].to_numpy(), both["BIRCH"].to_numpy()
    # Kendall's tau-b and Spearman's rho: scipy.stats (Kendall 1938; Spearman 1904).
    assert study["kendall_tau"] == pytest.approx(stats.kendalltau(x, y).statistic, abs=1e-12)
    assert study["spearman_rho"] == pytest.approx(stats.spearmanr(x, y).statistic, abs=1e-12)


def test_fit_empirical_tail_matches_the_formula(work, study):
    both = window_columns(work, "ALDER", "BIRCH", *WINDOW)
    u, v = pseudo_obs(both["ALDER"].to_numpy()), pseudo_obs(both["BIRCH"].to_numpy())
    q = study["empirical_tail"]["q"]
    assert q == 0.10                                    # rolling.tail_q default
    # lambda_L(q) = C_n(q, q)/q, lambda_U(q) = [1 - 2(1-q) + C_n(1-q, 1-q)]/q with
    # C_n(a, b) = mean 1{U <= a, V <= b} (docs/check-values.md sec. 4; Schmidt & Stadtmueller 2006).
    def c_n(a, b):
        return np.mean((u <= a) & (v <= b))

    assert study["empirical_tail"]["lower"] == pytest.approx(c_n(q, q) / q, abs=1e-12)
    assert study["empirical_tail"]["upper"] == pytest.approx(
        (1 - 2 * (1 - q) + c_n(1 - q, 1 - q)) / q, abs=1e-12)


def test_fits_sorted_by_aic_and_selected_is_the_first(study):
    aic = [f["aic"] for f in study["fits"]]
    assert aic == sorted(aic)
    first = study["fits"][0]
    assert (study["selected"]["family"], study["selected"]["rotation"]) == (
        first["family"], first["rotation"])
    assert study["criterion"] == "aic"


def test_every_family_is_fitted_with_both_rotations(study):
    slots = {(f["family"], f["rotation"]) for f in study["fits"]}
    assert len(slots) == len(study["fits"])              # no slot twice
    assert {f for f, _ in slots} == set(CONTRACT_FAMILIES)
    for name in ROTATABLE:
        assert {(name, 0), (name, 180)} <= slots
    for name in ("gaussian", "student_t", "frank", "independence"):
        assert (name, 0) in slots


def test_aic_and_bic_follow_their_definitions(study):
    n = study["n"]
    for fit in study["fits"]:
        k = len(CONTRACT_PARAMS[fit["family"]])
        # AIC = 2k - 2 log L (Akaike 1974, IEEE Trans. Autom. Control 19, 716-723; from memory);
        # BIC = k ln n - 2 log L (Schwarz 1978, Ann. Statist. 6, 461-464; from memory).
        assert fit["aic"] == pytest.approx(2 * k - 2 * fit["loglik"], abs=1e-9)
        assert fit["bic"] == pytest.approx(k * math.log(n) - 2 * fit["loglik"], abs=1e-9)


def test_fit_implied_tau_and_tails_follow_the_closed_forms(study):
    for fit in study["fits"]:
        tau, lam_l, lam_u = implied(fit["family"], fit["params"])
        rot = fit["rotation"]
        if rot == 180:                  # survival copula: tails swap (docs/check-values.md sec. 2)
            lam_l, lam_u = lam_u, lam_l
        assert rot in (0, 180)          # positive tau here: no 90/270 slots
        label = f"{fit['family']} {rot}"
        if tau is not None:
            assert fit["kendall_tau"] == pytest.approx(tau, abs=1e-6), label
        assert fit["tail_lower"] == pytest.approx(lam_l, abs=1e-9), label
        assert fit["tail_upper"] == pytest.approx(lam_u, abs=1e-9), label


def test_fit_logliks_are_the_pseudo_likelihood_at_the_reported_parameters(work, study):
    both = window_columns(work, "ALDER", "BIRCH", *WINDOW)
    u, v = pseudo_obs(both["ALDER"].to_numpy()), pseudo_obs(both["BIRCH"].to_numpy())
    fits = {(f["family"], f["rotation"]): f for f in study["fits"]}
    assert fits[("independence", 0)]["loglik"] == 0.0

    rho = fits[("gaussian", 0)]["params"]["rho"]
    assert fits[("gaussian", 0)]["loglik"] == pytest.approx(gaussian_loglik(u, v, rho), rel=1e-9)
    # A maximum: moving rho either way lowers the pseudo-likelihood.
    assert gaussian_loglik(u, v, rho - 0.01) < fits[("gaussian", 0)]["loglik"]
    assert gaussian_loglik(u, v, rho + 0.01) < fits[("gaussian", 0)]["loglik"]

    t = fits[("student_t", 0)]["params"]
    assert fits[("student_t", 0)]["loglik"] == pytest.approx(
        student_t_loglik(u, v, t["rho"], t["nu"]), rel=1e-7)

    theta = fits[("clayton", 0)]["params"]["theta"]
    assert fits[("clayton", 0)]["loglik"] == pytest.approx(clayton_loglik(u, v, theta),
                                                           rel=1e-9)
    theta = fits[("clayton", 180)]["params"]["theta"]   # c_180(u, v) = c(1-u, 1-v)
    assert fits[("clayton", 180)]["loglik"] == pytest.approx(
        clayton_loglik(1 - u, 1 - v, theta), rel=1e-9)


def test_negative_dependence_uses_the_90_and_270_rotations(work, negative_study):
    both = window_columns(work, "ALDER", "ELM", end="2021-12-31")
    assert negative_study["n"] == len(both)
    assert negative_study["kendall_tau"] == pytest.approx(
        stats.kendalltau(both["ALDER"], both["ELM"]).statistic, abs=1e-12)
    assert negative_study["kendall_tau"] < -0.2
    for fit in negative_study["fits"]:
        tau, _, _ = implied(fit["family"], fit["params"])
        if fit["family"] in ROTATABLE:
            assert fit["rotation"] in (90, 270), fit
            # Rotating by 90 or 270 degrees changes the sign of tau and leaves no mass in the
            # (0,0) and (1,1) corners (docs/check-values.md sec. 2).
            if tau is not None:
                assert fit["kendall_tau"] == pytest.approx(-tau, abs=1e-6)
            assert fit["tail_lower"] == fit["tail_upper"] == 0.0
        elif fit["family"] != "independence":
            assert fit["rotation"] == 0, fit
            assert fit["kendall_tau"] == pytest.approx(tau, abs=1e-6)
            assert fit["kendall_tau"] < 0


def test_uniforms_are_taken_as_given(work):
    out = fit_json(work, "uniforms.csv", "--pair", "U", "V", "--kind", "uniforms",
                   "--families", "gaussian", "clayton")
    frame = pd.read_csv(work / "uniforms.csv")
    u, v = frame["U"].to_numpy(), frame["V"].to_numpy()
    assert ((u > 0) & (u < 1) & (v > 0) & (v < 1)).all()
    assert out["kind"] == "uniforms"
    assert out["n"] == len(frame)
    assert out["kendall_tau"] == pytest.approx(stats.kendalltau(u, v).statistic, abs=1e-12)
    fits = {(f["family"], f["rotation"]): f for f in out["fits"]}
    assert {f for f, _ in fits} == {"gaussian", "clayton"}
    # The likelihood is evaluated at the given values, not at their ranks.
    rho = fits[("gaussian", 0)]["params"]["rho"]
    assert fits[("gaussian", 0)]["loglik"] == pytest.approx(gaussian_loglik(u, v, rho), rel=1e-9)
    assert not np.isclose(gaussian_loglik(pseudo_obs(u), pseudo_obs(v), rho),
                          fits[("gaussian", 0)]["loglik"], rtol=1e-6)


def test_long_parquet_gives_the_same_study_as_wide_csv(work, study):
    out = fit_json(work, "returns_long.parquet", "--pair", "ALDER", "BIRCH",
                   "--start", WINDOW[0], "--end", WINDOW[1])
    assert out == study


def test_fit_prints_a_readable_table(work):
    proc = run(["fit", "returns.csv", "--pair", "ALDER", "BIRCH", "--end", "2021-06-30",
                "--families", "gaussian", "frank", "--filter", "none"], work)
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.startswith("Pair ALDER / BIRCH: 2021-01-04 to 2021-06-30, n = ")
    assert "Selected by AIC:" in proc.stdout
    assert "gaussian" in proc.stdout and "frank" in proc.stdout
    assert "not investment advice" in proc.stdout


# ----------------------------------------------------------------------- fit: configuration
def test_fit_reads_comove_toml_in_the_working_directory(work, tmp_path):
    shutil.copy(work / "returns.csv", tmp_path / "returns.csv")
    (tmp_path / "comove.toml").write_text(
        '[rolling]\nfamilies = ["gaussian", "clayton", "frank"]\ncriterion = "bic"\n')
    out = fit_json(tmp_path, "returns.csv", "--pair", "ALDER", "BIRCH", "--end", "2021-06-30")
    assert {f["family"] for f in out["fits"]} == {"gaussian", "clayton", "frank"}
    assert out["criterion"] == "bic"
    best = min(out["fits"], key=lambda f: f["bic"])
    assert (out["selected"]["family"], out["selected"]["rotation"]) == (
        best["family"], best["rotation"])


def test_bad_config_is_refused_before_any_work(work, tmp_path):
    bad = tmp_path / "bad.toml"
    bad.write_text("[rolling]\nwindow = 5\n")
    line = assert_one_error_line(run(["fit", "returns.csv", "--pair", "ALDER", "BIRCH",
                                      "--config", str(bad)], work))
    assert line == f"error: {bad}: rolling.window must be at least 30, got 5"
    line = assert_one_error_line(run(["fit", "returns.csv", "--pair", "ALDER", "BIRCH"], work,
                                     env={"COMOVE_CONFIG": str(tmp_path / "none.toml")}))
    assert "none.toml' not found" in line


# ------------------------------------------------------------------------ fit: bad inputs
BAD_FIT = {
    "unknown_column": (["returns.csv", "--pair", "ALDER", "OAK"],
                       r"^error: returns\.csv: no column 'OAK' \(columns: ALDER, BIRCH, "),
    "too_few_rows": (["returns.csv", "--pair", "ALDER", "BIRCH", "--start", "2021-02-01",
                      "--end", "2021-02-26"],
                     (r"^error: returns\.csv: only 1[0-9] dates with both 'ALDER' and 'BIRCH' "
                      r"in the window; at least 30 are needed$")),
    "sparse_column": (["returns.csv", "--pair", "ALDER", "SPARSE"],
                      r"^error: returns\.csv: only 12 dates with both 'ALDER' and 'SPARSE'"),
    "uniform_outside": (["uniforms.csv", "--pair", "U", "W", "--kind", "uniforms"],
                        r"^error: uniforms\.csv: 2021-03-15, column 'W': 1\.0 is not in \(0, 1\)"),
    "constant_column": (["returns.csv", "--pair", "ALDER", "FLAT"],
                        r"^error: returns\.csv: column 'FLAT' is constant in the window"),
    "nan_text": (["nan_text.csv", "--pair", "ALDER", "BIRCH"],
                 (r"^error: nan_text\.csv: line 10 \(2021-01-14\), column 'BIRCH': 'NaN' is "
                  r"not a finite number$")),
    "start_after_end": (["returns.csv", "--pair", "ALDER", "BIRCH", "--start", "2021-06-01",
                         "--end", "2021-03-01"],
                        r"^error: --start 2021-06-01 is after --end 2021-03-01$"),
    "bad_start_date": (["returns.csv", "--pair", "ALDER", "BIRCH", "--start", "2021-02-30"],
                       r"^error: --start: cannot read date '2021-02-30' \(expected YYYY-MM-DD\)$"),
    "unknown_family": (["returns.csv", "--pair", "ALDER", "BIRCH", "--families", "gaussian",
                        "gauss"], r"^error: --families: unknown family 'gauss'; known: "),
    "family_twice": (["returns.csv", "--pair", "ALDER", "BIRCH", "--families", "frank",
                      "frank"], r"^error: --families: 'frank' is listed twice$"),
    "same_column_twice": (["returns.csv", "--pair", "ALDER", "ALDER"],
                          r"^error: --pair: the two columns must differ$"),
    "missing_file": (["absent.csv", "--pair", "ALDER", "BIRCH"],
                     r"^error: absent\.csv: file not found$"),
    "kind_prices": (["returns.csv", "--pair", "ALDER", "BIRCH", "--kind", "prices"],
                    (r"^error: returns\.csv: price -?[0-9.e-]+ on 2021-01-\d\d in column "
                     r"'ALDER' is not a positive finite number$")),
    "bootstrap_too_small": (["returns.csv", "--pair", "ALDER", "BIRCH", "--bootstrap", "5"],
                            r"^error: --bootstrap must be 0 or at least 20, got 5$"),
}


@pytest.mark.parametrize("case", list(BAD_FIT))
def test_fit_bad_inputs_exit_2_naming_the_culprit(work, case):
    args, message = BAD_FIT[case]
    line = assert_one_error_line(run(["fit", *args, "--filter", "none", "--json"], work))
    assert re.search(message, line), line


def test_fit_filter_needs_enough_history(work):
    # The default real-time GARCH filter needs 251 returns up to --end (monitor.stats.marginals).
    line = assert_one_error_line(run(["fit", "returns.csv", "--pair", "ALDER", "BIRCH",
                                      "--end", "2021-06-30"], work))
    assert re.search(r"^error: returns\.csv: column 'ALDER' has \d+ returns up to the window "
                     r"end; the real-time filter needs 251 \(use --filter none", line), line


# ------------------------------------------------------------------------- fit: bootstrap
def test_bootstrap_adds_gof_and_intervals(work):
    out = fit_json(work, "returns.csv", "--pair", "ALDER", "BIRCH", "--end", "2021-07-30",
                   "--bootstrap", "50", "--seed", "7")
    for fit in out["fits"]:
        gof = fit["gof"]
        assert 0.0 <= gof["p_value"] <= 1.0, fit
        assert gof["replicates"] <= 50
    intervals = out["selected"]["intervals"]
    assert intervals["replicates"] <= 50
    assert 0 < intervals["level"] < 1
    selected = out["fits"][0]
    for name in (*selected["params"], "kendall_tau", "tail_lower", "tail_upper"):
        q = intervals[name]
        assert q["lower"] <= q["upper"], name
        assert q["std_error"] >= 0, name
        assert q["estimate"] == pytest.approx(
            selected["params"].get(name, selected.get(name)), abs=1e-12), name


# -------------------------------------------------------------- unexpected failure: exit 1
def test_unexpected_failure_exits_1_with_one_line(monkeypatch, capsys, tmp_path):
    def boom(args, cfg):
        raise RuntimeError("disk on fire\nsecond line")

    monkeypatch.chdir(tmp_path)
    monkeypatch.delenv("COMOVE_CONFIG", raising=False)
    monkeypatch.delenv("COMOVE_DEBUG", raising=False)
    monkeypatch.setitem(cli._COMMANDS, "update", boom)
    assert cli.main(["update"]) == 1
    err = capsys.readouterr().err
    assert err == ("error: unexpected failure: RuntimeError: disk on fire "
                   "(set COMOVE_DEBUG=1 for details)\n")

    monkeypatch.setenv("COMOVE_DEBUG", "1")
    assert cli.main(["update"]) == 1
    err = capsys.readouterr().err
    assert "Traceback" in err and err.rstrip().endswith("(set COMOVE_DEBUG=1 for details)")

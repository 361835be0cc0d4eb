"""`hierarchy fit-world`: a world fitted from a recording.

Checked against statsmodels (a reference library from the registries) on an
open dataset it ships offline, and against the sampling theory of least
squares on data simulated from a known world.
"""

import importlib.util
import sys
from pathlib import Path

import numpy as np
import pytest
import yaml

from hierarchy.cli import main
from hierarchy.spec.fitworld import Recording, fit_world, load_recording, parse_blocks, world_dict
from hierarchy.spec import load_spec, parse_spec

ROOT = Path(__file__).resolve().parents[1]
RECORDING = ROOT / "specs" / "recordings" / "river-gauge.csv"

sm = pytest.importorskip("statsmodels.api")
from statsmodels.stats.diagnostic import acorr_ljungbox  # noqa: E402
from statsmodels.tsa.api import VAR  # noqa: E402


def macro_growth():
    """Quarterly growth rates (percent, log differences) of US real GDP,
    real consumption and real investment, 1959Q1-2009Q3: statsmodels'
    `statsmodels.datasets.macrodata`, compiled from FRED (Federal Reserve
    Bank of St. Louis) and the Bureau of Labor Statistics, public domain;
    shipped inside the statsmodels package (no download)."""
    from statsmodels.datasets import macrodata

    d = macrodata.load_pandas().data
    return 100 * np.diff(np.log(d[["realgdp", "realcons", "realinv"]].to_numpy()), axis=0)


def write_csv(path, names, data):
    path.write_text(",".join(names) + "\n" + "\n".join(",".join(repr(float(v)) for v in r) for r in data) + "\n")
    return path


def spec_with(world_section: dict, sensed_block: str) -> str:
    """A minimal full spec around a fitted world section (one sensor, one area)."""
    return yaml.safe_dump({"spec": 1, "name": "fitted", "world": world_section,
                           "sensors": {"probe": {"observes": {sensed_block: "identity"}, "noise": 0.1}},
                           "areas": {"view": {"tracks": sensed_block}},
                           "links": [{"from": "probe", "to": "view", "kind": "residual"}]}, sort_keys=False)


@pytest.mark.parametrize("lags", [1, 2, 3])
def test_unrestricted_fit_matches_statsmodels_var_on_macrodata(lags, tmp_path):
    x = macro_growth()
    rec = load_recording(write_csv(tmp_path / "macro.csv", ["gdp", "cons", "inv"], x))
    fit = fit_world(rec, {"output": ["gdp"], "spend": ["cons", "inv"]}, lags=lags)
    ref = VAR(x).fit(lags)  # statsmodels: OLS VAR with a constant
    np.testing.assert_allclose(fit.coefs, ref.coefs, rtol=1e-9, atol=1e-10)
    np.testing.assert_allclose(fit.intercept, ref.intercept, rtol=1e-9, atol=1e-10)
    np.testing.assert_allclose(fit.noise, ref.sigma_u, rtol=1e-9)  # df-adjusted residual covariance
    np.testing.assert_allclose(fit.residuals, np.asarray(ref.resid), rtol=1e-9, atol=1e-10)
    # stability: statsmodels' companion-form roots
    assert fit.radius == pytest.approx(float(np.max(np.abs(1 / ref.roots))), rel=1e-9)
    white = ref.test_whiteness(nlags=fit.whiteness_lags)
    assert fit.whiteness[0] == pytest.approx(white.test_statistic, rel=1e-9)
    assert fit.whiteness[1] == white.df
    assert fit.whiteness[2] == pytest.approx(white.pvalue, rel=1e-7)
    for i, ch in enumerate(["gdp", "cons", "inv"]):
        lb = acorr_ljungbox(fit.residuals[:, i], lags=[fit.whiteness_lags], model_df=lags)
        assert fit.ljung_box[ch][0] == pytest.approx(float(lb["lb_stat"].iloc[0]), rel=1e-9)
        assert fit.ljung_box[ch][2] == pytest.approx(float(lb["lb_pvalue"].iloc[0]), rel=1e-7)
        # R^2 of each equation: statsmodels' OLS on the same regressors
        X = np.hstack([x[lags - j - 1:len(x) - j - 1] for j in range(lags)])
        ols = sm.OLS(x[lags:, i], sm.add_constant(X)).fit()
        assert fit.r2[ch] == pytest.approx(ols.rsquared, rel=1e-9)
    # The written world section is read by the spec reader as the state form.
    spec = parse_spec(spec_with(world_dict(fit), "output"))
    np.testing.assert_allclose(spec.world.A, fit.A, rtol=1e-12, atol=1e-15)
    Q = spec.world.Q
    n = 3
    np.testing.assert_allclose(Q[:1, :1], ref.sigma_u[:1, :1], rtol=1e-9)  # blocks keep their own noise
    np.testing.assert_allclose(Q[1:n, 1:n], ref.sigma_u[1:, 1:], rtol=1e-9)
    assert not Q[:1, 1:].any() and not Q[n:].any()  # cross-block and lag-copy noise are zero
    assert fit.dropped_correlation == pytest.approx(
        abs(ref.sigma_u[0, 1:] / np.sqrt(ref.sigma_u[0, 0] * np.diag(ref.sigma_u)[1:])).max(), rel=1e-9)


def test_zero_couplings_are_equation_by_equation_least_squares():
    x = macro_growth()
    rec = Recording(("gdp", "cons", "inv"), x)
    fit = fit_world(rec, {"output": ["gdp"], "spend": ["cons", "inv"]}, lags=2, zeros={("spend", "output")})
    # gdp's equation sees only its own lags; statsmodels' OLS on those regressors
    X = np.column_stack([x[1:-1, 0], x[:-2, 0]])
    ols = sm.OLS(x[2:, 0], sm.add_constant(X)).fit()
    np.testing.assert_allclose([fit.coefs[0][0, 0], fit.coefs[1][0, 0]], ols.params[1:], rtol=1e-9)
    assert not fit.coefs[:, 0, 1:].any()
    assert fit.noise[0, 0] == pytest.approx(ols.scale, rel=1e-9)  # SSR / residual dof
    assert fit.r2["gdp"] == pytest.approx(ols.rsquared, rel=1e-9)
    # the spend equations are unrestricted: the same as the full VAR's
    ref = VAR(x).fit(2)
    np.testing.assert_allclose(fit.coefs[:, 1:], ref.coefs[:, 1:], rtol=1e-9, atol=1e-12)
    section = world_dict(fit)["states"]
    assert "driven_by" not in section["output"] or set(section["output"]["driven_by"]) == {"output-lag1"}


def test_fit_recovers_a_known_world_within_sampling_error():
    spec_ = importlib.util.spec_from_file_location("make_river_gauge", RECORDING.with_name("make_river_gauge.py"))
    truth = importlib.util.module_from_spec(spec_)
    spec_.loader.exec_module(truth)
    rec = load_recording(RECORDING)
    assert rec.channels == truth.CHANNELS
    np.testing.assert_allclose(rec.data, truth.simulate(), atol=5e-7)  # the CSV is the script's output
    fit = fit_world(rec, {"upstream": ["flow"], "station": ["level_a", "level_b"]}, mean=False)
    T = fit.samples - 1
    # Least squares, Lütkepohl (2005), Prop. 3.1: vec(A_hat) ~ N(vec A, (Gamma^-1 kron Q) / T), with Gamma
    # the stationary covariance of x (Lyapunov equation); the sample covariance of Gaussian noise has
    # Var(Q_ij) = (Q_ij^2 + Q_ii Q_jj) / T (Wishart moments, Anderson 2003).
    from scipy.linalg import solve_discrete_lyapunov

    gamma = solve_discrete_lyapunov(truth.A, truth.Q)
    se_A = np.sqrt(np.outer(np.diag(truth.Q), np.diag(np.linalg.inv(gamma))) / T)
    z_A = (fit.A - truth.A) / se_A
    se_Q = np.sqrt((truth.Q ** 2 + np.outer(np.diag(truth.Q), np.diag(truth.Q))) / T)
    z_Q = (fit.noise - truth.Q) / se_Q
    assert np.abs(z_A).max() < 4.5, z_A
    assert np.abs(z_Q).max() < 4.5, z_Q
    # and the true zero coupling station -> upstream is what a restricted fit imposes
    restricted = fit_world(rec, {"upstream": ["flow"], "station": ["level_a", "level_b"]}, mean=False,
                           zeros={("station", "upstream")})
    assert not restricted.A[0, 1:].any()
    assert abs(restricted.A[0, 0] - truth.A[0, 0]) < 4.5 * se_A[0, 0]


def test_fitted_example_spec_holds_a_fresh_fit_of_its_recording():
    rec = load_recording(RECORDING)
    fit = fit_world(rec, parse_blocks(["upstream=flow", "station=level_a,level_b"], rec.channels),
                    zeros={("station", "upstream")})
    spec = load_spec(ROOT / "specs" / "fitted-river.yaml")
    np.testing.assert_allclose(spec.world.A, fit.A, rtol=1e-12)
    np.testing.assert_allclose(spec.world.Q, fit.Q, rtol=1e-12)


def test_npy_and_csv_give_the_same_fit(tmp_path):
    x = macro_growth()
    np.save(tmp_path / "m.npy", x)
    a = fit_world(load_recording(tmp_path / "m.npy"), {"g": ["0"], "s": ["1", "2"]})
    b = fit_world(load_recording(write_csv(tmp_path / "m.csv", ["gdp", "cons", "inv"], x)),
                  {"g": ["gdp"], "s": ["cons", "inv"]})
    np.testing.assert_allclose(a.A, b.A, rtol=1e-12)
    np.testing.assert_allclose(a.noise, b.noise, rtol=1e-12)


def test_cli_writes_a_world_section_and_refuses_to_overwrite(tmp_path, capsys):
    out = tmp_path / "world.yaml"
    args = ["fit-world", str(RECORDING), "--blocks", "upstream=flow", "station=level_a,level_b",
            "--zero", "station:upstream", "--lags", "2", "-o", str(out)]
    assert main(args) == 0
    text = capsys.readouterr().out
    assert "stability margin" in text and "portmanteau" in text and "R^2" in text
    section = yaml.safe_load(out.read_text())
    assert set(section) == {"world"}
    assert list(section["world"]["states"]) == ["upstream", "station", "upstream-lag1", "station-lag1"]
    spec = parse_spec(spec_with(section["world"], "station"))
    assert np.abs(np.linalg.eigvals(spec.world.A)).max() < 1
    before = out.read_text()
    assert main(args) == 2
    err = capsys.readouterr().err
    assert "exists" in err and "--force" in err
    assert out.read_text() == before
    assert main(args[:-2] + ["--lags", "1", "-o", str(out), "--force"]) == 0
    assert "upstream-lag1" not in out.read_text()


def _bad_csv(tmp_path, name, text):
    path = tmp_path / name
    path.write_text(text)
    return path


@pytest.mark.parametrize("make, words", [
    (lambda p: _bad_csv(p, "ragged.csv", "a,b\n1,2\n3\n4,5\n"), ["line 3", "1 field", "header names 2"]),
    (lambda p: _bad_csv(p, "nan.csv", "a,b\n" + "".join(f"{i},{i % 3}\n" for i in range(40)) + "nan,1\n"),
     ["line 42", "column `a`", "not a finite number", "fill the gap"]),
    (lambda p: _bad_csv(p, "blank.csv", "a,b\n1,2\n,3\n"), ["line 3", "column `a`", "empty"]),
    (lambda p: _bad_csv(p, "noheader.csv", "1,2\n3,4\n"), ["line 1", "header row"]),
    (lambda p: _bad_csv(p, "short.csv", "a,b\n" + "".join(f"{np.sin(i)},{np.cos(2 * i)}\n" for i in range(12))),
     ["12 samples are too few", "give at least"]),
    (lambda p: _bad_csv(p, "walk.csv", "a\n" + "".join(f"{v}\n" for v in
                                                        np.cumsum(np.random.default_rng(3).normal(size=400)) + 1e-3
                                                        * np.arange(400) ** 2)),
     ["spectral radius", "no stationary regime", "difference the recording"]),
    (lambda p: _bad_csv(p, "flat.csv", "a,b\n" + "".join(f"{np.sin(i)},2\n" for i in range(60))),
     ["channel `b`", "constant"]),
])
def test_bad_recordings_stop_with_one_message_and_status_2(tmp_path, capsys, make, words):
    path = make(tmp_path)
    assert main(["fit-world", str(path), "-o", str(tmp_path / "w.yaml")]) == 2
    err = capsys.readouterr().err
    assert err.count("error:") == 1 and "fix:" in err and "Traceback" not in err
    for w in words:
        assert w in err, (w, err)
    assert not (tmp_path / "w.yaml").exists()


@pytest.mark.parametrize("extra, words", [
    (["--blocks", "a=gdp"], ["no channel `gdp`"]),
    (["--blocks", "a.b=flow"], ["cannot name a world block"]),
    (["--blocks", "u=flow", "s=flow,level_a"], ["already in block `u`"]),
    (["--blocks", "u=flow", "s=level_a", "--zero", "u:x"], ["no block `x`"]),
    (["--lags", "0"], ["--lags"]),
    (["--whiteness-lags", "1"], ["more lags than the lag order"]),
])
def test_bad_options_name_the_option(tmp_path, capsys, extra, words):
    assert main(["fit-world", str(RECORDING), *extra, "-o", str(tmp_path / "w.yaml")]) == 2
    err = capsys.readouterr().err
    for w in words:
        assert w in err, (w, err)


def test_examples_in_the_docstrings_run(monkeypatch):
    import doctest

    import hierarchy.spec.fitworld as module

    monkeypatch.chdir(ROOT)  # the examples read specs/ from the repository root
    assert doctest.testmod(module).failed == 0


def test_template_keeps_every_other_line_and_checks_the_result(tmp_path, capsys):
    template = ROOT / "specs" / "two-level.yaml"
    out = tmp_path / "fitted.yaml"
    blocks = ["--blocks", "upstream=flow", "station=level_a,level_b", "--zero", "station:upstream"]
    assert main(["fit-world", str(RECORDING), *blocks, "--template", str(template), "-o", str(out)]) == 0
    text = out.read_text()
    for line in template.read_text().splitlines():  # comments, sensors, areas and links as written
        if not line.startswith(("world:", "    ", "  states:")):
            assert line in text, line
    spec, ref = load_spec(out), load_spec(ROOT / "specs" / "fitted-river.yaml")
    np.testing.assert_allclose(spec.world.A, ref.world.A, rtol=1e-12)
    assert [l.id for l in spec.links] == [l.id for l in load_spec(template).links]
    # block names the template does not use: refused, naming the template and the place
    assert main(["fit-world", str(RECORDING), "--blocks", "up=flow", "station=level_a,level_b",
                 "--template", str(template), "-o", str(tmp_path / "bad.yaml")]) == 2
    err = capsys.readouterr().err
    assert "--template" in err and "no longer a valid spec" in err and "`upstream`" in err
    assert not (tmp_path / "bad.yaml").exists()

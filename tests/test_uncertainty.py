"""The uncertainty section of a problem file, and the scenarios drawn from it.

Outside references: pint for every unit conversion; the defining property of a
Latin hypercube (McKay, Beckman and Conover, Technometrics 21 (1979) 239-245: one
point in each of n equal strata of every coordinate); the net property of Sobol'
points (Sobol', 1967; kept by Owen's scrambling: each coordinate of the first 2^m
points has one point in each of 2^m equal strata); the moments of the lognormal
distribution (Aitchison and Brown, The Lognormal Distribution, 1957: mean
exp(mu + s^2/2), variance (exp(s^2) - 1) exp(2 mu + s^2)); numpy's own
multivariate-normal draws for the covariance of jointly normal values.
"""

from __future__ import annotations

import textwrap
from pathlib import Path

import numpy as np
import pint
import pytest

import optfeed
from optfeed import InputError
from optfeed.model import build_model
from optfeed.problem.dotted import as_problem
from optfeed.provenance import problem_digest
from optfeed.uncertainty import scenario_set

HERE = Path(__file__).resolve().parent
SMALL = HERE / "uncertain" / "monod_small.yaml"
OK = HERE / "bad_input" / "ok_problem.yaml"
UREG = pint.UnitRegistry()


def _problem(tmp_path, section: str, csv: str | None = None, base: Path = OK, name="p.yaml"):
    text = base.read_text() + "uncertainty:\n" + textwrap.indent(textwrap.dedent(section), "  ")
    path = tmp_path / name
    path.write_text(text)
    if csv is not None:
        (tmp_path / "cov.csv").write_text(textwrap.dedent(csv))
    return path


def _internal(text: str, unit: str) -> float:
    """pint's value of ``text`` in ``unit`` (optfeed's internal unit of that kind)."""
    return UREG.Quantity(text).to(unit).magnitude


# ---------------------------------------------------------------- the section


def test_without_the_section_nothing_changes():
    p = optfeed.load_problem("configs/fast_microbe.yaml")
    assert p.uncertainty is None
    # the digest covers nothing about the section, so a problem keeps the digest it had
    # before the section existed (run folders written then still match their file)
    from optfeed.provenance import _plain

    assert "uncertainty" not in _plain(p)
    assert "uncertainty" in _plain(optfeed.load_problem(SMALL))


def test_values_in_their_units(tmp_path):
    base = tmp_path / "base.yaml"
    base.write_text(OK.read_text().replace("K_s: 0.1 g/L", "K_s: 100 mg/L"))
    path = _problem(tmp_path, """
        parameters:
          K_s: {distribution: normal, sd: 20}                  # bare: in mg/L, as K_s is written
          mu_max: {distribution: lognormal, relative_sd: 15 %}
          Y_XS: {distribution: uniform, min: 480 mg/g, max: 0.52}
        initial:
          V: {distribution: normal, sd: 50 mL}
          X: {distribution: normal, sd: 0.05}                   # bare: g/L, the species' unit
        feeds:
          glucose: {S: {distribution: normal, sd: 1 g/mL}}
        scenarios: {count: 5, seed: 3, method: sobol, objective: mean_std, k: 1.5}
        monte_carlo: {samples: 50, seed: 9}
        """, base=base)
    u = optfeed.load_problem(path).uncertainty
    by = {v.name: v for v in u.values}
    assert by["K_s"].sd == pytest.approx(_internal("20 mg/L", "g/L"), rel=1e-12)  # pint
    assert by["K_s"].nominal == pytest.approx(_internal("100 mg/L", "g/L"), rel=1e-12)
    assert by["mu_max"].sd == pytest.approx(0.15 * 0.4, rel=1e-12)
    assert (by["Y_XS"].lower, by["Y_XS"].upper) == (pytest.approx(0.48), pytest.approx(0.52))
    assert by["Y_XS"].sd == pytest.approx(0.04 / np.sqrt(12))  # a uniform's standard deviation
    assert by["initial.V"].sd == pytest.approx(_internal("50 mL", "L"))
    assert (by["initial.V"].target, by["initial.V"].ref) == ("initial", "V")
    assert by["initial.X"].sd == pytest.approx(0.05)
    assert by["feeds.glucose.S"].sd == pytest.approx(_internal("1 g/mL", "g/L"))
    assert (by["feeds.glucose.S"].target, by["feeds.glucose.S"].ref) == ("constant", "glucose.S")
    assert (u.scenarios, u.scenario_seed, u.method, u.combine, u.k) == (5, 3, "sobol", "mean_std", 1.5)
    assert (u.samples, u.sample_seed) == (50, 9)


def test_defaults(tmp_path):
    u = optfeed.load_problem(_problem(tmp_path, "parameters: {mu_max: {distribution: normal, sd: 0.01}}\n")).uncertainty
    assert (u.scenarios, u.method, u.combine, u.k, u.samples) == (8, "latin_hypercube", "mean", 1.0, 200)


@pytest.mark.parametrize("section, key, message", [
    ("parameters: {mu_max: {distribution: normal}}", "uncertainty.parameters.mu_max",
     "needs its standard deviation: give 'sd'"),
    ("parameters: {mu_max: {distribution: normal, sd: 0.1, relative_sd: 0.1}}", "uncertainty.parameters.mu_max",
     "not both"),
    ("parameters: {mu_max: {distribution: uniform, min: 0.1}}", "uncertainty.parameters.mu_max",
     "needs 'min' and 'max'"),
    ("parameters: {mu_max: {distribution: uniform, min: 0.5, max: 0.9}}", "uncertainty.parameters.mu_max",
     r"the value in the file \(0\.4 1/h\) lies outside min\.\.max"),
    ("parameters: {mu_max: {distribution: normal, relative_sd: 5 g/L}}", "uncertainty.parameters.mu_max.relative_sd",
     "a relative standard deviation is a fraction"),
    ("initial: {Q: {distribution: normal, sd: 0.1}}", "uncertainty.initial.Q", "'Q' is not a species"),
    ("feeds: {glucose: {X: {distribution: normal, sd: 1}}}", "uncertainty.feeds.glucose.X",
     "feed 'glucose' carries no 'X'"),
    ("feeds: {sugar: {S: {distribution: normal, sd: 1}}}", "uncertainty.feeds.sugar", "'sugar' is not a feed"),
    ("scenarios: {count: 4}", "uncertainty", "names no uncertain value"),
    ("parameters: {mu_max: {distribution: normal, sd: 0.1}}\nscenarios: {count: 0}", "uncertainty.scenarios.count",
     "must be between 1 and 256"),
    ("parameters: {mu_max: {distribution: normal, sd: 0.1}}\nscenarios: {objective: mean_std, k: -1}",
     "uncertainty.scenarios.k", "must be between 0 and 10"),
    ("parameters: {mu_max: {distribution: normal, sd: 0.1}}\nscenarios: {method: halton}",
     "uncertainty.scenarios.method", "Input should be 'latin_hypercube' or 'sobol'"),
    ("parameters: {mu_max: {distribution: normal, sd: 0.1}}\nmonte_carlo: {samples: 0}",
     "uncertainty.monte_carlo.samples", "must be between 1 and 100000"),
    ("parameters: {mu_max: {distribution: normal, sd: yes}}", "uncertainty.parameters.mu_max.sd", "a yes/no value"),
])
def test_bad_sections(tmp_path, section, key, message):
    path = _problem(tmp_path, section + "\n")
    with pytest.raises(InputError, match=message) as ei:
        optfeed.load_problem(path)
    issue = ei.value.issues[0]
    assert issue.key == key and issue.file == str(path) and issue.line is not None


# ---------------------------------------------------------------- the covariance file


COV = """\
    # covariance of mu_max (1/h) and K_s (in mg/L here); invented numbers
    name;K_s [mg/L];mu_max [1/h]
    mu_max [1/h];0,0003;0,0016
    K_s [mg/L];900;0,0003
    """


def test_covariance_file_units_and_order(tmp_path):
    path = _problem(tmp_path, "covariance: cov.csv\n", COV)
    u = optfeed.load_problem(path).uncertainty
    assert [v.name for v in u.values] == ["K_s", "mu_max"]  # the file's column order
    assert all(v.distribution == "multivariate normal" for v in u.values)
    c = np.array(u.covariance)
    mg = _internal("1 mg/L", "g/L")  # pint
    assert c[0, 0] == pytest.approx(900 * mg ** 2)
    assert c[1, 1] == pytest.approx(0.0016)
    assert c[0, 1] == c[1, 0] == pytest.approx(0.0003 * mg)
    assert u.values[0].sd == pytest.approx(30 * mg)
    assert u.covariance_file == str(tmp_path / "cov.csv")


def test_covariance_names_and_mixing(tmp_path):
    csv = "name,parameters.mu_max [1/h],initial.X [g/L]\nparameters.mu_max [1/h],1e-4,0\ninitial.X,0,0.0025\n"
    path = _problem(tmp_path, "covariance: cov.csv\nparameters: {K_s: {distribution: normal, sd: 0.01}}\n", csv)
    u = optfeed.load_problem(path).uncertainty
    assert [v.name for v in u.values] == ["K_s", "mu_max", "initial.X"]
    path = _problem(tmp_path, "covariance: cov.csv\nparameters: {mu_max: {distribution: normal, sd: 0.01}}\n", csv)
    with pytest.raises(InputError, match="'mu_max' is also in the covariance file cov.csv") as ei:
        optfeed.load_problem(path)
    assert ei.value.issues[0].key == "uncertainty.parameters.mu_max"


@pytest.mark.parametrize("csv, line, key, message", [
    ("name,mu_max [1/h]\nmu_max [1/h],-1e-4\n", 2, "mu_max [1/h]", "the variance of 'mu_max' must be above zero"),
    ("name,mu_max [1/h],K_s [g/L]\nmu_max [1/h],1e-4,3e-4\nK_s [g/L],3e-4,1e-4\n", 2, "K_s [g/L]",
     r"gives a correlation of 3, beyond \+-1"),
    ("name,mu_max [1/h],K_s [g/L]\nmu_max [1/h],1e-4,0\n", 1, "K_s", "no row for 'K_s'"),
    ("name,mu_max [1/h]\nmu_max [1/min],1e-4\n", 2, "mu_max [1/min]", "the row's unit differs"),
    ("name,mu_max [1/h]\nmu_max [1/h],fast\n", 2, "mu_max [1/h]", "expected a number, got 'fast'"),
    ("name,mu_max [1/h],mu_max [1/h]\n", 1, "mu_max [1/h]", "names a column twice"),
    ("name,mu_max\nmu_max,1e-4\n", 1, "mu_max", r"header cells name a column and its unit in brackets"),
    ("name,mu_max [1/h]\nmu_max [1/h],1e-4,2\n", 2, "", "row has 3 cells, the header has 2"),
])
def test_bad_covariance_files(tmp_path, csv, line, key, message):
    path = _problem(tmp_path, "covariance: cov.csv\n", csv)
    with pytest.raises(InputError, match=message) as ei:
        optfeed.load_problem(path)
    issue = ei.value.issues[0]
    assert (issue.file, issue.line, issue.key) == (str(tmp_path / "cov.csv"), line, key)


def test_covariance_path_through_a_link_is_refused(tmp_path):
    outside = tmp_path / "elsewhere"
    outside.mkdir()
    (outside / "cov.csv").write_text("name,mu_max [1/h]\nmu_max [1/h],1e-4\n")
    inner = tmp_path / "problems"
    inner.mkdir()
    (inner / "cov.csv").symlink_to(outside / "cov.csv")
    path = inner / "p.yaml"
    path.write_text(OK.read_text() + "uncertainty:\n  covariance: cov.csv\n")
    with pytest.raises(InputError, match="leads outside") as ei:
        optfeed.load_problem(path)
    assert ei.value.issues[0].key == "uncertainty.covariance"


# ---------------------------------------------------------------- dotted paths reach into the section


def test_set_reaches_into_the_section():
    p = optfeed.load_problem(SMALL, set={"uncertainty.scenarios.count": 3, "uncertainty.scenarios.objective": "mean_std",
                                         "uncertainty.scenarios.k": 2, "uncertainty.parameters.mu_max.relative_sd": "5 %"})
    u = p.uncertainty
    assert (u.scenarios, u.combine, u.k) == (3, "mean_std", 2.0)
    assert u.values[0].sd == pytest.approx(0.05 * 0.5)
    with pytest.raises(InputError, match="'mu_mx' not found") as ei:
        as_problem(SMALL, {"uncertainty.parameters.mu_mx.sd": 0.1})
    assert ei.value.issues[0].key == "uncertainty.parameters.mu_mx.sd"
    with pytest.raises(InputError, match="must be between 1 and 256"):
        as_problem(SMALL, {"uncertainty.scenarios.count": 1000})


def test_sweep_varies_the_section(tmp_path):
    for name in ("monod_small.yaml", "monod_small_plan.csv"):
        (tmp_path / name).write_text((HERE / "uncertain" / name).read_text())
    (tmp_path / "sweep.yaml").write_text(textwrap.dedent("""\
        problems: monod_small.yaml
        job: optimize
        grid:
          uncertainty.scenarios.count: [2, 4, 8]
        zip:
          uncertainty.scenarios.objective: [mean_std, worst]
          uncertainty.scenarios.k: [1.5, 1.5]
        """))
    with pytest.raises(InputError, match="k is used only with objective: mean_std"):
        optfeed.load_sweep(tmp_path / "sweep.yaml")
    (tmp_path / "sweep.yaml").write_text(textwrap.dedent("""\
        problems: monod_small.yaml
        job: optimize
        grid:
          uncertainty.scenarios.count: [2, 4, 8]
          uncertainty.scenarios.objective: [mean_std]
          uncertainty.scenarios.k: [0.5, 2]
        """))
    sweep = optfeed.load_sweep(tmp_path / "sweep.yaml")
    assert len(sweep.cases) == 6 and len({c.key for c in sweep.cases}) == 6
    got = set()
    for case in sweep.cases:
        u = optfeed.problem.problem_from_data(case.data, case.source).uncertainty
        got.add((u.scenarios, u.k))
    assert got == {(n, k) for n in (2, 4, 8) for k in (0.5, 2.0)}


def test_sweep_cases_differ_by_covariance_contents(tmp_path):
    """A case's key covers the covariance file's numbers, not only its name."""
    path = _problem(tmp_path, "covariance: cov.csv\n", "name,mu_max [1/h]\nmu_max [1/h],1e-4\n")
    a = problem_digest(optfeed.load_problem(path))
    (tmp_path / "cov.csv").write_text("name,mu_max [1/h]\nmu_max [1/h],2e-4\n")
    assert problem_digest(optfeed.load_problem(path)) != a


# ---------------------------------------------------------------- scenarios


def _scenario_problem(tmp_path, extra=""):
    return optfeed.load_problem(_problem(tmp_path, """
        parameters:
          mu_max: {distribution: normal, sd: 0.04}
          K_s: {distribution: lognormal, relative_sd: 30 %}
          Y_XS: {distribution: uniform, min: 0.45, max: 0.55}
        initial:
          V: {distribution: normal, sd: 0.1 L}
        feeds:
          glucose: {S: {distribution: normal, sd: 10 g/L}}
        """ + extra))


def test_scenarios_put_the_values_in_place(tmp_path):
    p = _scenario_problem(tmp_path)
    for fed in ("all", "used"):
        m = build_model(p, fed=fed)
        s = scenario_set(p, m)
        assert s.count == 8 and s.labels[0] == "nominal" and s.labels[1] == "scenario 1"
        assert s.constants.shape == (m.n_constants, 8) and s.x0.shape == (m.nx, 8)
        np.testing.assert_array_equal(s.constants[:, 0], m.p0)
        np.testing.assert_array_equal(s.x0[:, 0], m.x0)
        assert np.allclose(s.weights, 1 / 8)
        for name, (where, ref) in {"mu_max": ("p", "mu_max"), "K_s": ("p", "K_s"), "Y_XS": ("p", "Y_XS"),
                                   "feeds.glucose.S": ("p", "glucose.S"), "initial.V": ("x", "V")}.items():
            row = s.values[s.names.index(name)]
            got = s.constants[m.constant_index(ref)] if where == "p" else s.x0[m.index(ref)]
            np.testing.assert_array_equal(got, row)
            assert len(set(row[1:])) == 7  # drawn, not copied
        for other in ("X", "S"):  # untouched states
            assert np.all(s.x0[m.index(other)] == m.x0[m.index(other)])


def test_scenarios_are_reproducible_and_seeded(tmp_path):
    p = _scenario_problem(tmp_path)
    m = build_model(p)
    for method in ("latin_hypercube", "sobol", "random"):
        a = scenario_set(p, m, method=method, count=6)
        b = scenario_set(p, m, method=method, count=6)
        c = scenario_set(p, m, method=method, count=6, seed=2)
        np.testing.assert_array_equal(a.constants, b.constants)
        assert not np.array_equal(a.constants[:, 1:], c.constants[:, 1:])
    # the Monte Carlo stream never repeats the scenario points, even with the same seed
    lhs = scenario_set(p, m, method="latin_hypercube", count=9, nominal=False)
    rnd = scenario_set(p, m, method="random", count=9, nominal=False)
    assert not np.any(np.isclose(lhs.values, rnd.values, rtol=1e-12))
    assert rnd.labels[0] == "sample 1" and "nominal" not in rnd.labels


def test_no_section_gives_the_nominal_alone():
    p = optfeed.load_problem("configs/inhibited_product.yaml")
    m = build_model(p)
    s = scenario_set(p, m)
    assert s.count == 1 and s.labels == ("nominal",) and s.names == ()
    np.testing.assert_array_equal(s.constants[:, 0], m.p0)


def test_latin_hypercube_strata(tmp_path):
    """McKay et al. (1979): each coordinate has exactly one point in each of n equal strata."""
    p = _scenario_problem(tmp_path)
    s = scenario_set(p, build_model(p), count=51, method="latin_hypercube")
    u = p.uncertainty
    from scipy.stats import norm

    for i, v in enumerate(u.values):
        x = s.values[i, 1:]
        if v.distribution == "normal":
            q = norm.cdf(x, v.nominal, v.sd)
        elif v.distribution == "uniform":
            q = (x - v.lower) / (v.upper - v.lower)
        else:
            continue
        assert sorted(np.floor(q * 50).astype(int)) == list(range(50)), v.name


def test_sobol_net_property(tmp_path):
    """The first 2^m scrambled Sobol' points put one point in each of 2^m strata of every coordinate."""
    p = _scenario_problem(tmp_path)
    s = scenario_set(p, build_model(p), count=17, method="sobol")
    v = p.uncertainty.values[2]  # Y_XS, uniform
    q = (s.values[2, 1:] - v.lower) / (v.upper - v.lower)
    assert sorted(np.floor(q * 16).astype(int)) == list(range(16))


def test_distributions_have_the_stated_moments(tmp_path):
    """Sample moments of many Latin-hypercube draws against the stated mean and sd; the
    lognormal's through its published moment relations (Aitchison and Brown, 1957)."""
    p = _scenario_problem(tmp_path)
    s = scenario_set(p, build_model(p), count=20001, method="latin_hypercube")
    for i, v in enumerate(p.uncertainty.values):
        x = s.values[i, 1:]
        mean = 0.5 * (v.lower + v.upper) if v.distribution == "uniform" else v.nominal
        assert x.mean() == pytest.approx(mean, rel=2e-3), v.name
        assert x.std() == pytest.approx(v.sd, rel=1e-2), v.name
        if v.distribution == "lognormal":
            assert x.min() > 0
            logs = np.log(x)  # normal, with sigma^2 = ln(1 + cv^2)
            s2 = np.log(1 + (v.sd / v.nominal) ** 2)
            assert logs.std() == pytest.approx(np.sqrt(s2), rel=1e-2)
            assert np.exp(logs.mean() + s2 / 2) == pytest.approx(v.nominal, rel=2e-3)
        if v.distribution == "uniform":
            assert v.lower <= x.min() and x.max() <= v.upper


def test_covariance_draws_against_numpy(tmp_path):
    """Jointly normal values: the covariance of the draws matches the file's, as numpy's own
    multivariate-normal draws of the same size do."""
    csv = ("name,mu_max [1/h],K_s [g/L],Y_XS [g/g]\nmu_max [1/h],0.0016,0.0003,-0.0004\n"
           "K_s [g/L],0.0003,0.0004,0\nY_XS [g/g],-0.0004,0,0.0009\n")
    p = optfeed.load_problem(_problem(tmp_path, "covariance: cov.csv\n", csv))
    n = 40000
    s = scenario_set(p, build_model(p), count=n, method="random", nominal=False)
    c = np.array(p.uncertainty.covariance)
    ref = np.random.default_rng(5).multivariate_normal([0.4, 0.1, 0.5], c, size=n).T
    for draws in (s.values, ref):
        got = np.cov(draws)
        d = np.sqrt(np.diag(c))
        assert np.allclose(np.sqrt(np.diag(got)), d, rtol=0.02)
        assert np.allclose(got / np.outer(d, d), c / np.outer(d, d), atol=0.02)
    assert s.values.mean(axis=1) == pytest.approx([0.4, 0.1, 0.5], rel=2e-3)

"""Units people read: the dimension inference over expressions, its warnings, and the
units it gives to rates, bounds written as bare numbers and undiluted states.

References: pint for every conversion checked here (W, mg/L); the shipped and the
published problem files as a corpus that must raise no false warning.
"""

import pytest

import optfeed
from optfeed.units import UREG, factor_to

from conftest import CONFIGS, ROOT

PUBLISHED = ROOT / "tests" / "published"
FM = (CONFIGS / "fast_microbe.yaml").read_text()


@pytest.mark.parametrize("path", [CONFIGS / f"{n}.yaml" for n in ("fast_microbe", "inhibited_product", "animal_cell")]
                         + sorted(PUBLISHED.glob("*.yaml")), ids=lambda p: p.name)
def test_shipped_and_published_problems_raise_no_unit_warning(path):
    assert optfeed.load_problem(path).warnings == ()


def test_bare_number_added_to_a_heat_load_is_warned_with_its_real_size(write):
    path = write("heat.yaml", FM.replace(
        "  - {name: glucose ceiling, expression: S, max: 15 g/L}",
        "  - {name: glucose ceiling, expression: S, max: 15 g/L}\n"
        "  - {name: heat with extra, expression: heat_load + 3000, max: 5 kW}"))
    problem = optfeed.load_problem(path)
    [w] = problem.warnings
    assert (w.file, w.key) == (str(path), "limits[2].expression")
    assert w.line == FM.splitlines().index("  - {name: glucose ceiling, expression: S, max: 15 g/L}") + 2
    # 3000 in internal units (g dm^2 / h^3) expressed in W, by pint
    size = UREG.Quantity(3000, "g * dm**2 / h**3").to("W").magnitude
    assert f"= {size:.3g} W" in w.message
    assert "parameter" in w.message  # how to write it instead


def test_bare_number_added_where_the_internal_unit_is_the_written_one_is_fine(write):
    # S is in g/L, the internal unit: 'S + 0.01' means 0.01 g/L as written
    path = write("ok.yaml", FM.replace("mu: Y_XS * (q_S - q_ov - m_S)", "mu: Y_XS * (q_S - q_ov - m_S) * S / (S + 0.01)"))
    assert optfeed.load_problem(path).warnings == ()
    # Ab in mg/L is not: 5 means 5 g/L = 5000 mg/L (pint)
    ac = (CONFIGS / "animal_cell.yaml").read_text()
    path = write("ab.yaml", ac.replace("q_Ab: 25 pg/cell/day", "q_Ab: 25 pg/cell/day\n  k_h: 0.1 1/h")
                 .replace("Ab: q_Ab * Xv", "Ab: q_Ab * Xv - k_h * (Ab - 5)"))
    [w] = optfeed.load_problem(path).warnings
    assert "'Ab' (mg/L)" in w.message
    assert f"= {UREG.Quantity(5, 'g/L').to('mg/L').magnitude:.3g} mg/L" in w.message


def test_quantities_of_different_dimensions_added_and_a_balance_in_the_wrong_unit(write):
    path = write("mix.yaml", FM.replace("  P: q_P * X", "  P: q_P * X + S"))
    [w] = optfeed.load_problem(path).warnings
    assert "'q_P * X'" in w.message and "'S'" in w.message and "dimensions differ" in w.message
    path = write("bal.yaml", FM.replace("  P: q_P * X", "  P: q_P"))
    [w] = optfeed.load_problem(path).warnings
    assert w.key == "reactions.P" and "should have dimension" in w.message


def test_rates_get_units_from_their_expression_or_their_use():
    from optfeed.dimensions import Inference

    fm = Inference(optfeed.load_problem(CONFIGS / "fast_microbe.yaml"))
    assert fm.unit_of_rate("mu") == "1/h" and fm.unit_of_rate("q_O2") == "mmol/g/h"
    # the published ethanol model is written in bare numbers: g1 is 1/h because 'X: g1*X'
    eth = Inference(optfeed.load_problem(PUBLISHED / "ethanol.yaml"))
    assert eth.unit_of_rate("g1") == "1/h" and eth.unit_of_rate("g2") == "1/h"


def test_bare_bound_shows_in_the_unit_of_its_expression(write):
    # a bare bound is internal (g/L for a mass concentration); Ab is written in mg/L
    ac = (CONFIGS / "animal_cell.yaml").read_text()
    path = write("ab.yaml", ac.replace("  - {name: lactate ceiling, expression: L, max: 5 g/L}",
                                       "  - {name: lactate ceiling, expression: L, max: 5 g/L}\n"
                                       "  - {name: antibody cap, expression: Ab, max: 0.005}\n"
                                       "  - {name: growth cap, expression: mu, max: 0.1}"))
    result = optfeed.check(path, CONFIGS / "animal_cell_plan.csv")
    cap = next(r for r in result.limits if r.name == "antibody cap")
    assert cap.unit == "mg/L"
    assert cap.upper == pytest.approx(UREG.Quantity(0.005, "g/L").to("mg/L").magnitude, rel=1e-12)
    growth = next(r for r in result.limits if r.name == "growth cap")
    assert growth.unit == "1/h" and growth.upper == pytest.approx(0.1)


def test_undiluted_state_with_a_bare_value_is_dimensionless(write):
    # an induction state: a fraction, not diluted by the feed
    path = write("ind.yaml", FM.replace("  P: {initial: 0 g/L, description: recombinant product}",
                                        "  P: {initial: 0 g/L, description: recombinant product}\n"
                                        "  f: {initial: 0, dilute: false, description: induced fraction}")
                 .replace("  P: q_P * X", "  P: q_P * X\n  f: 0.2 * (1 - f)"))
    problem = optfeed.load_problem(path)
    assert problem.species_by_name("f").unit == "dimensionless"
    assert factor_to("dimensionless") == 1.0  # its value is unchanged
    schedule = optfeed.piecewise_constant(["glucose"], [0.0], [[0.1]])
    table = optfeed.check(problem, schedule).trajectory_table()
    assert "f [dimensionless]" in table

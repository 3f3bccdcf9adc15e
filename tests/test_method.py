"""Tableaux as data: invariants of the built-in set, exact entries, user tableau files."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
import sympy as sp
from click.testing import CliRunner

from codegen.cli import main
from codegen.errors import MethodError
from codegen.methods import (BUILTIN_TABLEAUX, EXPLICIT, Tableau, builtin, builtin_ids, exact,
                             load_tableau)

EXPLICIT_IDS = ["euler", "midpoint", "heun", "ralston2", "kutta3", "ssprk3", "rk4", "rk4-38",
                "bs3", "dp5"]


def test_the_explicit_ids_are_exactly_the_published_list():
    assert [i for i in builtin_ids() if builtin(i).kind == EXPLICIT] == EXPLICIT_IDS


TABLEAU_IDS = [i for i in builtin_ids() if isinstance(builtin(i), Tableau)]


def test_every_builtin_is_a_tableau_or_a_named_special_kind():
    others = {i: builtin(i).kind for i in builtin_ids() if i not in TABLEAU_IDS}
    assert others == {"rosenbrock-euler": "linearly implicit", "ros2": "linearly implicit",
                      "zoh-exact": "exact"}


@pytest.mark.parametrize("method_id", TABLEAU_IDS)
def test_row_sums_equal_c_and_weights_sum_to_one(method_id):
    t = builtin(method_id)
    for row, c in zip(t.a, t.c):
        assert sp.simplify(sum(row) - c) == 0
    assert sp.simplify(sum(t.b) - 1) == 0
    assert t.source, "every built-in method names its published source"


def test_dp5_matches_scipy_rk45_exactly():
    # Dormand & Prince 1980: scipy's RK45 carries the same A, B, C and cites that paper.
    from scipy.integrate._ivp.rk import RK45

    a, b, c = builtin("dp5").floats()
    np.testing.assert_array_equal(a[:6, :5], RK45.A)
    np.testing.assert_array_equal(b[:6], RK45.B)
    np.testing.assert_array_equal(c[:6], RK45.C)


def test_bs3_matches_scipy_rk23_exactly():
    # Bogacki & Shampine 1989 (from memory) equals scipy's RK23, which cites that paper.
    from scipy.integrate._ivp.rk import RK23

    a, b, c = builtin("bs3").floats()
    np.testing.assert_array_equal(a[:3, :RK23.A.shape[1]], RK23.A)
    np.testing.assert_array_equal(b[:3], RK23.B)
    np.testing.assert_array_equal(c[:3], RK23.C)


def test_rk4_one_step_is_the_taylor_polynomial_on_linear_problems():
    # One RK4 step on x' = Ax equals R4(hA) x, R4 the degree-4 Taylor polynomial (HNW I, section
    # IV.2, from memory).
    from codegen.reference.steppers import explicit_step

    A = np.array([[-2.0, 1.0], [0.5, -3.0]])
    x0 = np.array([1.0, -0.5])
    h = 0.1
    a, b, c = builtin("rk4").floats()
    x1 = explicit_step(lambda t, x, u: A @ x, a, b, c, 0.0, x0, None, h).x
    hA = h * A
    R4 = np.eye(2) + hA + hA @ hA / 2 + hA @ hA @ hA / 6 + hA @ hA @ hA @ hA / 24
    np.testing.assert_allclose(x1, R4 @ x0, rtol=1e-15, atol=1e-15)


def test_exact_entries_stay_exact():
    assert exact("1/3") == sp.Rational(1, 3)
    assert exact("sqrt(3)/6") == sp.sqrt(3) / 6
    assert exact(0.1) == sp.Rational(1, 10)
    with pytest.raises(MethodError, match="not an exact number"):
        exact("__import__('os')")
    with pytest.raises(MethodError, match="division by zero"):
        exact("1/0")


def write(tmp_path, text):
    path = tmp_path / "mine.toml"
    path.write_text(text)
    return path


def test_a_user_tableau_file_loads_with_exact_strings(tmp_path):
    path = write(tmp_path, 'name = "my ralston"\norder = 2\nc = [0, "2/3"]\nb = ["1/4", "3/4"]\n'
                           'a = [[0, 0], ["2/3", 0]]\n')
    t = load_tableau(path)
    assert t.kind == EXPLICIT and t.b == (sp.Rational(1, 4), sp.Rational(3, 4))


@pytest.mark.parametrize("text, fragment", [
    ('name = "x"\nc = [0, "1/2"]\nb = [0, 1]\na = [[0, 0], ["1/3", 0]]\n',
     "a[1]: row sums to 1/3 but c[1] = 1/2"),
    ('name = "x"\nc = [0, 1]\nb = ["1/2", "1/3"]\na = [[0, 0], [1, 0]]\n', "b: weights sum"),
    ('name = "x"\nc = [0, 1]\nb = ["1/2", "1/2"]\na = [[0, 0]]\n', "a: must be 2 rows"),
    ('name = "x"\nc = [0]\nb = ["1/2", "1/2"]\na = [[0, 0], [1, 0]]\n', "c: must have 2"),
    ('name = "x"\nc = [0]\nb = [1]\n', "a: missing"),
    ('name = "x"\nc = [0]\nb = [1]\na = [[0]]\nd = 1\n', "d: unknown key"),
    ('name = "x"\nc = [0]\nb = ["one"]\na = [[0]]\n', "b[0]"),
    ('name = "x"\nc = [0]\nb = [1]\na = [[0]]\norder = "one"\n', "order: must be a whole number"),
    ("name = ", "not valid TOML"),
])
def test_bad_user_tableaux_are_one_clear_line(tmp_path, text, fragment):
    path = write(tmp_path, text)
    with pytest.raises(MethodError) as info:
        load_tableau(path)
    assert str(path) in str(info.value) and fragment in str(info.value)
    assert "\n" not in str(info.value)


def test_unknown_method_suggests_a_near_name():
    with pytest.raises(MethodError, match="did you mean 'rk4'"):
        builtin("rk44")


def test_built_in_data_is_plain_data():
    # Adding a method is adding data: every entry is a dict of strings and numbers.
    for entry in BUILTIN_TABLEAUX.values():
        assert isinstance(entry, dict) and {"name", "a", "b", "c", "source"} <= set(entry)


# ---------------------------------------------------------------------------------------------
# The methods table: every kind
# ---------------------------------------------------------------------------------------------

def test_methods_json_is_complete_for_every_kind():
    result = CliRunner().invoke(main, ["methods", "--json"])
    assert result.exit_code == 0, result.output
    rows = {r["id"]: r for r in json.loads(result.stdout)}
    assert set(rows) == set(builtin_ids())
    keys = {"name", "stages", "order", "embedded_order", "kind", "a_stable", "l_stable",
            "real_axis_limit", "imag_axis_limit", "source"}
    assert all(keys <= set(r) for r in rows.values())
    # Real-axis limits (Lambert 1991, Numerical Methods for Ordinary Differential Systems,
    # section 5.12, and HNW I IV.2 [mem]) and embedded orders (Bogacki & Shampine 1989, Dormand &
    # Prince 1980 [mem]).
    assert math.isclose(rows["rk4"]["real_axis_limit"], -2.785293563, rel_tol=1e-9)
    assert math.isclose(rows["dp5"]["imag_axis_limit"], 0.997189, rel_tol=1e-5)
    assert (rows["bs3"]["order"], rows["bs3"]["embedded_order"]) == (3, 2)
    assert rows["euler"]["a_stable"] is False
    # A- and L-stability (HW IV.3-IV.6 [mem]; ROS2: Verwer et al. 1999); SDIRK3's data are
    # rounded, its order 3 needs the rounded-data tolerance.
    expected = {"backward-euler": (True, True, 1), "trapezoidal": (True, False, 2),
                "gauss2": (True, False, 4), "radau-iia3": (True, True, 5),
                "sdirk3": (True, True, 3), "ros2": (True, True, 2)}
    for method_id, (a, l, p) in expected.items():
        r = rows[method_id]
        assert (r["a_stable"], r["l_stable"], r["order"]) == (a, l, p), method_id
        assert r["real_axis_limit"] is None
    exact_rows = [r for r in rows.values() if r["kind"] == "exact"]
    assert exact_rows and all(r["order"] is None and r["a_stable"] for r in exact_rows)


def test_methods_analyses_a_user_tableau(tmp_path):
    path = tmp_path / "ralston3.toml"
    # Ralston's 3rd-order method (Ralston 1962, Math. Comp. 16 [mem]); any 3-stage order-3 explicit
    # method has the real-axis limit -2.512745327 (Lambert 1991, section 5.12 [mem]).
    path.write_text('name = "Ralston 3"\nc = [0, "1/2", "3/4"]\nb = ["2/9", "1/3", "4/9"]\n'
                    'a = [[0, 0, 0], ["1/2", 0, 0], [0, "3/4", 0]]\n', encoding="utf-8")
    result = CliRunner().invoke(main, ["methods", "--tableau", str(path), "--json"])
    assert result.exit_code == 0, result.output
    (row,) = json.loads(result.stdout)
    assert row["order"] == 3 and row["kind"] == "explicit"
    assert math.isclose(row["real_axis_limit"], -2.512745327, rel_tol=1e-9)

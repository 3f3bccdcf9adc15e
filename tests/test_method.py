"""Methods as data: invariants of the built-in set, exact entries, users' method files
(tableaux and Rosenbrock methods, exact or in decimals) and the methods table."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
import sympy as sp
from click.testing import CliRunner

from codegen.cli import main
from codegen.errors import MethodError
from codegen.methods import (BUILTIN_TABLEAUX, DECIMAL_DATA_TOL, EXPLICIT, LINEARLY_IMPLICIT,
                             Tableau, builtin, builtin_ids, exact, load_method_file, with_order)
from codegen.methods.analysis import analyse
from codegen.methods.data import CITATIONS, ROSENBROCK_METHODS
from codegen.resources import examples_dir

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
    # Dormand & Prince 1980, J. Comput. Appl. Math. 6, which scipy's RK45 cites and whose A, B, C it
    # carries.
    from scipy.integrate._ivp.rk import RK45

    a, b, c = builtin("dp5").floats()
    np.testing.assert_array_equal(a[:6, :5], RK45.A)
    np.testing.assert_array_equal(b[:6], RK45.B)
    np.testing.assert_array_equal(c[:6], RK45.C)


def test_bs3_matches_scipy_rk23_exactly():
    # Bogacki & Shampine 1989, Appl. Math. Lett. 2 (from memory), which scipy's RK23 cites.
    from scipy.integrate._ivp.rk import RK23

    a, b, c = builtin("bs3").floats()
    np.testing.assert_array_equal(a[:3, :RK23.A.shape[1]], RK23.A)
    np.testing.assert_array_equal(b[:3], RK23.B)
    np.testing.assert_array_equal(c[:3], RK23.C)


def test_rk4_one_step_is_the_taylor_polynomial_on_linear_problems():
    # One RK4 step on x' = Ax equals R4(hA) x, R4 the degree-4 Taylor polynomial (its stability
    # function; Hairer, Norsett & Wanner, Solving ODEs I, 2nd ed., section IV.2, from memory).
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
    t = load_method_file(path)
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
        load_method_file(path)
    assert str(path) in str(info.value) and fragment in str(info.value)
    assert "\n" not in str(info.value)


def test_unknown_method_suggests_a_near_name():
    with pytest.raises(MethodError, match="did you mean 'rk4'"):
        builtin("rk44")


def _plain(value) -> bool:
    if isinstance(value, list):
        return all(_plain(v) for v in value)
    return type(value) in (str, int, float)


def test_built_in_data_is_plain_data():
    # Adding a method is adding data: every entry is a dict of strings, numbers and lists of them.
    assert sorted(BUILTIN_TABLEAUX) == sorted(TABLEAU_IDS)
    for method_id, entry in BUILTIN_TABLEAUX.items():
        assert {"name", "a", "b", "c", "source"} <= set(entry), method_id
        assert all(_plain(v) for v in entry.values()), method_id


@pytest.mark.parametrize("method_id", builtin_ids())
def test_every_built_in_names_its_source_in_full(method_id):
    # `tickwright methods` prints this text: a full citation (authors, title, year), never an
    # abbreviation or a note meant for developers.
    source = builtin(method_id).source
    assert source.startswith((*CITATIONS.values(), "common practice, no source")), source
    assert "memory" not in source and "[mem]" not in source


# ---------------------------------------------------------------------------------------------
# Tableaux in decimals: one tolerance for the whole tableau, and the output says so
# ---------------------------------------------------------------------------------------------

# Classical RK4 (HNW I, section II.1, Table 1.2, from memory) with its weights as a program
# prints them: 1/6 and 1/3 rounded to double, no order key.
RK4_DECIMAL = ('name = "rk4 in decimals"\nc = [0, 0.5, 0.5, 1]\n'
               'b = [0.16666666666666666, 0.3333333333333333, 0.3333333333333333, '
               '0.16666666666666666]\n'
               'a = [[0, 0, 0, 0], [0.5, 0, 0, 0], [0, 0.5, 0, 0], [0, 0, 1, 0]]\n')


def test_a_plain_decimal_rk4_without_an_order_key_is_order_4_and_says_so(tmp_path):
    path = write(tmp_path, RK4_DECIMAL)
    t = load_method_file(path)
    assert t.tolerance == DECIMAL_DATA_TOL and t.order == 4
    assert analyse(t).order == 4 and analyse(t).tolerance == DECIMAL_DATA_TOL
    # Exactly, the rounded weights do not even sum to 1 (0.1666...6 is not 1/6).
    assert sum(t.b) != 1
    result = CliRunner().invoke(main, ["methods", "--tableau", str(path), "--json"])
    assert result.exit_code == 0, result.output
    (row,) = json.loads(result.stdout)
    assert row["order"] == 4 and row["order_note"] == "decimal data: conditions to 1e-12"
    result = CliRunner().invoke(main, ["methods", "--tableau", str(path)])
    assert result.exit_code == 0 and "mine: order 4 (decimal data: conditions to 1e-12)" in \
        result.output


def test_a_decimal_rk4_generates_c(tmp_path):
    path = write(tmp_path, RK4_DECIMAL)
    heater = str(examples_dir() / "heater.toml")
    out = tmp_path / "out"
    result = CliRunner().invoke(main, ["emit", heater, "--tableau", str(path), "--dt", "0.5",
                                       "--out", str(out)])
    assert result.exit_code == 0, result.output
    assert (out / "heater.c").is_file()


def test_one_decimal_entry_makes_the_whole_tableau_decimal_data(tmp_path):
    # RK4 with 1e-15 moved between b1 and b4: exactly, b.c = 1/2 - 1e-15, so the exact order is 1;
    # as decimal data (to 1e-12) it is RK4. Loading, the analysis and the table must agree.
    path = write(tmp_path, 'name = "rk4 nudged"\nc = [0, "1/2", "1/2", 1]\n'
                           'b = ["1/6+1e-15", "1/3", "1/3", "1/6-1e-15"]\n'
                           'a = [[0, 0, 0, 0], ["1/2", 0, 0, 0], [0, "1/2", 0, 0], [0, 0, 1, 0]]\n')
    t = load_method_file(path)
    assert t.tolerance == DECIMAL_DATA_TOL
    from codegen.methods.analysis import order_of
    import dataclasses

    assert order_of(dataclasses.replace(t, tolerance=0.0)) == 1
    assert t.order == order_of(t) == analyse(t).order == 4
    (row,) = json.loads(CliRunner().invoke(main, ["methods", "--tableau", str(path),
                                                  "--json"]).stdout)
    assert row["order"] == 4 and row["order_note"] == "decimal data: conditions to 1e-12"


def test_a_stated_order_the_decimal_data_do_not_give_is_refused_with_the_tolerance(tmp_path):
    path = write(tmp_path, RK4_DECIMAL + "order = 5\n")
    with pytest.raises(MethodError) as info:
        load_method_file(path)
    message = str(info.value)
    assert "order: states 5 but the order conditions give 4" in message
    assert "decimal data: conditions to 1e-12" in message and "\n" not in message


# ---------------------------------------------------------------------------------------------
# Rosenbrock methods from files
# ---------------------------------------------------------------------------------------------

# ROS2 in our form (Verwer, Spee, Blom & Hundsdorfer 1999, SIAM J. Sci. Comput. 20(4)):
# (I - g h J) k1 = f(y), (I - g h J) k2 = f(y + h k1) - 2 k1, y1 = y + 3/2 h k1 + 1/2 h k2.
ROS2_TOML = ('kind = "rosenbrock"\nname = "my ROS2"\norder = 2\ngamma = "1 + 1/sqrt(2)"\n'
             'alpha = [[0, 0], [1, 0]]\ncoupling = [[0, 0], [-2, 0]]\nb = ["3/2", "1/2"]\n')


@pytest.mark.parametrize("method_id", sorted(ROSENBROCK_METHODS))
def test_builtin_rosenbrock_data_time_weights_are_the_derived_ones(method_id):
    # time_i = gamma * row sums of (I - coupling)^-1 (the row sums of Hairer & Wanner's Gamma,
    # HW IV.7, from memory); for ROS2 (gamma, -gamma) makes the step the trapezoidal rule on
    # y' = g(t) (Verwer et al. 1999).
    data, method = ROSENBROCK_METHODS[method_id], builtin(method_id)
    derived = method.time
    assert len(derived) == len(data["time"])
    for given, got in zip(data["time"], derived):
        assert sp.simplify(exact(given) - got) == 0
    assert with_order(method).order == data["order"]


def test_a_rosenbrock_file_loads_like_the_builtin_ros2(tmp_path):
    path = write(tmp_path, ROS2_TOML)
    mine, ros2 = load_method_file(path), builtin("ros2")
    assert mine.kind == LINEARLY_IMPLICIT and mine.order == 2 and mine.tolerance == 0
    assert (mine.gamma, mine.alpha, mine.coupling, mine.b) == \
        (ros2.gamma, ros2.alpha, ros2.coupling, ros2.b)
    assert mine.time == ros2.time and mine.c == ros2.c
    assert sp.simplify(analyse(mine).stability.function - analyse(ros2).stability.function) == 0
    result = CliRunner().invoke(main, ["methods", "--tableau", str(path), "--json"])
    assert result.exit_code == 0, result.output
    (row,) = json.loads(result.stdout)
    # ROS2 is A- and L-stable (Verwer et al. 1999; HW IV.7, from memory).
    assert (row["kind"], row["order"], row["a_stable"], row["l_stable"]) == \
        ("linearly implicit", 2, True, True)


def test_a_rosenbrock_file_in_decimals_is_decided_to_the_decimal_tolerance(tmp_path):
    # ROS2 with gamma and b printed as decimals: order 2 to 1e-12, and the table says so.
    path = write(tmp_path, ROS2_TOML.replace('"1 + 1/sqrt(2)"', "1.7071067811865475")
                 .replace('["3/2", "1/2"]', "[1.5, 0.5]"))
    mine = load_method_file(path)
    assert mine.tolerance == DECIMAL_DATA_TOL and mine.order == 2 and analyse(mine).order == 2
    (row,) = json.loads(CliRunner().invoke(main, ["methods", "--tableau", str(path),
                                                  "--json"]).stdout)
    assert row["order_note"] == "decimal data: conditions to 1e-12"


@pytest.mark.parametrize("change, fragment", [
    (("order = 2", "order = 4"), "order: states 4, but the order conditions of Rosenbrock "
                                 "methods are checked up to order 3"),
    (("order = 2", "order = 3"), "order: states 3 but the order conditions give 2"),
    (("b = [\"3/2\", \"1/2\"]", "b = [1, 1]"), "b: the weights fail the order-1 condition"),
    (("gamma = \"1 + 1/sqrt(2)\"", "gamma = -1"), "gamma: must be positive"),
    (("coupling = [[0, 0], [-2, 0]]", "coupling = [[0, 1], [-2, 0]]"),
     "coupling: must be 2 x 2 and strictly lower triangular"),
    (("name = \"my ROS2\"", "name = \"my ROS2\"\ntime = [1, 1]"),
     "time: must equal gamma times the row sums of (I - coupling)^-1"),
    (("kind = \"rosenbrock\"", "kind = \"multistep\""), "kind: 'multistep' is not a method kind"),
    (("gamma = \"1 + 1/sqrt(2)\"\n", ""), "gamma: missing"),
    (("b = [\"3/2\", \"1/2\"]", "b = [\"3/2\", \"1/2\"]\na = [[0]]"),
     "a: unknown key for a Rosenbrock method"),
])
def test_bad_rosenbrock_files_are_one_clear_line(tmp_path, change, fragment):
    path = write(tmp_path, ROS2_TOML.replace(*change))
    with pytest.raises(MethodError) as info:
        load_method_file(path)
    assert str(path) in str(info.value) and fragment in str(info.value), str(info.value)
    assert "\n" not in str(info.value)


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
        assert method_id in rows, method_id
        r = rows[method_id]
        assert (r["a_stable"], r["l_stable"], r["order"]) == (a, l, p), method_id
        assert r["real_axis_limit"] is None
    exact_rows = [r for r in rows.values() if r["kind"] == "exact"]
    assert [r["id"] for r in exact_rows] == ["zoh-exact"]
    assert all(r["order"] is None and r["a_stable"] for r in exact_rows)
    # Only SDIRK3, rounded on purpose, is decided to a tolerance; exact data carry no note.
    assert {i: r["order_note"] for i, r in rows.items() if r["order_note"]} == \
        {"sdirk3": "rounded data: conditions to 1e-30"}


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

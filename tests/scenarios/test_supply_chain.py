"""The supply-chain generator: deterministic, sized as asked, solvable, and its cuts really cut.

Outside check throughout: reference solve by HiGHS through highspy (dual simplex, no warm start).
"""

from __future__ import annotations

import re

import highspy
import numpy as np
import pytest

from service.scenarios.supply_chain import (
    Shape,
    cutting_capacity_row,
    cutting_rows,
    generate,
    shape_for_rows,
    sized,
    with_rows,
)


def highs_reference(lp) -> tuple[str, float, np.ndarray]:
    """Reference solve: HiGHS via highspy, straight from the arrays."""
    h = highspy.Highs()
    h.setOptionValue("output_flag", False)
    model = highspy.HighsLp()
    A = lp.A.tocsc()
    model.num_col_, model.num_row_ = lp.n, lp.m
    model.col_cost_ = lp.c
    model.col_lower_, model.col_upper_ = lp.col_lower, lp.col_upper
    model.row_lower_, model.row_upper_ = lp.row_lower, lp.row_upper
    model.sense_ = highspy.ObjSense.kMinimize if lp.sense == 1 else highspy.ObjSense.kMaximize
    model.a_matrix_.format_ = highspy.MatrixFormat.kColwise
    model.a_matrix_.start_, model.a_matrix_.index_, model.a_matrix_.value_ = A.indptr, A.indices, A.data
    h.passModel(model)
    h.run()
    status = h.modelStatusToString(h.getModelStatus())
    x = np.array(h.getSolution().col_value)
    return status, h.getInfo().objective_function_value, x


def test_same_seed_same_model_and_other_seed_other_model():
    a, b, c = (
        generate(2, 3, 10, 2, 3, seed=5),
        generate(2, 3, 10, 2, 3, seed=5),
        generate(2, 3, 10, 2, 3, seed=6),
    )
    assert (a.A != b.A).nnz == 0
    assert np.array_equal(a.c, b.c) and np.array_equal(a.row_lower, b.row_lower)
    assert a.col_names == b.col_names and a.row_names == b.row_names
    assert not np.array_equal(a.c, c.c)


def test_counts_match_the_shape_and_names_are_readable():
    shape = Shape(plants=2, warehouses=3, customers=7, products=2, periods=3)
    lp = generate(2, 3, 7, 2, 3, seed=1)
    assert (lp.m, lp.n) == (shape.rows, shape.columns)
    assert len(set(lp.col_names)) == lp.n and len(set(lp.row_names)) == lp.m
    column = re.compile(
        r"^(make\[P\d+,\w+,t\d+\]|ship\[P\d+->W\d+,\w+,t\d+\]|ship\[W\d+->C\d+,\w+,t\d+\]"
        r"|stock\[W\d+,\w+,t\d+\]|short\[C\d+,\w+,t\d+\])$"
    )
    row = re.compile(r"^(cap\[P\d+,t\d+\]|(flow|bal|dem)\[[PWC]\d+,\w+,t\d+\]|(thru|space)\[W\d+,t\d+\])$")
    assert all(column.match(name) for name in lp.col_names)
    assert all(row.match(name) for name in lp.row_names)
    assert "make[P2,widget,t3]" in lp.col_names and "cap[P2,t3]" in lp.row_names
    # A make column appears in its plant's cap row and flow row, nowhere else.
    j = lp.col_names.index("make[P2,widget,t3]")
    rows = {lp.row_names[i] for i in lp.A[:, j].indices}
    assert rows == {"cap[P2,t3]", "flow[P2,widget,t3]"}


@pytest.mark.parametrize("target", [2000, 10000])
def test_sized_lands_near_the_target(target):
    shape = shape_for_rows(target)
    assert abs(shape.rows - target) <= 0.03 * target
    assert 4 * shape.rows <= shape.columns <= 6 * shape.rows  # about 50,000 columns at 10,000 rows
    if target == 2000:
        lp = sized(target, seed=3)
        assert (lp.m, lp.n) == (shape.rows, shape.columns)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_models_solve_to_optimal_and_the_plan_makes_business_sense(seed):
    lp = generate(3, 5, 40, 3, 5, seed=seed)
    status, objective, x = highs_reference(lp)
    assert status == "Optimal"
    assert objective > 0
    # Every demand row is met by deliveries plus shortfall, exactly.
    dem = [i for i, name in enumerate(lp.row_names) if name.startswith("dem[")]
    delivered = lp.A[dem] @ x
    assert np.allclose(delivered, lp.row_lower[dem], rtol=1e-7, atol=1e-6)
    # Units are conserved over the horizon: opening stock + made = delivered + closing stock.
    col = {name: j for j, name in enumerate(lp.col_names)}
    made = sum(x[j] for name, j in col.items() if name.startswith("make["))
    shipped = sum(x[j] for name, j in col.items() if re.match(r"ship\[W", name))
    last = "t5]"  # the model below has 5 periods
    closing = sum(x[j] for name, j in col.items() if name.startswith("stock[") and name.endswith(last))
    opening = -sum(
        lp.row_lower[i]
        for i, name in enumerate(lp.row_names)
        if name.startswith("bal[") and name.endswith("t1]")
    )
    assert made + opening == pytest.approx(shipped + closing, rel=1e-7, abs=1e-6)


def test_sized_2000_solves_to_optimal():
    status, objective, _ = highs_reference(sized(2000, seed=0))
    assert status == "Optimal" and objective > 0


@pytest.mark.parametrize("kind", ["outage", "lane"])
@pytest.mark.parametrize("seed", [0, 4])
def test_cut_removes_the_plan_and_the_changed_model_still_solves(kind, seed):
    lp = generate(3, 6, 50, 3, 4, seed=seed)
    status, objective, x = highs_reference(lp)
    assert status == "Optimal"
    cut = cutting_capacity_row(lp, x, seed=seed, kind=kind)
    assert cut.name.startswith({"outage": "outage[", "lane": "lanecap["}[kind])
    assert cut.violation(x) > 1e-3 * max(1.0, abs(cut.upper))
    changed = with_rows(lp, [cut])
    assert (changed.m, changed.n) == (lp.m + 1, lp.n) and lp.m == changed.m - 1  # original left alone
    new_row = changed.A.tocsr()[lp.m] @ x
    assert new_row > changed.row_upper[-1] + 1e-6  # the old plan breaks the new row
    status2, objective2, x2 = highs_reference(changed)
    assert status2 == "Optimal"
    assert objective2 >= objective - 1e-9 * abs(objective)  # a restriction cannot make the plan cheaper
    assert cut.violation(x2) <= 1e-6 * max(1.0, abs(cut.upper))


def test_cutting_rows_gives_distinct_violated_rows():
    lp = generate(3, 6, 50, 3, 4, seed=2)
    _, _, x = highs_reference(lp)
    cuts = cutting_rows(lp, x, 3, seed=1)
    assert len({cut.name for cut in cuts}) == 3
    assert all(cut.violation(x) > 0 for cut in cuts)
    status, _, x3 = highs_reference(with_rows(lp, cuts))
    assert status == "Optimal"
    assert max(cut.violation(x3) for cut in cuts) <= 1e-6 * max(abs(cut.upper) for cut in cuts)

"""The demo's printing: the model is shown as a planner reads it, the pivot log lines up."""

from __future__ import annotations

from service import demo


def test_model_is_printed_as_rows_a_planner_can_read(capsys):
    demo.print_model(demo.build_model())
    out = capsys.readouterr().out
    # every variable with its cost and bounds, every constraint as an inequality
    assert "bake[riverside]" in out and "4.10" in out and "0 to 900" in out
    assert "0 or more" in out
    assert "deliver[north_dc->grocer_ames] + deliver[south_dc->grocer_ames] >= 420" in out
    assert "truck[riverside->north_dc] + truck[hilltop->north_dc] <= 1,000" in out
    assert "bake[riverside] - truck[riverside->north_dc] - truck[riverside->south_dc] = 0" in out
    for name in demo.build_model()["constraints"]:
        assert name in out
    # long rows are wrapped between terms, each sign kept with its term
    assert max(len(line) for line in out.splitlines()) <= 112
    assert not any(line.rstrip().endswith(("+", "-")) for line in out.splitlines())
    assert "- deliver[north_dc->school_board] = 0" in out


def test_row_expression_forms():
    assert demo._bounds(None, None) == "free" and demo._bounds(-2.5, 3) == "-2.5 to 3"
    assert demo.row_text({"a": 1, "b": -1, "c": 2.5}, None, 4) == "a - b + 2.5 c <= 4"
    assert demo.row_text({"a": -2}, 1, 3) == "1 <= -2 a <= 3"
    assert demo.row_text({"a": 1}, 7, 7) == "a = 7"
    assert demo.row_text({}, None, None) == "0 (free row)"


def test_pivot_log_columns_line_up_for_long_names(capsys):
    long_name = "deliver[south_dc->school_board_annex]"
    result = {
        "pivot_log": [
            {"iteration": 1, "algorithm": "dual", "leaving": "x", "entering": long_name, "pivot": -1.0,
             "step": 450.0, "objective": 7241.0},
            {"iteration": 2, "algorithm": "dual", "leaving": long_name, "entering": "y", "pivot": 2.0,
             "step": -10.0, "objective": 7320.0},
        ]
    }  # fmt: skip
    demo.print_pivot_log(result)
    lines = capsys.readouterr().out.splitlines()
    rows = [ln for ln in lines if ln.strip()[:1].isdigit()]
    header = next(ln for ln in lines if "entering" in ln)
    assert len(rows) == 2
    # the right edge of the objective column is the same on the header and on every row
    assert len({len(header)} | {len(r) for r in rows}) == 1, lines
    assert any("step: how far the entering one moved" in ln for ln in lines)

"""`lotline arl` and `lotline flag`: exit codes and exact output (click CliRunner)."""

from __future__ import annotations

import json

import pytest
from click.testing import CliRunner

from lotline import cli


def _run(args):
    return CliRunner().invoke(cli, args)


def test_arl_shewhart_rule1_prints_table_with_370_4():
    r = _run(["arl", "shewhart", "--rules", "we1", "--shift", "0", "--shift", "3"])
    assert r.exit_code == 0
    # 1/P(|Z|>3) = 370.40 and, at a 3 sigma shift, 1/(0.5 + P(Z < -6)) = 2.00 (standard formula).
    assert r.output == " shift         ARL\n  0.00      370.40\n  3.00        2.00\n"


def test_arl_shewhart_json_western_electric_set():
    r = _run(["arl", "shewhart", "--rules", "we1,we2,we3,we4", "--shift", "0", "--json"])
    assert r.exit_code == 0
    rows = json.loads(r.output)
    assert list(rows[0]) == ["shift", "arl"] and rows[0]["shift"] == 0.0
    assert rows[0]["arl"] == pytest.approx(91.75, abs=0.01)  # Champ & Woodall (1987), from memory


def test_arl_ewma_target_solves_width_near_lucas_saccucci():
    r = _run(["arl", "ewma", "--lambda", "0.1", "--target-arl", "500", "--shift", "0,0.5", "--json"])
    assert r.exit_code == 0
    rows = json.loads(r.output)
    assert rows[0]["L"] == pytest.approx(2.814, abs=0.005)  # Lucas & Saccucci (1990), from memory
    assert rows[0]["arl"] == pytest.approx(500, rel=1e-6)
    assert rows[1]["arl"] == pytest.approx(31.3, rel=0.02)


def test_arl_cusum_text_output():
    r = _run(["arl", "cusum", "--k", "0.5", "--h", "5", "--shift", "0,1"])
    assert r.exit_code == 0
    assert r.output == " shift         ARL\n  0.00      465.43\n  1.00       10.38\n"  # tables: 465, 10.4


def test_arl_usage_errors_exit_2():
    assert _run(["arl", "ewma", "--lambda", "0.1"]).exit_code == 2
    r = _run(["arl", "shewhart", "--rules", "we9"])
    assert r.exit_code == 2 and "unknown rule 'we9'" in r.output
    assert _run(["arl", "cusum", "--k", "0.5", "--h", "5", "--shift", "a"]).exit_code == 2


@pytest.fixture
def points_csv(tmp_path):
    p = tmp_path / "cd.csv"
    p.write_text("tool,t,cd\nA,1,0\nA,2,3.5\nB,5,2.5\nB,7,2.6\nA,3,0.1\n", encoding="utf-8")
    return p


def test_flag_prints_one_row_per_signal(points_csv):
    r = _run(
        [
            "flag",
            str(points_csv),
            "--value",
            "cd",
            "--series",
            "tool",
            "--order",
            "t",
            "--center",
            "0",
            "--sigma",
            "1",
            "--rules",
            "we1,we2",
        ]
    )
    assert r.exit_code == 0
    assert r.output == (
        "series         index order                rule      statistic\n"
        "A                  2 2                    we1       3.5\n"
        "B                  2 7                    we2       2.6\n"
    )


def test_flag_csv_and_json_with_ewma_and_cusum(points_csv):
    args = ["flag", str(points_csv), "--value", "cd", "--center", "0", "--sigma", "1", "--cusum", "0.5,4"]
    r = _run([*args, "--csv"])
    assert r.exit_code == 0
    assert r.output == "series,index,order,rule,statistic\nall,3,3,cusum_hi,5.0\n"  # 0, 3.0, 5.0 > 4 by hand
    r = _run([*args, "--json", "--ewma", "0.5,2", "--ewma-limits", "asymptotic"])
    rows = json.loads(r.output)
    # EWMA lambda 0.5 from 0: 0, 1.75, 2.125, 2.3625, 1.23; asymptotic limit 2*sqrt(1/3) = 1.1547.
    assert [(x["index"], x["rule"]) for x in rows] == [
        (2, "ewma"),
        (3, "ewma"),
        (3, "cusum_hi"),
        (4, "ewma"),
        (5, "ewma"),
    ]
    assert rows[1]["statistic"] == pytest.approx(2.125)


def test_flag_bad_number_names_file_line_and_column(tmp_path):
    p = tmp_path / "bad.csv"
    p.write_text("lot,cd\nL1,45.1\nL2,4 5\n", encoding="utf-8")
    r = _run(["flag", str(p), "--value", "cd", "--center", "45", "--sigma", "1"])
    assert r.exit_code == 1
    assert r.output == (
        f'Error: {p}:3:2: column "cd" is not a number (found "4 5", expected a finite number).\n'
        "  Fix: correct the value, or remove the line (1 bad in all).\n"
    )


def test_flag_missing_column_lists_found_columns(tmp_path):
    p = tmp_path / "cols.csv"
    p.write_text("lot,cd\nL1,45.1\n", encoding="utf-8")
    r = _run(["flag", str(p), "--value", "cd_nm", "--center", "45", "--sigma", "1"])
    assert r.exit_code == 1
    assert (
        r.output
        == f'Error: {p}:1: header lacks column "cd_nm".\n  Found: lot, cd\n  Fix: name an existing column.\n'
    )


def test_flag_duplicate_order_is_a_bad_file(tmp_path):
    p = tmp_path / "dup.csv"
    p.write_text("t,cd\n1,45\n1,46\n", encoding="utf-8")
    r = _run(["flag", str(p), "--value", "cd", "--order", "t", "--center", "45", "--sigma", "1"])
    assert r.exit_code == 1 and f'{p}:2:1: column "t" repeats an order value' in r.output


def test_flag_usage_errors_exit_2(points_csv):
    base = ["flag", str(points_csv), "--value", "cd", "--center", "0"]
    assert _run(base).exit_code == 2  # --sigma missing
    assert _run([*base, "--sigma", "1", "--ewma", "0.2"]).exit_code == 2
    assert _run([*base, "--sigma", "0"]).exit_code == 2


@pytest.mark.parametrize("cmd", [["arl"], ["arl", "shewhart"], ["arl", "ewma"], ["arl", "cusum"], ["flag"]])
def test_spc_command_help_ends_with_an_example(cmd):
    r = _run([*cmd, "--help"])
    assert r.exit_code == 0 and "Example: lotline " in r.output

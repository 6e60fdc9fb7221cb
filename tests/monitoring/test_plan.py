"""Monitoring plan: valid plans expand with defaults; malformed plans fail at the exact file:line:col.

Every location below was counted by hand from the case text (1-based line and column of the offending key
or value), not taken from the parser's output.
"""

from __future__ import annotations

import numpy as np
import polars as pl
import pytest

from warehouse.errors import ConfigError
from warehouse.plan import check_plan, describe_plan, parse_plan, read_plan

H = '[[chart]]\nname = "m1"\nselect = { layer = "M1_DEV", parameter = "cd_mid" }\n'
RULES = "we1, we2, we3, we4, nelson1, nelson2, nelson3, nelson4, nelson5, nelson6, nelson7, nelson8"
STATS = "site_value, wafer_mean, wafer_sd, wafer_range, lot_mean, defect_density, adder_density"

CASES = [
    (
        "toml_syntax",
        'name = "x\n',
        "plan.toml:1:10: TOML syntax error: Illegal character '\\n'.\n  Fix: correct the TOML syntax (https://toml.io).",
    ),
    (
        "unknown_table",
        '[plna]\nname = "x"\n' + H + 'statistic = "wafer_mean"\nchart = "ewma"\n',
        'plan.toml:1:1: the plan has no key "plna".\n  Fix: did you mean "plan"? Known keys: plan, defaults, chart.',
    ),
    (
        "unknown_entry_key",
        H + 'statistic = "wafer_mean"\nchart = "ewma"\nsplt = ["chamber"]\n',
        'plan.toml:6:1: chart "m1" has no key "splt".\n  Fix: did you mean "split"? Known keys: name, description, '
        "select, statistic, split, step, chart, params, rules, baseline, severity, spec_check, excursion_gap.",
    ),
    (
        "missing_chart_type",
        H + 'statistic = "wafer_mean"\n',
        'plan.toml:1:1: chart "m1" lacks required key "chart".\n  Fix: add the key "chart" to this [[chart]] table.',
    ),
    (
        "bad_statistic",
        H + 'statistic = "wafer_men"\nchart = "ewma"\n',
        f'plan.toml:4:13: statistic "wafer_men" is not known (expected one of {STATS}).\n'
        '  Fix: did you mean "wafer_mean"? Use one of the listed values.',
    ),
    (
        "bad_rule_inline_array",
        H + 'statistic = "wafer_mean"\nchart = "ewma"\nrules = ["we1", "we5"]\n',
        f'plan.toml:6:17: rule "we5" is not known (expected one of {RULES}).\n'
        '  Fix: did you mean "we4"? Use one of the listed values.',
    ),
    (
        "bad_rule_multiline_array",
        H + 'statistic = "wafer_mean"\nchart = "ewma"\nrules = [\n  "we1",\n  "nelson9",\n]\n',
        f'plan.toml:8:3: rule "nelson9" is not known (expected one of {RULES}).\n'
        '  Fix: did you mean "nelson8"? Use one of the listed values.',
    ),
    (
        "bad_split_key",
        H
        + 'statistic = "wafer_mean"\nchart = "ewma"\nsplit = ["process_tool", "chambre"]\nstep = "M1_LITHO"\n',
        'plan.toml:6:26: split key "chambre" is not known (expected one of process_tool, chamber, metrology_tool, '
        'product).\n  Fix: did you mean "chamber"? Use one of the listed values.',
    ),
    (
        "split_without_step",
        H + 'statistic = "wafer_mean"\nchart = "ewma"\nsplit = ["chamber"]\n',
        "plan.toml:6:9: splitting by process_tool or chamber needs the route step that made the layer.\n"
        '  Fix: add step = "<route step>".',
    ),
    (
        "lambda_out_of_range",
        H + 'statistic = "wafer_mean"\nchart = "ewma"\nparams = { lambda = 1.5 }\n',
        "plan.toml:6:21: parameter lambda is out of range (found 1.5, expected a number in (0, 1]).",
    ),
    (
        "unknown_param_subtable",
        H + 'statistic = "wafer_mean"\nchart = "cusum"\n[chart.params]\nhh = 4.0\n',
        'plan.toml:7:1: chart type "cusum" has no key "hh".\n  Fix: did you mean "h"? Known keys: k, cusum_k, h, headstart.',
    ),
    (
        "u_chart_on_measurements",
        H + 'statistic = "wafer_mean"\nchart = "laney_u"\n',
        'plan.toml:5:9: chart "laney_u" needs a defect statistic (found "wafer_mean", expected defect_density or '
        "adder_density).",
    ),
    (
        "run_rules_on_negbin_u",
        '[[chart]]\nname = "d0"\nselect = { layer = "M1_INSP" }\nstatistic = "defect_density"\n'
        'chart = "negbin_u"\nrules = ["we1", "we2"]\n',
        'plan.toml:6:9: chart "negbin_u" runs rule 1 alone (its probability limits are not symmetric, so run '
        'rules do not apply) (found "we1, we2", expected rules = ["we1"]).\n  Fix: set rules = ["we1"] on '
        'this chart, or chart it as "laney_u" to use run rules.',
    ),
    (
        "baseline_too_small",
        H + 'statistic = "wafer_mean"\nchart = "ewma"\nbaseline = { first = 3 }\n',
        "plan.toml:6:22: baseline first must be a whole number of subgroups (found 3, expected an integer >= 5).",
    ),
    (
        "baseline_window_reversed",
        H + 'statistic = "wafer_mean"\nchart = "ewma"\nbaseline = { from = 2026-09-10, to = 2026-09-01 }\n',
        'plan.toml:6:38: baseline window ends before it starts (found "2026-09-01", expected a date after 2026-09-10).',
    ),
    (
        "duplicate_name",
        H
        + 'statistic = "wafer_mean"\nchart = "ewma"\n\n'
        + H
        + 'statistic = "lot_mean"\nchart = "individuals"\n',
        'plan.toml:8:8: chart name "m1" is used twice.\n  Fix: rename one (the first is on line 2).',
    ),
    (
        "unknown_severity",
        H + 'statistic = "wafer_mean"\nchart = "ewma"\nseverity = "urgent"\n',
        'plan.toml:6:12: severity "urgent" is not known (expected one of low, medium, high, critical).\n'
        "  Fix: Use one of the listed values.",
    ),
    (
        "unknown_stage",
        '[[chart]]\nname = "m1"\nselect = { layer = "M1_DEV", parameter = "cd_mid", stage = "dev" }\n'
        'statistic = "wafer_mean"\nchart = "ewma"\n',
        'plan.toml:3:60: select stage "dev" is not known (expected one of develop, etch, *).\n'
        '  Fix: did you mean "develop"? Use one of the listed values.',
    ),
    (
        "excursion_gap_not_a_count",
        H + 'statistic = "wafer_mean"\nchart = "ewma"\nexcursion_gap = 2.5\n',
        "plan.toml:6:17: excursion_gap must be a whole number of points (found 2.5, expected an integer from 0 "
        "to 1000).\n  Fix: give the unsignalled points allowed inside one excursion, e.g. excursion_gap = 10.",
    ),
    (
        "name_not_a_string",
        '[[chart]]\nname = 7\nselect = { layer = "M1_DEV", parameter = "cd_mid" }\nstatistic = "wafer_mean"\nchart = "ewma"\n',
        "plan.toml:2:8: chart name must be a string (found 7, expected a quoted string).",
    ),
]


@pytest.mark.parametrize(("case", "text", "message"), CASES, ids=[c[0] for c in CASES])
def test_check_plan_malformed_reports_exact_location(case, text, message):
    errors = check_plan(text, path="plan.toml")
    assert str(errors[0]) == message


def test_parse_plan_several_problems_lists_them_all_in_file_order():
    text = H + 'statistic = "wafer_men"\nchart = "ewma"\nrules = ["we9"]\nseverity = "urgent"\n'
    with pytest.raises(ConfigError) as err:
        parse_plan(text, path="p.toml")
    msg = str(err.value)
    assert msg.startswith('p.toml:4:13: statistic "wafer_men" is not known')
    assert "2 more problem(s):" in msg
    assert '\n  p.toml:6:10: rule "we9" is not known' in msg
    assert '\n  p.toml:7:12: severity "urgent" is not known' in msg


def test_parse_plan_applies_common_practice_defaults():
    p = parse_plan(H + 'statistic = "wafer_mean"\nchart = "individuals"\n', path="p.toml")
    e = p.entries[0]
    # common practice: rule 1 only unless opted in; Phase I baseline of 25 subgroups; 3-sigma limits
    assert e.rules == ("we1",)
    assert e.baseline == {"first": 25}
    assert e.params == {"k": 3.0}
    assert (e.product, e.stage, e.sample_kind, e.severity) == ("*", "*", "production", "medium")


def test_parse_plan_defaults_table_applies_to_entries_that_omit_the_key():
    text = (
        '[defaults]\nseverity = "high"\nrules = ["we1", "we4"]\n\n'
        + H
        + 'statistic = "wafer_mean"\nchart = "ewma"\n'
    )
    e = parse_plan(text, path="p.toml").entries[0]
    assert e.severity == "high" and e.rules == ("we1", "we4")


def test_parse_plan_excursion_gap_defaults_to_two_points_and_is_set_per_entry_or_in_defaults():
    plain = parse_plan(H + 'statistic = "wafer_mean"\nchart = "ewma"\n', path="p.toml").entries[0]
    assert plain.excursion_gap == 2  # the grouping of earlier versions
    own = H + 'statistic = "wafer_mean"\nchart = "ewma"\nexcursion_gap = 12\n'
    assert parse_plan(own, path="p.toml").entries[0].excursion_gap == 12
    text = "[defaults]\nexcursion_gap = 0\n\n" + H + 'statistic = "wafer_mean"\nchart = "ewma"\n'
    assert parse_plan(text, path="p.toml").entries[0].excursion_gap == 0


def test_describe_plan_shows_published_in_control_arl():
    text = (
        H + 'statistic = "wafer_mean"\nchart = "individuals"\nrules = ["we1", "we2", "we3", "we4"]\n\n'
        '[[chart]]\nname = "m2"\nselect = { layer = "M1_DEV", parameter = "lwr" }\nstatistic = "wafer_mean"\n'
        'chart = "individuals"\n'
    )
    rows = describe_plan(parse_plan(text, path="p.toml"))
    # Champ & Woodall (1987), Technometrics 29(4): all four WE rules 91.75; rule 1 alone 1/0.0027 = 370.4
    assert rows[0]["in_control_arl"]["rules"] == pytest.approx(91.75, abs=0.05)
    assert rows[1]["in_control_arl"]["rules"] == pytest.approx(370.4, abs=0.05)


def test_describe_plan_ewma_arl_matches_published_table():
    text = H + 'statistic = "wafer_mean"\nchart = "ewma"\nparams = { lambda = 0.1, L = 2.814 }\n'
    arl = describe_plan(parse_plan(text, path="p.toml"))[0]["in_control_arl"]
    # Lucas & Saccucci (1990), Technometrics 32(1), Table: lambda 0.10, L 2.814 -> ARL0 500 (from memory)
    assert arl["chart"] == pytest.approx(500, rel=0.01)
    assert arl["combined"] < arl["rules"]


def test_read_plan_missing_file_names_the_path(tmp_path):
    with pytest.raises(ConfigError, match="monitoring plan not found"):
        read_plan(tmp_path / "nope.toml")


def test_check_plan_step_with_wildcard_layer_is_refused():
    text = (
        '[[chart]]\nname = "m1"\nselect = { layer = "*_DEV", parameter = "cd_mid" }\nstatistic = "wafer_mean"\n'
        'chart = "ewma"\nsplit = ["chamber"]\nstep = "M1_LITHO"\n'
    )
    assert str(check_plan(text, path="plan.toml")[0]) == (
        'plan.toml:7:8: a route step belongs to one layer, but the selected layer has wildcards (found "*_DEV", '
        "expected a concrete layer name).\n  Fix: write one [[chart]] per layer."
    )


def test_demo_fab_plan_is_valid_and_covers_every_measured_layer():
    from pathlib import Path

    from demo_fab.fab import INSPECTION_STEPS, MEASURED_LAYERS

    plan = read_plan(Path(__file__).resolve().parents[2] / "demo_fab" / "plan.toml")
    covered = {
        (m.name, e.name)
        for m in MEASURED_LAYERS
        for e in plan.entries
        if e.matches(layer=m.name, parameter="cd_mid")
    }
    assert {m.name for m in MEASURED_LAYERS} <= {c[0] for c in covered}
    insp = {s.name for s in INSPECTION_STEPS}
    assert all(any(e.is_defect and e.matches(layer=s, parameter="total") for e in plan.entries) for s in insp)
    # defect charts use negative-binomial limits: the demo's counts are clustered (alpha 0.8-1.2), on
    # which u' alarms far above its nominal rate (docs/monitoring.md)
    assert {e.chart for e in plan.entries} >= {"ewma", "cusum", "negbin_u", "individuals"}


def test_store_plan_refuses_an_entry_that_changes_its_statistic_under_the_same_name(tmp_path):
    from warehouse import store
    from warehouse.plan import store_plan

    path = tmp_path / "w.duckdb"
    v1 = H + 'statistic = "wafer_mean"\nchart = "ewma"\n'
    with store.open_warehouse(path, create=True) as con:
        assert store_plan(con, parse_plan(v1, path="plan.toml"), user="t") == 1
        assert (
            store_plan(con, parse_plan(v1.replace('"ewma"', '"cusum"'), path="plan.toml"), user="t")
            is not None
        )
    with store.open_warehouse(path) as con, pytest.raises(ConfigError) as err:
        store_plan(
            con,
            parse_plan(v1.replace('"ewma"', '"cusum"').replace("wafer_mean", "wafer_sd"), path="plan.toml"),
            user="t",
        )
    assert str(err.value) == (
        'plan.toml:1:1: chart "m1" changes its statistic, but its series and frozen limits belong to the loaded '
        'definition (found "wafer_sd", expected wafer_mean as in plan version 2).\n'
        "  Fix: give the changed chart a new name (the old one's history stays), or keep the old definition."
    )


def test_plan_advice_notes_run_rules_ewma_and_cusum_on_wafer_level_points_only():
    from warehouse.plan import plan_advice

    def entry(statistic, chart, rules):
        text = (
            f'[[chart]]\nname = "m1"\nselect = {{ layer = "M1_DEV", parameter = "cd_mid" }}\n'
            f'statistic = "{statistic}"\nchart = "{chart}"\nrules = {rules}\n'
        )
        return parse_plan(text, path="p.toml").entries[0]

    assert "we2 on wafer_mean points" in plan_advice(entry("wafer_mean", "individuals", '["we1", "we2"]'))[0]
    assert plan_advice(entry("wafer_mean", "ewma", '["we1"]'))[0].startswith("EWMA on wafer_mean points")
    assert plan_advice(entry("lot_mean", "individuals", '["we1", "we2"]')) == []
    assert plan_advice(entry("wafer_mean", "individuals", '["we1"]')) == []


def test_wafer_means_of_nested_lots_make_rule_we2_alarm_far_above_its_in_control_rate():
    # why the advice: simulated in-control nested data (lot effect sd 1, wafer effect sd 0.5, 3 wafers a
    # lot), each point standardised by its true total sd; independent points alarm on we2 at 1/ARL with
    # ARL = 511 (our spc.arl Markov chain agrees with a direct simulation of independent normals, 0.21 %)
    from spc.rules import evaluate_rules, rule_params

    rng = np.random.default_rng(4)
    lots, wafers = 40_000, 3
    lot_eff = np.repeat(rng.normal(0, 1.0, lots), wafers)
    wafer_mean = lot_eff + rng.normal(0, 0.5, lots * wafers)
    sd_w, sd_l = np.sqrt(1.0 + 0.25), np.sqrt(1.0 + 0.25 / wafers)
    lot_mean = wafer_mean.reshape(lots, wafers).mean(axis=1)

    def rate(values, sd):
        frame = pl.DataFrame(
            {"series": 1, "seq": np.arange(values.size), "value": values, "center": 0.0, "sigma": sd}
        )
        return evaluate_rules(frame, [rule_params("we2")]).height / values.size

    assert rate(wafer_mean, sd_w) > 3 * rate(lot_mean, sd_l)
    assert rate(lot_mean, sd_l) == pytest.approx(1 / 511, rel=0.25)

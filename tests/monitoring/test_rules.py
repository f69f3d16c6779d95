"""Tests of casemix.monitoring.rules: the [monitoring] table of the rules file."""

from __future__ import annotations

import pytest

from casemix.errors import RulesError
from casemix.monitoring import MonitoringRules, load_monitoring_rules, monitoring_rules_from_dict
from casemix.stats.verdict import load_rules


def test_defaults_and_a_file_without_the_table(tmp_path):
    path = tmp_path / "rules.toml"
    path.write_text("[verdict]\nprobability = 0.99\n", encoding="utf-8")
    assert load_monitoring_rules(path) == MonitoringRules()
    assert load_monitoring_rules(None) == MonitoringRules()
    assert MonitoringRules().to_dict() == {
        "rho_up": 2.0, "rho_down": 0.5, "level": 0.05, "restart": True, "replicates": 1000,
        "seed": 2026, "h": None, "horizon_days": None,
    }


def test_both_tables_in_one_file(tmp_path):
    path = tmp_path / "rules.toml"
    path.write_text("[verdict]\nprobability = 0.99\n\n[monitoring]\nrho_up = 1.5\n"
                    "restart = false\nh = 4.0\nreplicates = 0\n", encoding="utf-8")
    rules = load_monitoring_rules(path)
    assert (rules.rho_up, rules.restart, rules.h, rules.replicates) == (1.5, False, 4.0, 0)
    assert load_rules(path).probability == 0.99  # the verdict reader accepts the table


@pytest.mark.parametrize(("values", "message"), [
    ({"rho_up": 1.0}, r"rho_up must be a hazard ratio above 1 \(a rho of 1 detects"),
    ({"rho_down": 1.0}, r"rho_down must be a hazard ratio strictly between 0 and 1"),
    ({"rho_down": 2.0}, r"rho_down must be"),
    ({"level": 0.0}, r"level must be a probability strictly between 0 and 1"),
    ({"level": 1.0}, r"level must be a probability"),
    ({"restart": 1}, r"restart must be true or false"),
    ({"replicates": 50}, r"replicates must be at least 100 when the limits are simulated"),
    ({"replicates": 2.5}, r"replicates must be a whole number"),
    ({"h": -1.0}, r"h must be a positive number"),
    ({"horizon_days": 0}, r"horizon_days must be a positive number of days"),
    ({"rho": 2.0}, r"unknown key\(s\) in \[monitoring\]: rho\. Allowed keys: rho_up"),
])
def test_bad_values_name_the_source_and_key(values, message):
    with pytest.raises(RulesError, match=message):
        monitoring_rules_from_dict(values, source="rules file r.toml")
    with pytest.raises(RulesError, match=r"rules file r\.toml: "):
        monitoring_rules_from_dict(values, source="rules file r.toml")


def test_unreadable_files(tmp_path):
    with pytest.raises(RulesError, match="cannot read rules file"):
        load_monitoring_rules(tmp_path / "missing.toml")
    bad = tmp_path / "bad.toml"
    bad.write_text("[monitoring\n", encoding="utf-8")
    with pytest.raises(RulesError, match="is not valid TOML"):
        load_monitoring_rules(bad)

"""Thresholds: defaults, TOML and overrides, one-sentence errors; the check registry."""

import ast
import dataclasses
import inspect
import math
import typing
from pathlib import Path

import pytest

from actdoc.analysis import TABLE, Settings, load_settings
from actdoc.analysis import defaults
from actdoc.analysis.checks import REGISTRY, all_checks
from actdoc.errors import InvalidSetting

DOCS = Path(__file__).resolve().parents[2] / "docs" / "checks.md"


def test_defaults_are_the_interface_values():
    # docs/contract.md section 4: ln 99 / atanh 0.99 edges, 1% dormant, 95% saturated
    s = Settings()
    assert s.logistic_saturation_margin == 0.01 and s.tanh_saturation_level == 0.99
    assert s.dormant_active_share == 0.01 and s.saturated_share == 0.95
    assert s.near_binary_share == 0.95 and s.near_binary_minority == 0.05
    assert s.as_mapping()["signal_limit"] == 10.0
    assert all(row.meaning and row.reason and row.source for row in TABLE)


def test_toml_then_overrides(tmp_path):
    config = tmp_path / "thresholds.toml"
    config.write_text("saturated_share = 0.9\nsignal_limit = 20\nhistogram_rows = 100\n")
    s = load_settings(config, ["signal_limit=5", "dormant_active_share = 0.02"])
    assert (s.saturated_share, s.signal_limit, s.dormant_active_share) == (0.9, 5.0, 0.02)
    assert s.histogram_rows == 100 and isinstance(s.histogram_rows, int)
    with pytest.raises(Exception):
        s.signal_limit = 3  # frozen


def test_settings_fields_match_the_table_one_to_one():
    # The table is the one place for values: every row is a typed field of Settings whose
    # default is the row's, and no field lacks a row. (Project rule, DEVELOPERS.md.)
    fields = {f.name: f for f in dataclasses.fields(Settings)}
    rows = {row.name: row for row in TABLE}
    assert not set(rows) - set(fields), "add a field to Settings for each of these rows"
    assert not set(fields) - set(rows), "add a row to TABLE for each of these fields"
    hints = typing.get_type_hints(Settings)
    for name, row in rows.items():
        assert hints[name] is (int if row.integer else float), name
        assert fields[name].default == row.default, name
        assert isinstance(getattr(Settings(), name), int if row.integer else (int, float))
    assert Settings().as_mapping() == {row.name: row.default for row in TABLE}


def test_every_settings_field_is_documented():
    # A plain dataclass, readable in the source: each field is followed by its own docstring.
    tree = ast.parse(inspect.getsource(defaults))
    body = next(node for node in tree.body
                if isinstance(node, ast.ClassDef) and node.name == "Settings").body
    documented = {
        node.target.id for node, after in zip(body, body[1:])
        if isinstance(node, ast.AnnAssign) and isinstance(after, ast.Expr)
        and isinstance(after.value, ast.Constant) and isinstance(after.value.value, str)
        and after.value.value.strip()}
    assert documented == {row.name for row in TABLE}
    assert not any(isinstance(node, ast.Call) and getattr(node.func, "attr", "") ==
                   "make_dataclass" for node in ast.walk(tree))


def test_replace_checks_values_and_keeps_the_type():
    s = Settings().replace(signal_limit=20, histogram_rows=100.0)
    assert type(s) is Settings and s.signal_limit == 20.0 and s.histogram_rows == 100
    assert isinstance(s.histogram_rows, int)
    with pytest.raises(InvalidSetting, match="expected a whole number"):
        Settings().replace(histogram_rows=2.5)
    with pytest.raises(InvalidSetting, match="unknown setting 'nope'"):
        Settings().replace(nope=1)


@pytest.mark.parametrize("overrides, fragment", [
    (["no_such=1"], "unknown setting 'no_such' (from --set); known settings are"),
    (["saturated_share=abc"], "setting 'saturated_share' = 'abc' (from --set): expected a "
                              "number in (0, 1]"),
    (["saturated_share=1.5"], "expected a number in (0, 1]"),
    (["histogram_rows=2.5"], "expected a whole number"),
    (["signal_limit"], "override 'signal_limit' (from --set): expected name=value"),
    (["warning_share=0.6"], "'warning_share' = 0.6 (from --set) is above 'critical_share'"),
])
def test_bad_overrides_raise_one_sentence(overrides, fragment):
    with pytest.raises(InvalidSetting) as caught:
        load_settings(None, overrides)
    assert fragment in str(caught.value) and "\n" not in str(caught.value)


def test_bad_toml_files(tmp_path):
    broken = tmp_path / "broken.toml"
    broken.write_text("saturated_share = = 1")
    with pytest.raises(InvalidSetting, match=r"^broken.toml: not valid TOML"):
        load_settings(broken)
    unknown = tmp_path / "unknown.toml"
    unknown.write_text("[section]\nx = 1\n")
    with pytest.raises(InvalidSetting, match=r"unknown setting 'section' \(in unknown.toml\)"):
        load_settings(unknown)
    with pytest.raises(InvalidSetting, match="missing.toml: cannot read"):
        load_settings(tmp_path / "missing.toml")


def test_registry_finds_every_check_in_exclusivity_order():
    names = [c.name for c in all_checks()]
    assert set(names) == {"non_finite", "dead", "dormant", "saturated", "near_binary",
                          "linear_regime", "constant", "vanishing_signal", "exploding_signal",
                          "init_scale", "rarely_fires", "zero_weights", "duplicate",
                          "in_place_record", "saturated_layer", "gradient_flow", "probe_size",
                          "probe_scale", "probe_nonfinite"}
    scopes = [c.scope for c in all_checks()]
    assert scopes == sorted(scopes, key=("unit", "layer", "probe").index)
    ranked = [c.name for c in all_checks() if c.rank is not None]
    assert ranked == ["dead", "dormant", "saturated", "near_binary", "linear_regime",
                      "constant"]
    assert all(REGISTRY[n].cause and REGISTRY[n].remedy for n in names)


def test_docs_describe_every_setting_and_check():
    text = DOCS.read_text()
    for row in TABLE:
        assert f"`{row.name}`" in text, row.name
    for name in REGISTRY:
        assert f"`{name}`" in text, name
    assert math.log(99) == pytest.approx(4.595, abs=1e-3) and "4.595" in text

"""Config: the bundled YAML equals the code's defaults; bad files name file, line, key."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from alerter.config import DEFAULT_CONFIG, Config, load_config, parse_config
from alerter.errors import ConfigError


def test_bundled_default_equals_code_defaults() -> None:
    assert load_config(DEFAULT_CONFIG) == Config()


def test_every_key_in_default_yaml_has_a_comment() -> None:
    """Each key line is preceded by a comment line (or carries one), so the analyst knows what it does."""
    lines = DEFAULT_CONFIG.read_text().splitlines()
    keys = 0
    for i, line in enumerate(lines):
        if re.match(r"^\s*[a-z_]+:", line):
            keys += 1
            assert lines[i - 1].strip().startswith("#"), f"line {i + 1} has no comment above it: {line!r}"
    assert keys > 20


def _problems(text: str) -> list[str]:
    with pytest.raises(ConfigError) as info:
        parse_config(text, "tuned.yaml")
    return info.value.problems


def test_unknown_key_is_an_error_with_line_and_allowed_keys() -> None:
    problems = _problems("baseline:\n  alpha: 0.1\n  alhpa: 0.2\n")
    assert len(problems) == 1
    assert problems[0].startswith("tuned.yaml:3: baseline.alhpa: unknown key")
    assert "alpha" in problems[0] and "warmup_hours" in problems[0]


def test_each_problem_gets_its_own_line() -> None:
    text = "rules:\n  surge:\n    z: -1\n    persistence: 0\n  drop:\n    min_ratio: 0.5\nclock:\n  timezone: Nowhere/City\n"
    problems = _problems(text)
    assert len(problems) == 4
    joined = "\n".join(problems)
    assert "tuned.yaml:3: rules.surge.z = -1" in joined and "greater than 0" in joined
    assert "tuned.yaml:4: rules.surge.persistence = 0" in joined
    assert "tuned.yaml:6: rules.drop.min_ratio = 0.5" in joined
    assert "tuned.yaml:8: clock.timezone = 'Nowhere/City'" in joined and "IANA" in joined


def test_literal_values_list_the_allowed_ones() -> None:
    (problem,) = _problems("baseline:\n  transform: sqrt\n")
    assert "'log1p' or 'identity'" in problem and "tuned.yaml:2" in problem


def test_override_keys_are_checked_inside_lists() -> None:
    text = "rules:\n  overrides:\n    - name: hubs\n      match: ['/']\n      surge: {zz: 3}\n"
    (problem,) = _problems(text)
    assert "rules.overrides.0.surge.zz: unknown key" in problem and "min_ratio" in problem


def test_not_yaml_and_not_a_mapping() -> None:
    assert "not valid YAML" in _problems("a: [1, 2\n")[0]
    assert "top level must be a mapping" in _problems("- 1\n- 2\n")[0]


def test_missing_file_names_the_file(tmp_path: Path) -> None:
    with pytest.raises(ConfigError) as info:
        load_config(tmp_path / "nope.yaml")
    assert "nope.yaml" in str(info.value) and "cannot read" in str(info.value)


def test_overrides_apply_first_match() -> None:
    from alerter.rules import RuleBook

    cfg = parse_config("rules:\n  overrides:\n    - name: sports\n      match: ['/sports*']\n      surge: {z: 7}\n"
                       "    - name: all\n      match: ['*']\n      surge: {z: 2}\n")
    book = RuleBook(cfg.rules)
    book.add_nodes(["/sports/a1", "/news/b2"])
    assert book.z("surge").tolist() == [7.0, 2.0]
    assert book.rule_name("surge", 0) == "surge:sports" and book.rule_name("surge", 1) == "surge:all"
    assert book.z("drop").tolist() == [5.0, 5.0]


def test_a_partial_drop_block_keeps_the_other_drop_defaults() -> None:
    """``rules.drop`` given with one key changes that key only: its other thresholds stay the
    drop rule's (z 5, 20 visits, ratio 1.5), not the surge rule's looser ones."""
    tuned = parse_config("rules:\n  drop:\n    z: 3.5\n", "tuned.yaml").rules
    default = Config().rules
    assert tuned.drop.z == 3.5 and default.drop.z == 5.0
    assert tuned.drop.model_dump(exclude={"z"}) == default.drop.model_dump(exclude={"z"})
    assert tuned.drop.min_expected != default.surge.min_expected  # the defaults it must not fall back to
    assert tuned.surge == default.surge


def test_every_section_default_is_its_class_default() -> None:
    """A section's default must equal its class built with no keys: else a YAML block that gives
    some keys of it silently takes the class's values for the others (as ``rules.drop`` once did)."""
    from pydantic import BaseModel

    def walk(model: type[BaseModel], path: str) -> int:
        seen = 0
        for name, field in model.model_fields.items():
            default = field.default
            if isinstance(default, BaseModel):
                assert default == type(default)(), f"{path}{name}: default differs from {type(default).__name__}()"
                seen += 1 + walk(type(default), f"{path}{name}.")
        return seen

    assert walk(Config, "") > 10

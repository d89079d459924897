"""The training config schema: strict validation, --set, shipped configs, and the docs reference (docs/configs.md)."""
from __future__ import annotations

import re
from pathlib import Path

import pytest

from grainwright.inference.common.errors import ConfigError
from grainwright.trainer.config import (
    SCHEMA,
    defaults,
    load_config,
    parse_assignment,
    schema_markdown,
    validate,
)

SHIPPED = ("clean-synthetic", "pairs", "noisy-pairs", "noisy-only", "fast-cpu")


def test_defaults_are_valid():
    assert validate({}) == defaults()
    assert validate(defaults()) == defaults()


@pytest.mark.parametrize("name", SHIPPED)
def test_shipped_configs_load(name):
    from grainwright.models.registry import build_model

    config = load_config(name)
    # The shipped model section must build (registry check of name and hyper-parameters).
    model = build_model(config["model"]["name"], 1, **config["model"]["hyper"])
    assert model.parameter_count() > 0


def test_the_starting_model_recipe_is_not_a_training_config(tmp_path, capsys):
    # Its [generated] table belongs to `grainwright starting-model train`: one line that points there.
    from grainwright.console.cli import main

    with pytest.raises(ConfigError, match=r"starting-model recipe .*'grainwright starting-model train --recipe "
                                          r"starting-model --out RUN_DIR'"):
        load_config("starting-model")
    assert main(["train", "starting-model"]) == 2
    error = capsys.readouterr().err.strip()
    assert len(error.splitlines()) == 1 and "grainwright starting-model train" in error
    assert main(["train", "starting-model", "--data", str(tmp_path)]) == 2
    assert "grainwright starting-model train" in capsys.readouterr().err


def test_unknown_key_names_the_path_and_the_closest_key():
    with pytest.raises(ConfigError, match=r"optim\.lrr: unknown key \(did you mean 'optim\.lr'\?\)"):
        validate({"optim": {"lrr": 0.1}})
    with pytest.raises(ConfigError, match=r"shceme: unknown key \(did you mean 'scheme'\?\)"):
        validate({"shceme": "masked"})


def test_wrong_types_are_rejected_with_the_key_path():
    with pytest.raises(ConfigError, match=r"data\.patch_size: expected an integer"):
        validate({"data": {"patch_size": 64.5}})
    with pytest.raises(ConfigError, match=r"data\.augment: expected true or false"):
        validate({"data": {"augment": 1}})
    with pytest.raises(ConfigError, match=r"optim\.lr: expected a number"):
        validate({"optim": {"lr": "fast"}})
    with pytest.raises(ConfigError, match=r"optim: expected a table"):
        validate({"optim": 3})
    with pytest.raises(ConfigError, match=r"model\.skip: expected true, false or \"auto\""):
        validate({"model": {"skip": "yes"}})


def test_out_of_range_values_are_rejected():
    with pytest.raises(ConfigError, match=r"mask\.fraction: 0\.9 is out of range"):
        validate({"mask": {"fraction": 0.9}})
    with pytest.raises(ConfigError, match=r"data\.patch_size: 4 is out of range \[8, 1024\]"):
        validate({"data": {"patch_size": 4}})


def test_choice_suggests_the_close_spelling():
    with pytest.raises(ConfigError, match=r"did you mean 'neighbor2neighbor'"):
        validate({"scheme": "neighbour2neighbour"})


def test_set_assignments_parse_toml_values():
    assert parse_assignment("optim.lr=5e-4") == ("optim.lr", 5e-4)
    assert parse_assignment("data.augment = false") == ("data.augment", False)
    assert parse_assignment("scheme=masked") == ("scheme", "masked")  # bare word taken as a string
    config = load_config("fast-cpu", ["optim.lr=5e-4", "mask.grid=false"])
    assert config["optim"]["lr"] == 5e-4 and config["mask"]["grid"] is False
    with pytest.raises(ConfigError, match="expected key=value"):
        load_config(None, ["optim.lr"])


def test_config_file_errors_name_the_file(tmp_path):
    path = tmp_path / "bad.toml"
    path.write_text("[optim]\nlearning_rate = 0.1\n")
    with pytest.raises(ConfigError, match=r"bad\.toml: optim\.learning_rate: unknown key"):
        load_config(path)
    path.write_text("[optim\n")
    with pytest.raises(ConfigError, match=r"bad\.toml: not valid TOML"):
        load_config(path)
    with pytest.raises(ConfigError, match="config file not found"):
        load_config(tmp_path / "missing.toml")


def test_a_bad_command_line_value_names_the_command_line_not_the_file(tmp_path):
    path = tmp_path / "good.toml"
    path.write_text("[optim]\nlr = 0.001\n")
    with pytest.raises(ConfigError, match=r"^--set: data\.validation_split: 'strips' is not one of") as raised:
        load_config(path, ['data.validation_split="strips"'])
    assert "good.toml" not in str(raised.value)
    with pytest.raises(ConfigError, match=r"^--set: budget\.minutes"):
        load_config("fast-cpu", ["budget.minutes=-1"])
    path.write_text("[optim]\nlr = -1\n")  # the file's own mistake still names the file, whatever --set says
    with pytest.raises(ConfigError, match=r"good\.toml: optim\.lr"):
        load_config(path, ["budget.minutes=1"])


def test_markdown_reference_lists_every_key():
    text = schema_markdown()
    def keys(node, prefix=""):
        for name, entry in node.items():
            if isinstance(entry, dict):
                yield from keys(entry, prefix + name + ".")
            else:
                yield prefix + name
    for key in keys(SCHEMA):
        assert f"| `{key}` |" in text


def test_docs_config_reference_is_the_rendered_schema():
    page = (Path(__file__).resolve().parent.parent / "docs" / "configs.md").read_text(encoding="utf-8")
    section = re.search(r"<!-- section: config-reference -->(.*?)<!-- /section: config-reference -->", page, re.S).group(1)
    assert schema_markdown() in section

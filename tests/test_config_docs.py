"""The config described once: the README's reference table and the JSON Schema are generated
from the config's section classes, and the JSON Schema agrees with the validator on good and bad
configs (checked with the `jsonschema` library, the reference implementation of the JSON Schema
specification for Python)."""
from __future__ import annotations

import json
from pathlib import Path

import pytest
import yaml

from eddybox.solver.cli import main
from eddybox.solver.errors import ConfigError
from eddybox.solver.run.config import restart_mutable_keys, validate
from eddybox.solver.run.config_docs import README_BEGIN, README_END, json_schema, readme_section

ROOT = Path(__file__).resolve().parent.parent
EXAMPLES = sorted((ROOT / "configs").glob("*.yaml")) + [ROOT / "solver" / "study" / "demo.yaml"]


def test_readme_reference_is_the_generated_one():
    text = (ROOT / "README.md").read_text()
    assert README_BEGIN in text and README_END in text
    i, j = text.index(README_BEGIN), text.index(README_END) + len(README_END)
    assert text[i:j] == readme_section(), (
        "README.md's config reference differs from the config classes: regenerate it with "
        "`eddybox schema --write-readme README.md`")


def test_readme_lists_the_restart_keys_the_code_uses():
    text = (ROOT / "README.md").read_text()
    line = next(ln for ln in text.splitlines() if ln.startswith("Keys that may change when a run"))
    assert line.count("`") // 2 == len(restart_mutable_keys())
    for key in restart_mutable_keys():
        assert f"`{key}`" in line


def _validator():
    jsonschema = pytest.importorskip("jsonschema")
    schema = json_schema()
    jsonschema.Draft202012Validator.check_schema(schema)  # the schema itself is well formed
    return jsonschema.Draft202012Validator(schema)


@pytest.mark.parametrize("path", EXAMPLES, ids=[p.name for p in EXAMPLES])
def test_example_configs_pass_the_schema_and_the_validator(path):
    raw = yaml.safe_load(path.read_text())
    validate(raw, str(path))
    errors = list(_validator().iter_errors(raw))
    assert not errors, [e.message for e in errors]


def test_resolved_config_with_every_default_passes_the_schema():
    cfg = validate({"forcing": {"kind": "ou", "dissipation": 0.1},
                    "particles": {"sets": [{"name": "a", "stokes": 1.0}]}})
    errors = list(_validator().iter_errors(json.loads(json.dumps(cfg.data))))
    assert not errors, [e.message for e in errors]


BAD = [
    {"grid": {"points": 63}},                                  # odd
    {"grid": {"pionts": 32}},                                  # unknown key
    {"forcing": {"kind": "ou", "mode": "power"}},              # a key of another kind
    {"forcing": {"kind": "stochastic"}},                       # no such kind
    {"forcing": {"band": 2.0}},                                # the default kind (none) has no band
    {"time": {"scheme": "euler"}},
    {"particles": {"sets": [{"name": "a b", "stokes": 1.0}]}},  # a name with a space
    {"stats": {"pairs": {"units": "m"}}},
    {"fluid": {"initial": {"kind": "abc", "peak": 2}}},
]


@pytest.mark.parametrize("raw", BAD, ids=[json.dumps(b) for b in BAD])
def test_bad_configs_fail_both_the_schema_and_the_validator(raw):
    with pytest.raises(ConfigError):
        validate(raw)
    assert list(_validator().iter_errors(raw))


def test_schema_command_prints_json_and_markdown(capsys):
    assert main(["schema"]) == 0
    assert json.loads(capsys.readouterr().out)["title"] == "eddybox run config"
    assert main(["schema", "--markdown"]) == 0
    assert capsys.readouterr().out.startswith("| key | default | units | meaning |")


def test_shorthand_and_eddy_times_pass_the_schema():
    raw = {"forcing": {"kind": "ou", "band": 2.0, "dissipation": 0.1, "timescale": "0.5 T_E",
                       "calibrate": "20 T_E"},
           "particles": {"sets": [{"name": "st", "stokes": [0.5, 1, 2]}]}}
    validate(raw)
    errors = list(_validator().iter_errors(raw))
    assert not errors, [e.message for e in errors]
    bad = {"forcing": {"kind": "ou", "timescale": "0.5 T_L"}}
    assert list(_validator().iter_errors(bad))

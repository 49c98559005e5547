"""`twinring config`: every key of every section, from the validator's dataclasses; --defaults loads back."""
import dataclasses

import pytest
import yaml

from twinring import cli, config_reference
from twinring.config import SECTIONS, InputError, RunConfig, config_from_dict, load_config


def _listing(capsys, *argv):
    assert cli.main(["config", *argv]) == 0
    return capsys.readouterr().out


def test_config_lists_every_field_of_every_section(capsys):
    out = _listing(capsys)
    blocks = {}
    current = None
    for line in out.splitlines():
        if line and not line.startswith(" "):
            current = line.split(":")[0]
            blocks[current] = []
        elif line.strip():
            blocks[current].append(line.split()[0])
    assert list(blocks) == list(SECTIONS)
    for name, cls in SECTIONS.items():
        assert blocks[name] == [f.name for f in dataclasses.fields(cls)], name


def test_every_key_has_help_default_and_allowed_values(capsys):
    out = _listing(capsys)
    for k in config_reference.keys():
        assert k.help != config_reference.MISSING_HELP, f"{k.name} has no help line"
        line = next(l for l in out.splitlines() if l.split()[:1] == [k.key] and k.help in l)
        assert f"[{k.allowed}]" in line
    # allowed values are the validator's: a listed choice passes, one outside is refused, per choice field
    for name, cls in SECTIONS.items():
        for f in dataclasses.fields(cls):
            if "choices" in f.metadata:
                assert " | ".join(f.metadata["choices"]) in config_reference.allowed_text(f.metadata)
                with pytest.raises(InputError):
                    config_from_dict({name: {f.name: "no-such-choice"}})
    # the stated range is the enforced one: a value just past a stated max is refused
    text = config_reference.allowed_text(dataclasses.fields(SECTIONS["report"])[1].metadata)
    assert text == "integer >= 40 and <= 600"
    with pytest.raises(InputError):
        config_from_dict({"report": {"dpi": 601}})
    config_from_dict({"report": {"dpi": 600}})


def test_defaults_yaml_is_complete_annotated_and_loads_back(tmp_path, capsys):
    path = tmp_path / "defaults.yaml"
    assert cli.main(["config", "--defaults", str(path)]) == 0
    assert str(path) in capsys.readouterr().out
    text = path.read_text()
    raw = yaml.safe_load(text)
    assert set(raw) == set(SECTIONS)
    for name, cls in SECTIONS.items():
        assert list(raw[name]) == [f.name for f in dataclasses.fields(cls)]
    n_comments = sum(1 for l in text.splitlines() if l.strip().startswith("# ") and l.startswith("  "))
    assert n_comments == sum(len(dataclasses.fields(c)) for c in SECTIONS.values())
    cfg = load_config(path)
    assert cfg.to_dict() == RunConfig().to_dict()
    # to stdout with no file; one section only
    out = _listing(capsys, "--defaults", "--section", "report")
    assert yaml.safe_load(out) == {"report": {"circles": 3, "dpi": 110}}


def test_unknown_section_is_one_line_exit_2(capsys):
    assert cli.main(["config", "--section", "serch"]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "serch" in err and "search" in err

"""The configuration contract: `hamstride config` lists every key `--config` accepts (type, range, default,
source), the listing loads back to the defaults, and every key refuses a value of the wrong type or range."""
from __future__ import annotations

import re
from dataclasses import fields

import pytest

from hamstride import cli
from hamstride.errors import ConfigError
from hamstride.metrics import FlagConfig
from hamstride.pipeline import AnalysisOptions
from hamstride.settings import SETTINGS, RunConfig, load_config, settings_of


def _listing(capsys) -> str:
    assert cli.main(["config"]) == 0
    return capsys.readouterr().out


def test_config_lists_every_key_with_type_range_default_and_source(capsys):
    text = _listing(capsys)
    sections = {"analysis": AnalysisOptions, "flags": FlagConfig}
    for section, cls in sections.items():
        body = text.split(f"[{section}]\n", 1)[1].split("\n[", 1)[0]
        keys = re.findall(r"^(\w+) = ", body, flags=re.M)
        assert keys == [f.name for f in fields(cls)], section  # every key --config accepts, in order
        for key in keys:
            comment = body.split(f"\n{key} = ")[0].rsplit("\n", 1)[-1]
            assert all(word in comment for word in ("type:", "range:", "default:", "source:")), (key, comment)
    assert "not documented yet" not in text  # every dataclass field has its entry in settings.SETTINGS


def test_config_listing_loads_back_to_the_defaults(capsys, tmp_path):
    path = tmp_path / "config.toml"
    path.write_text(_listing(capsys))
    assert load_config(path).as_dict() == RunConfig().as_dict()


@pytest.mark.parametrize("setting", SETTINGS, ids=lambda s: f"{s.section}.{s.key}")
def test_every_key_refuses_wrong_types_and_ranges(setting, tmp_path):
    path = tmp_path / "config.toml"
    bad = ['"zzz"', "[1, 2, 3]"]
    if setting.kind in ("number", "integer"):
        bad += [f"{setting.low - 1}", f"{setting.high + 1}", "true"]
    if setting.kind == "integer":
        bad.append(f"{setting.low + 0.5}")
    for value in bad:
        path.write_text(f"[{setting.section}]\n{setting.key} = {value}\n")
        with pytest.raises(ConfigError) as info:
            load_config(path)
        assert f"[{setting.section}] {setting.key} = " in info.value.message and "expected" in info.value.message


@pytest.mark.parametrize("section", ["analysis", "flags"])
def test_defaults_pass_their_own_checks(section):
    for key, setting in settings_of(section).items():
        default = setting.default()
        value = list(default) if isinstance(default, tuple) else ("auto" if default is None else default)
        checked = setting.check(value, key)
        assert checked == default or (checked != checked and default != default), key  # NaN == NaN here

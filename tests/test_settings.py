"""Settings: precedence flags > environment > TOML file > defaults, and strict validation."""

from __future__ import annotations

import re
from dataclasses import fields
from pathlib import Path

import pytest

from streamgroup.commands import SETTING_HELP, env_name, flag_name
from streamgroup.errors import ConfigError
from streamgroup.settings import Settings, load_settings, redact_url

README = Path(__file__).resolve().parent.parent / "README.md"


def _toml(tmp_path: Path, text: str) -> str:
    p = tmp_path / "sg.toml"
    p.write_text(text)
    return str(p)


def test_precedence_flags_then_env_then_file(tmp_path: Path) -> None:
    """A flag beats the environment, which beats the file, which beats the default."""
    cfg = _toml(tmp_path, 'alpha = 0.01\nbatch = 50\nns = "file"\nseed = 3\n')
    env = {"STREAMGROUP_ALPHA": "0.02", "STREAMGROUP_BATCH": "60"}
    s = load_settings({"alpha": "0.03", "ns": None}, env, cfg)
    assert (s.alpha, s.batch, s.ns, s.seed, s.inflight) == (0.03, 60, "file", 3, 1)


def test_streamgroup_table_in_toml(tmp_path: Path) -> None:
    """A [streamgroup] table is read as the settings (other tables may share the file)."""
    cfg = _toml(tmp_path, '[other]\nx = 1\n[streamgroup]\npack-questions = true\n'
                          'metrics_addr = ""\n')
    s = load_settings({}, {}, cfg)
    assert s.pack_questions is True and s.metrics_addr == ""


def test_config_path_from_environment(tmp_path: Path) -> None:
    """STREAMGROUP_CONFIG names the file when --config is not given."""
    cfg = _toml(tmp_path, "item_ceiling = 77\n")
    assert load_settings({}, {"STREAMGROUP_CONFIG": cfg}).item_ceiling == 77


@pytest.mark.parametrize("flags, env, text, message", [
    ({}, {"STREAMGROUP_ALPA": "0.1"}, None, "STREAMGROUP_ALPA: unknown setting"),
    ({}, {}, "alpah = 0.1\n", "unknown setting 'alpah'"),
    ({"alpha": "lots"}, {}, None, "flag --alpha: expected float"),
    ({"batch": "2.5"}, {}, None, "expected int"),
    ({}, {"STREAMGROUP_PACK_QUESTIONS": "maybe"}, None, "expected bool"),
    ({"alpha": "0.7"}, {}, None, "alpha: must be in"),
    ({"alpha": "nan"}, {}, None, "alpha"),
    ({"redis": "http://x"}, {}, None, "redis"),
    ({"ns": "a b"}, {}, None, "ns"),
    ({"inflight": "0"}, {}, None, "inflight"),
    ({"metrics_addr": "nohost"}, {}, None, "metrics_addr"),
    ({"question_timeout": "inf"}, {}, None, "question_timeout"),
    ({"nice": "-5"}, {}, None, "nice: must be in [0, 19]"),
    ({}, {"STREAMGROUP_NICE": "20"}, None, "nice: must be in [0, 19]"),
    ({"hold_ms": "-0.5"}, {}, None, "hold_ms: must be 0"),
    ({}, {"STREAMGROUP_HOLD_MS": "nan"}, None, "hold_ms: must be 0"),
    ({}, {}, "alpha = [1\n", "config file"),
])
def test_bad_settings_are_one_clear_error(tmp_path: Path, flags, env, text, message) -> None:
    """Unknown names, wrong types and out-of-range values raise ConfigError naming them."""
    cfg = _toml(tmp_path, text) if text is not None else None
    with pytest.raises(ConfigError, match=re.escape(message)):
        load_settings(flags, env, cfg)


def test_missing_config_file_is_a_config_error(tmp_path: Path) -> None:
    """A --config path that does not exist is reported, not ignored."""
    with pytest.raises(ConfigError, match="not found"):
        load_settings({}, {}, str(tmp_path / "nope.toml"))


def test_redact_url_hides_passwords() -> None:
    """redact_url masks the password and keeps the rest of the URL readable."""
    assert redact_url("redis://:s3cret@db:6380/1") == "redis://:***@db:6380/1"
    assert redact_url("rediss://app:s3cret@db/0") == "rediss://app:***@db/0"
    assert redact_url("redis://db:6379/0") == "redis://db:6379/0"


def test_every_setting_is_described_and_documented() -> None:
    """Each Settings field has CLI help and a row (flag and env var) in the README table."""
    names = [f.name for f in fields(Settings)]
    assert set(SETTING_HELP) == set(names)
    readme = README.read_text()
    for name in names:
        row = f"| `{name}` | `{flag_name(name)}` | `{env_name(name)}` |"
        assert row in readme, f"README configuration table lacks {name}"

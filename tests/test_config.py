"""Config loading: every error is one line naming file, line, key path and value."""

import pytest

from brimline.daemon.errors import ConfigError
from brimline.daemon.runtime.config import load_config


def _write(tmp_path, text):
    p = tmp_path / "c.yaml"
    p.write_text(text)
    return p


def test_empty_file_gives_defaults(tmp_path):
    cfg = load_config(_write(tmp_path, ""))
    assert cfg.loading.mode == "rate"


@pytest.mark.parametrize("text, match", [
    ("loading:\n  gap_db: '9.8'\n", r"line 2: loading.gap_db='9.8'"),
    ("loading:\n  bogus: 1\n", r"line 2: unknown key loading.bogus"),
    ("loading:\n  mode: fast\n", r"loading.mode='fast'"),
    ("loading: [1, 2\n", r"line \d+: YAML syntax error"),
    ("- a\n- b\n", r"top level must be a mapping"),
    ("loading:\n  bits: [0, 2, 1]\n", r"loading.bits=\[0, 2, 1\]"),
])
def test_bad_configs_name_the_key(tmp_path, text, match):
    with pytest.raises(ConfigError, match=match):
        load_config(_write(tmp_path, text))


def test_missing_and_directory(tmp_path):
    with pytest.raises(ConfigError, match="no such config file"):
        load_config(tmp_path / "nope.yaml")
    with pytest.raises(ConfigError, match="is a directory"):
        load_config(tmp_path)


def test_readme_lists_every_estimator_and_change_key_with_its_default():
    """The README's defaults table stays true: every key of both sections, with its default."""
    from pathlib import Path

    from brimline.daemon.runtime.config import ChangeSection, EstimatorSection

    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text()
    for prefix, section in (("estimator", EstimatorSection), ("change", ChangeSection)):
        for key, field in section.model_fields.items():
            assert f"| `{prefix}.{key}` | {field.default} |" in readme, f"{prefix}.{key}"

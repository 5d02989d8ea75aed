"""Config loading: every error is one line naming file, line, key path and value."""

import inspect
import math
import re
from pathlib import Path

import pytest

from brimline.daemon.core.change import ChangeControl
from brimline.daemon.core.estimator import Estimator
from brimline.daemon.errors import ConfigError
from brimline.daemon.runtime.config import ChangeSection, EstimatorSection, load_config, read_yaml


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


def _keyword_defaults(cls):
    return {name: p.default for name, p in inspect.signature(cls).parameters.items()
            if p.default is not inspect.Parameter.empty}


SECTIONS_OF_CONSTRUCTORS = [("estimator", EstimatorSection, Estimator),
                            ("change", ChangeSection, ChangeControl)]


@pytest.mark.parametrize("prefix, section, cls", SECTIONS_OF_CONSTRUCTORS,
                         ids=[p for p, _, _ in SECTIONS_OF_CONSTRUCTORS])
def test_section_keys_and_defaults_are_the_constructors(prefix, section, cls):
    """The section's keys are exactly the constructor's keyword arguments (``loader`` aside) and
    its defaults are the constructor's: the signature is the one place they are written."""
    defaults = _keyword_defaults(cls)
    assert set(section.model_fields) == set(defaults)
    assert section().model_dump() == defaults


@pytest.mark.parametrize("prefix, section, cls", SECTIONS_OF_CONSTRUCTORS,
                         ids=[p for p, _, _ in SECTIONS_OF_CONSTRUCTORS])
def test_readme_lists_every_key_with_the_constructors_default(prefix, section, cls):
    """The README's key table stays true: one row per key of the section, in any order, with
    the default taken from the constructor's signature (where defaults are defined), and no
    row for a key that does not exist."""
    readme = (Path(__file__).resolve().parents[1] / "README.md").read_text()
    rows = dict(re.findall(rf"^\| `{prefix}\.(\w+)` \| ([^|]+?) \|", readme, re.M))
    expected = {key: str(value) for key, value in _keyword_defaults(cls).items()}
    assert rows == expected


def test_readme_table_check_sees_a_wrong_default(tmp_path):
    """The README check itself: a row with another default would be caught."""
    rows = dict(re.findall(r"^\| `estimator\.(\w+)` \| ([^|]+?) \|",
                           "| `estimator.tau_s` | 0.2 | smoothing |\n", re.M))
    assert rows == {"tau_s": "0.2"} != {"tau_s": str(_keyword_defaults(Estimator)["tau_s"])}


class TestExponentNumbers:
    """YAML 1.2 core schema float rule (YAML 1.2 spec, sec. 10.3.2 "Tag Resolution", the core
    schema; its JSON schema counterpart is sec. 10.2.1.4 "Floating Point"; both from memory):
    ``[-+]? ( . [0-9]+ | [0-9]+ ( . [0-9]* )? ) ( [eE] [-+]? [0-9]+ )?`` is a float, so ``1e6``
    needs neither a dot nor a signed exponent, unlike YAML 1.1."""

    @pytest.mark.parametrize("text, value", [
        ("1e6", 1e6), ("-2.5E-3", -2.5e-3), ("1e+06", 1e6), ("1.0e6", 1e6), ("+1E2", 100.0),
        ("1.e3", 1e3), (".5", 0.5)])
    def test_read_as_floats(self, tmp_path, text, value):
        data, _ = read_yaml(_write(tmp_path, f"link:\n  sample_rate_hz: {text}\n"))
        assert isinstance(data["link"]["sample_rate_hz"], float)
        assert data["link"]["sample_rate_hz"] == value

    @pytest.mark.parametrize("text, value", [
        ("7", 7), ("-3", -3), ("0x10", 16), ("1e", "1e"), ("e6", "e6"), ("1e6x", "1e6x"),
        (".inf", math.inf)])
    def test_other_scalars_keep_their_yaml_meaning(self, tmp_path, text, value):
        data, _ = read_yaml(_write(tmp_path, f"v: {text}\n"))
        assert data["v"] == value and type(data["v"]) is type(value)

    def test_a_config_with_exponents_loads(self, tmp_path):
        cfg = load_config(_write(tmp_path, "link:\n  sample_rate_hz: 1.92e6\n"
                                           "loading:\n  target_ser: 1e-7\n"))
        assert cfg.link.sample_rate_hz == 1.92e6 and cfg.loading.target_ser == 1e-7


def _driver_and_socket_sections():
    from brimline.daemon.net.publisher import MapPublisher, StatusPublisher
    from brimline.daemon.runtime.config import (
        IqSection,
        LinkSection,
        PublishSection,
        RadioSection,
        ReplaySection,
        SimSection,
        StatusSection,
    )
    from brimline.drivers.link.frame import make_plan
    from brimline.drivers.sources.iq import IqDriver
    from brimline.drivers.sources.radio import RadioDriver
    from brimline.drivers.sources.replay import ReplayDriver
    from brimline.drivers.sources.sim import SimDriver
    return [(PublishSection, MapPublisher), (StatusSection, StatusPublisher),
            (ReplaySection, ReplayDriver), (SimSection, SimDriver), (IqSection, IqDriver),
            (RadioSection, RadioDriver), (LinkSection, make_plan)]


def test_other_sections_default_as_their_constructors():
    """Sections whose keys are a constructor's keyword arguments keep its defaults (an empty
    list stands for the constructor's empty tuple); a key the constructor requires has no
    default in the section either."""
    for section, cls in _driver_and_socket_sections():
        params = inspect.signature(cls).parameters
        for key, field in section.model_fields.items():
            assert key in params, f"{section.__name__}.{key} is not a keyword of {cls.__name__}"
            default = params[key].default
            if default is inspect.Parameter.empty:
                assert field.is_required(), f"{section.__name__}.{key}"
                continue
            ours = field.get_default(call_default_factory=True)
            assert ours == (list(default) if isinstance(default, tuple) else default), \
                f"{section.__name__}.{key}: {ours!r} != {cls.__name__}'s {default!r}"

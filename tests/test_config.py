"""Config loading: every error is one line naming file, line, key path and value."""

import inspect
import math
import re
from pathlib import Path

import pytest

from brimline.daemon.core.change import ChangeControl
from brimline.daemon.core.estimator import Estimator
from brimline.daemon.errors import ConfigError
from brimline.daemon.runtime.config import (
    ChangeSection,
    EstimatorSection,
    apply_overrides,
    config_with,
    load_config,
    read_yaml,
)


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
        IqStreamSection,
        LinkSection,
        PublishSection,
        PushedSection,
        RadioSection,
        ReplaySection,
        SimSection,
        StatusSection,
    )
    from brimline.drivers.link.frame import make_plan
    from brimline.drivers.sources.iq import IqDriver
    from brimline.drivers.sources.iqstream import IqStreamDriver
    from brimline.drivers.sources.pushed import PushedDriver
    from brimline.drivers.sources.radio import RadioDriver
    from brimline.drivers.sources.replay import ReplayDriver
    from brimline.drivers.sources.sim import SimDriver
    return [(PublishSection, MapPublisher), (StatusSection, StatusPublisher),
            (ReplaySection, ReplayDriver), (SimSection, SimDriver), (IqSection, IqDriver),
            (RadioSection, RadioDriver), (LinkSection, make_plan),
            (PushedSection, PushedDriver), (IqStreamSection, IqStreamDriver)]


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


# --------------------------------------------------------------------------- the YAML loader

#: Nine levels of nine aliases: 9**9 (about 387 million) values once expanded, in 404 bytes of text.
ALIAS_BOMB = "".join(
    f"{name}: &{name} [{', '.join([f'*{prev}' if prev else 'x'] * 9)}]\n"
    for prev, name in zip(["", *"abcdefgh"], "abcdefghi"))


class TestGuardedLoader:
    def test_alias_bomb_is_refused_while_composing(self, tmp_path, monkeypatch):
        """The refusal comes from the structure (the expanded node count), before any object
        is constructed, so neither memory nor time is what stops it."""
        from brimline.daemon.runtime import config as config_module

        assert len(ALIAS_BOMB.encode()) < 420
        constructed = []
        monkeypatch.setattr(config_module.GuardedLoader, "construct_document",
                            lambda self, node: constructed.append(node))
        with pytest.raises(ConfigError, match=r"c.yaml line \d+: aliases expand this node to "
                                              r"more than 10000 values") as info:
            load_config(_write(tmp_path, ALIAS_BOMB))
        assert constructed == []
        assert info.value.__cause__ is None and not isinstance(info.value.__context__,
                                                               MemoryError)

    @pytest.mark.parametrize("text, match", [
        ("a: &a [*a]\n", r"line 1: alias \*a lies inside the node it names"),
        ("a: &a {b: *a}\n", r"line 1: alias \*a lies inside the node it names"),
        ("loading: &l\n  mode: rate\n  x: *l\n", r"line 3: alias \*l lies inside"),
        ("loading:\n  mode: rate\nloading:\n  mode: margin\n",
         r"line 3: duplicate key 'loading' \(first on line 1\)"),
        ("loading:\n  gap_db: 9.0\n  margin_db: 1.0\n  gap_db: 12.0\n",
         r"line 4: duplicate key 'gap_db' \(first on line 2\)"),
        ("a: " + "[" * 5000 + "]" * 5000 + "\n", r"line 1: nested deeper than 32 levels"),
        ("driver:\n  sim:\n    seed: " + "9" * 5000 + "\n", r"line 3: cannot read '9999"),
        ("service:\n  state_path: 2024-13-01\n", r"line 2: cannot read '2024-13-01'"),
        ("loading:\n  mode: rate\x00\n", r"line 2: YAML error: character #x0000 is not allowed"),
        ("a: *nope\n", r"line 1: YAML syntax error: found undefined alias 'nope'"),
    ])
    def test_refusals_are_one_line_with_the_line(self, tmp_path, text, match):
        with pytest.raises(ConfigError, match=match) as info:
            load_config(_write(tmp_path, text))
        assert "\n" not in str(info.value)

    def test_a_few_aliases_and_merge_keys_still_work(self, tmp_path):
        """YAML 1.1 merge keys (``<<``) may override the merged keys; that is no duplicate."""
        text = ("x-sim: &sim {snr_db: 20.0, seed: 3}\n"
                "driver:\n  sim:\n    <<: *sim\n    seed: 4\n")
        with pytest.raises(ConfigError, match="unknown key x-sim"):  # the anchor key itself
            load_config(_write(tmp_path, text))
        from brimline.daemon.runtime.config import read_yaml

        data, lines = read_yaml(_write(tmp_path, text))
        assert data["driver"]["sim"] == {"snr_db": 20.0, "seed": 4}
        assert lines[("driver", "sim", "seed")] == 5

    def test_oversized_file_is_refused_unread(self, tmp_path):
        from brimline.daemon.runtime.config import MAX_CONFIG_BYTES

        p = tmp_path / "big.yaml"
        p.write_text("#" * (MAX_CONFIG_BYTES + 1))
        with pytest.raises(ConfigError, match=r"too large for a config file"):
            load_config(p)
        (tmp_path / "zero.yaml").symlink_to("/dev/zero")  # endless: only the bound stops it
        with pytest.raises(ConfigError, match=r"zero.yaml: too large for a config file"):
            load_config(tmp_path / "zero.yaml")


# --------------------------------------------------------------------------- cross-field checks

_IQ = "driver:\n  kind: iq\n  iq:\n    path: rec\n"


@pytest.mark.parametrize("text, match", [
    # allowed bits against the link's largest constellation (link.max_bits)
    ("link:\n  max_bits: 6\nloading:\n  bits: [0, 2, 4, 6, 8]\n",
     r"line 4: loading.bits=\[0, 2, 4, 6, 8\]: go above link.max_bits=6"),
    # ports: TCP ports are 16-bit (RFC 793); 0 and * are ZeroMQ's "any free port"
    ("publish:\n  map_endpoint: tcp://127.0.0.1:70000\n",
     r"line 2: publish.map_endpoint='tcp://127.0.0.1:70000': .*\[0, 65535\]"),
    ("status:\n  endpoint: tcp://127.0.0.1:-1\n", r"line 2: status.endpoint='tcp://127.0.0.1:-1'"),
    ("publish:\n  snapshot_endpoint: tcp://127.0.0.1:http\n",
     r"line 2: publish.snapshot_endpoint='tcp://127.0.0.1:http'"),
    ("publish:\n  ack_endpoint: tcp://127.0.0.1\n", r"line 2: publish.ack_endpoint=.*needs host:port"),
    ("publish:\n  map_endpoint: tcp://127.0.0.1:7400\nstatus:\n  endpoint: tcp://127.0.0.1:7400\n",
     r"line 4: status.endpoint='tcp://127.0.0.1:7400': is also publish.map_endpoint"),
    # event windows
    ("driver:\n  sim:\n    events:\n      - {start_s: 5.0, stop_s: 2.0, first_tone: 1, last_tone: 9}\n",
     r"line 4: driver.sim.events.0.stop_s=2.0: stop_s=2.0 must be after start_s=5.0"),
    ("driver:\n  sim:\n    events:\n      - {start_s: 5.0, stop_s: 5.0, first_tone: 1, last_tone: 9}\n",
     r"driver.sim.events.0.stop_s=5.0"),
    ("driver:\n  sim:\n    events:\n      - {start_s: 1.0, first_tone: 300, last_tone: 400}\n",
     r"line 4: driver.sim.events.0.first_tone=\[300, 400\]: the faded band misses"),
    ("driver:\n  sim:\n    interferer_start_s: 4.0\n    interferer_stop_s: 1.0\n",
     r"line 4: driver.sim.interferer_stop_s=1.0"),
    # default bits: a constellation the link carries
    ("driver:\n  sim:\n    default_bits: 99\n", r"line 3: driver.sim.default_bits=99: .*link.max_bits=10"),
    ("driver:\n  sim:\n    default_bits: -1\n", r"line 3: driver.sim.default_bits=-1"),
    (_IQ + "    default_bits: 99\n", r"line 5: driver.iq.default_bits=99"),
    ("driver:\n  kind: radio\n  radio:\n    default_bits: 99\n", r"line 4: driver.radio.default_bits=99"),
    # counts
    ("driver:\n  sim:\n    max_frames: -1\n", r"line 3: driver.sim.max_frames=-1"),
    (_IQ + "    max_frames: 0\n", r"line 5: driver.iq.max_frames=0"),
    ("driver:\n  sim:\n    seed: -1\n", r"line 3: driver.sim.seed=-1"),
    ("driver:\n  kind: radio\n  radio:\n    buffer_frames: 0\n", r"driver.radio.buffer_frames=0"),
    ("driver:\n  sim:\n    lead_max_samples: 1000000000000\n",
     r"line 3: driver.sim.lead_max_samples=1000000000000: exceeds the samples of one frame"),
    # non-finite times and levels
    ("driver:\n  sim:\n    start_s: .nan\n", r"line 3: driver.sim.start_s=nan: .*finite"),
    ("driver:\n  sim:\n    start_s: .inf\n", r"driver.sim.start_s=inf"),
    (_IQ + "    start_s: .nan\n", r"line 5: driver.iq.start_s=nan"),
    ("driver:\n  sim:\n    events:\n      - {start_s: .nan, first_tone: 1, last_tone: 9}\n",
     r"line 4: driver.sim.events.0.start_s=nan"),
    ("driver:\n  sim:\n    events:\n      - {start_s: 1.0, stop_s: .nan, first_tone: 1, last_tone: 9}\n",
     r"driver.sim.events.0.stop_s=nan"),
    ("driver:\n  sim:\n    interferer_start_s: -.inf\n", r"driver.sim.interferer_start_s=-inf"),
    ("driver:\n  sim:\n    snr_db: .nan\n", r"driver.sim.snr_db=nan"),
    ("driver:\n  sim:\n    cfo_hz: .inf\n", r"driver.sim.cfo_hz=inf"),
    ("driver:\n  kind: radio\n  radio:\n    rx_gain_db: .nan\n", r"driver.radio.rx_gain_db=nan"),
    # an IQ path that can only be a folder
    ("driver:\n  kind: iq\n  iq:\n    path: .\n", r"line 4: driver.iq.path='.': .*names a folder"),
    ("driver:\n  kind: iq\n  iq:\n    path: ..\n", r"driver.iq.path='..'"),
    ("driver:\n  kind: iq\n  iq:\n    path: ''\n", r"driver.iq.path=''"),
    ("driver:\n  kind: iq\n  iq:\n    path: captures/\n", r"driver.iq.path='captures/'"),
    # the receiver's detection threshold range, (0, 1) (brimline.drivers.link.receiver.Receiver)
    ("driver:\n  sim:\n    sync_threshold: 1.5\n", r"line 3: driver.sim.sync_threshold=1.5"),
    (_IQ + "    sync_threshold: 0.0\n", r"line 5: driver.iq.sync_threshold=0.0"),
    ("driver:\n  kind: radio\n  radio:\n    sync_threshold: 2.0\n", r"driver.radio.sync_threshold=2.0"),
    # frequencies given as text
    ("link:\n  center_hz: '2.4 GHz'\n", r"line 2: link.center_hz='2.4 GHz'"),
    ("driver:\n  sim:\n    doppler_hz: fast\n", r"line 3: driver.sim.doppler_hz='fast'"),
])
def test_cross_field_and_value_checks_name_key_value_and_line(tmp_path, text, match):
    with pytest.raises(ConfigError, match=match) as info:
        load_config(_write(tmp_path, text))
    assert str(info.value).startswith(str(tmp_path / "c.yaml"))
    assert "\n" not in str(info.value)


@pytest.mark.parametrize("text", [
    "publish:\n  map_endpoint: tcp://127.0.0.1:0\n  snapshot_endpoint: tcp://127.0.0.1:0\n"
    "  ack_endpoint: tcp://127.0.0.1:0\nstatus:\n  endpoint: tcp://127.0.0.1:0\n",
    "publish:\n  map_endpoint: tcp://127.0.0.1:*\n  ack_endpoint: null\n",
    "publish:\n  map_endpoint: tcp://[::1]:7341\n",
    "driver:\n  sim:\n    events:\n      - {start_s: 1.0, stop_s: .inf, first_tone: 90, last_tone: 300}\n",
    "link:\n  max_bits: 8\nloading:\n  bits: [0, 2, 4, 6, 8]\ndriver:\n  sim:\n    default_bits: 8\n",
])
def test_edge_values_that_are_fine(tmp_path, text):
    load_config(_write(tmp_path, text))


class TestOverrides:
    """--set KEY=VALUE: applied to the YAML mapping before validation (config.apply_overrides)."""

    def test_typed_values_and_new_sections(self):
        data = {"estimator": {"tau_s": 1.0}}
        out, lines = apply_overrides(data, ["estimator.tau_s=2.5e-1", "loading.bits=[0, 2, 4]",
                                            "loading.gap_db=null", "change.down_deep_db=.inf"],
                                     {("estimator",): 1, ("estimator", "tau_s"): 2})
        assert data == {"estimator": {"tau_s": 1.0}}  # the input is not changed
        assert out["estimator"]["tau_s"] == 0.25 and out["loading"]["bits"] == [0, 2, 4]
        assert out["loading"]["gap_db"] is None and out["change"]["down_deep_db"] == float("inf")
        assert lines[("estimator", "tau_s")] == "--set estimator.tau_s=2.5e-1"
        assert lines[("estimator",)] == 1

    def test_errors_name_the_override_not_a_line(self, tmp_path):
        path = _write(tmp_path, "estimator:\n  tau_s: 1.0\n")
        with pytest.raises(ConfigError, match=r"^--set estimator.tau_s=0: estimator.tau_s=0: "):
            load_config(path, overrides=["estimator.tau_s=0"])
        with pytest.raises(ConfigError, match=r"^--set estimator=3: estimator=3: "):
            load_config(path, overrides=["estimator=3"])

    def test_later_override_wins_and_defaults_without_a_file(self):
        cfg = load_config(None, overrides=["estimator.tau_s=2", "estimator.tau_s=3"])
        assert cfg.estimator.tau_s == 3.0
        assert load_config(None).estimator == EstimatorSection()

    def test_config_with_revalidates(self, tmp_path):
        cfg = load_config(None)
        assert config_with(cfg, {"estimator.tau_s": 0.5}).estimator.tau_s == 0.5
        assert config_with(cfg, ()) is cfg
        with pytest.raises(ConfigError, match=r"--set fallback.power_db=9.0: fallback.power_db"):
            config_with(cfg, {"fallback.power_db": 9.0})


def test_a_path_under_the_home_folder(tmp_path, monkeypatch):
    """``~`` in a path key is the home folder (os.path.expanduser), not a folder named ``~``
    beside the config; other relative paths stay relative to the config file."""
    monkeypatch.setenv("HOME", str(tmp_path / "home"))
    cfg = load_config(_write(tmp_path, "service:\n  state_path: ~/.local/state/b/s.bin\n"
                                       "record:\n  path: rec.brlog\n"))
    assert cfg.service.state_path == str(tmp_path / "home" / ".local" / "state" / "b" / "s.bin")
    assert cfg.record.path == str(tmp_path / "rec.brlog")

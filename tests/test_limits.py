"""One home per value check: the limit tables that constructors and config sections share."""

from __future__ import annotations

import math

import pytest
from protocol_helpers import wifi_like_plan

from brimline.daemon.core.change import CHANGE_LIMITS, ChangeControl
from brimline.daemon.core.estimator import ESTIMATOR_LIMITS, Estimator
from brimline.daemon.core.loading import Loader
from brimline.daemon.errors import ConfigError, InputError, SourceError
from brimline.daemon.limits import (
    FINITE,
    NON_NEGATIVE,
    POSITIVE,
    Limit,
    at_least,
    between,
    check_db,
    check_values,
)
from brimline.daemon.net.follower import FOLLOWER_LIMITS, Follower
from brimline.daemon.net.publisher import (
    PUBLISH_LIMITS,
    STATUS_LIMITS,
    MapPublisher,
    StatusPublisher,
)
from brimline.daemon.runtime.config import (
    ChangeSection,
    EstimatorSection,
    PublishSection,
    ReplaySection,
    StatusSection,
    parse_section,
)
from brimline.daemon.wire.recording import RecordWriter
from brimline.drivers.sources.replay import REPLAY_LIMITS, ReplayDriver


def outside(limit: Limit) -> float:
    """A value just outside ``limit`` (below its low end, else above its high end, else NaN)."""
    if math.isfinite(limit.low):
        return limit.low if limit.low_open else limit.low - 1
    if math.isfinite(limit.high):
        return limit.high if limit.high_open else limit.high + 1
    return math.nan


class TestLimit:
    @pytest.mark.parametrize("value", [0.0, -1.0, math.nan, math.inf, -math.inf, "x"])
    def test_positive_refuses(self, value):
        assert POSITIVE.problem(value) is not None

    def test_positive_message_names_key_and_value(self):
        with pytest.raises(ValueError, match=r"^estimator.tau_s=-1 must be a positive finite "
                                             r"number$"):
            POSITIVE.check("estimator.tau_s", -1)

    def test_bounds_and_their_words(self):
        assert POSITIVE.check("k", 1e-300) == 1e-300
        assert NON_NEGATIVE.problem(0.0) is None and NON_NEGATIVE.problem(-1e-9) is not None
        assert FINITE.problem(-1e6) is None and FINITE.problem(math.inf) == "must be finite"
        frac = between(0, 1, low_open=True)
        assert frac.problem(1.0) is None and frac.problem(0.0) == "must be in (0, 1]"
        assert at_least(1).problem(0) == "must be >= 1"
        assert at_least(0, allow_inf=True).problem(math.inf) is None
        assert at_least(0, allow_inf=True).problem(-math.inf) is not None
        assert at_least(0).problem(math.inf) is not None

    def test_error_class_and_order(self):
        with pytest.raises(SourceError, match="a=0"):
            check_values({"b": 5, "a": 0}, {"a": POSITIVE, "b": POSITIVE}, error=SourceError)
        check_values({"a": 1}, {"a": POSITIVE, "b": POSITIVE})  # keys not given are not checked

    @pytest.mark.parametrize("value, match", [
        ("9.8", None), (math.nan, "must be finite"), (-math.inf, "must be finite"),
        (1000.0, r"1000.0 is beyond \+-300 dB"), ("loud", "must be a number in dB")])
    def test_db_settings(self, value, match):
        if match is None:
            assert check_db("gap_db", value) == 9.8
        else:
            with pytest.raises(InputError, match=match):
                check_db("gap_db", value, error=InputError)
        assert check_db("cap_db", math.inf, allow_pos_inf=True) == math.inf


def _loader():
    return Loader(bits=range(9), gap_db=9.8)


def _recording(tmp_path):
    path = tmp_path / "empty.brlog"
    with RecordWriter(path):
        pass
    return path


PLAN = wifi_like_plan()

# (config section name, section model, limit table, build the constructor with one keyword)
OWNERS = [
    ("estimator", EstimatorSection, ESTIMATOR_LIMITS, lambda tmp, **kw: Estimator(**kw)),
    ("change", ChangeSection, CHANGE_LIMITS,
     lambda tmp, **kw: ChangeControl(_loader(), **kw)),
    ("publish", PublishSection, PUBLISH_LIMITS, lambda tmp, **kw: MapPublisher(**kw)),
    ("status", StatusSection, STATUS_LIMITS, lambda tmp, **kw: StatusPublisher(**kw)),
    ("driver.replay", ReplaySection, REPLAY_LIMITS,
     lambda tmp, **kw: ReplayDriver(path=_recording(tmp), **kw)),
]
CASES = [(name, model, key, limit, build) for name, model, table, build in OWNERS
         for key, limit in table.items()]


@pytest.mark.parametrize("name, model, key, limit, build", CASES,
                         ids=[f"{c[0]}.{c[2]}" for c in CASES])
def test_constructor_and_config_refuse_the_same_value(tmp_path, name, model, key, limit, build):
    """A value outside a key's one limit is refused by the constructor (naming section.key and
    value) and by the config section (naming file, key and value) alike."""
    bad = outside(limit)
    with pytest.raises((ValueError, SourceError), match=rf"^{name}\.{key}={bad} "):
        build(tmp_path, **{key: bad})
    data = {"path": "x"} if model is ReplaySection else {}
    with pytest.raises(ConfigError, match=rf"^x.yaml: {name}\.{key}="):
        parse_section(model, {**data, key: bad}, where="x.yaml", name=name)


@pytest.mark.parametrize("key", list(FOLLOWER_LIMITS))
def test_follower_refuses_before_opening_sockets(key):
    with pytest.raises(ValueError, match=rf"^{key}=0 "):
        Follower(plan=PLAN, **{key: 0})


def test_rules_between_change_keys_hold_for_both():
    """The dwell order (upgrades no faster than downgrades) was a config-only rule once."""
    with pytest.raises(ValueError, match=r"change.up_dwell_s=0.05 must be >= "
                                         r"change.down_dwell_s=0.1"):
        ChangeControl(_loader(), up_dwell_s=0.05, down_dwell_s=0.1)
    with pytest.raises(ConfigError, match=r"up_dwell_s=0.05 must be >= down_dwell_s=0.1"):
        parse_section(ChangeSection, {"up_dwell_s": 0.05}, where="x.yaml", name="change")


def test_docstring_examples():
    """The examples in the module's docstring run and print what they say."""
    import doctest

    from brimline.daemon import limits

    result = doctest.testmod(limits)
    assert result.attempted >= 3 and result.failed == 0

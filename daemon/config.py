"""Daemon configuration: YAML in, frozen validated section objects out.

Validation uses pydantic (strict types, unknown keys rejected) and every error becomes one
:class:`~brimline.daemon.errors.ConfigError` line that names the file, the line, the key path
and the offending value, e.g.::

    config/demo.yaml line 12: loading.gap_db='9.8': Input should be a valid number

Each section is a frozen model; the code that owns a section's meaning documents its keys in the
model's field descriptions. Cross-section checks live in ``Config``'s validators.
"""

from __future__ import annotations

import math
from pathlib import Path
from typing import Any, Literal, Optional

import yaml
from pydantic import (BaseModel, ConfigDict, Field, ValidationError, field_validator,
                      model_validator)

from brimline.daemon.errors import ConfigError

__all__ = [
    "Section",
    "LoadingSection",
    "DriverSection",
    "ReplaySection",
    "FallbackSection",
    "ServiceSection",
    "Config",
    "KeyProblem",
    "load_config",
    "read_yaml",
    "parse_section",
]


class Section(BaseModel):
    """Base of every config section: frozen, strict types, unknown keys rejected."""

    model_config = ConfigDict(extra="forbid", frozen=True, strict=True)


# --------------------------------------------------------------------------- loading


class LoadingSection(Section):
    """``loading:`` how per-tone SNR becomes bits and power."""

    mode: Literal["rate", "margin", "waterfill"] = Field(
        "rate", description="rate: most bits in the budget; margin: target_bits with most margin")
    bits: list[int] = Field(
        default_factory=lambda: list(range(0, 9)),
        description="allowed bits per tone, ascending, starting at 0")
    gap_db: Optional[float] = Field(
        None, description="SNR gap in dB; when absent it follows from target_ser")
    target_ser: float = Field(1e-7, description="target symbol error rate for the uncoded gap")
    coding_gain_db: float = Field(0.0, description="coding gain subtracted from the gap, dB")
    margin_db: float = Field(3.0, description="target noise margin added to the gap, dB")
    budget_db: float = Field(0.0, description="total power relative to N tones at nominal, dB")
    cap_db: float = Field(math.inf, description="per-tone power ceiling relative to nominal, dB")
    target_bits: Optional[int] = Field(None, description="bits per symbol for mode: margin")

    @field_validator("bits")
    @classmethod
    def _bits_ok(cls, v: list[int]) -> list[int]:
        if not v or v[0] != 0 or any(b <= a for a, b in zip(v, v[1:])) or v[-1] > 15:
            raise ValueError(f"bits={v} must be ascending, start at 0 and stay <= 15")
        return v

    @field_validator("target_ser")
    @classmethod
    def _ser_ok(cls, v: float) -> float:
        if not 0.0 < v < 0.5:
            raise ValueError(f"target_ser={v} must be in (0, 0.5)")
        return v


# --------------------------------------------------------------------------- link and drivers
# Each driver subsection's fields are exactly that driver's constructor keyword arguments.


class LinkSection(Section):
    """``link:`` tone plan and frame format (see brimline.drivers.ofdm)."""


class SimSection(Section):
    """``driver.sim:`` the simulated link (brimline.drivers.sim)."""


class IqSection(Section):
    """``driver.iq:`` recorded IQ through the receiver DSP (brimline.drivers.iq)."""


class RadioSection(Section):
    """``driver.radio:`` a pyadi-iio radio (brimline.drivers.iio)."""


class ReplaySection(Section):
    """``driver.replay:`` a recorded estimate log (brimline.drivers.replay).

    A relative ``path`` is taken relative to the config file's folder by :func:`load_config`.
    """

    path: str = Field(description="estimate recording to replay (relative: to the config file)")
    realtime: bool = Field(False, description="pace frames by their recorded time_s")
    speed: float = Field(1.0, description="pacing factor when realtime (2.0 = twice as fast)")
    loop: bool = Field(False, description="start again at the end (times keep increasing)")

    @field_validator("speed")
    @classmethod
    def _speed_ok(cls, v: float) -> float:
        if not (math.isfinite(v) and v > 0):
            raise ValueError(f"speed={v} must be a positive number")
        return v


class DriverSection(Section):
    """``driver:`` which source of estimates runs, and its settings.

    ``kind`` names the subsection that configures the source; that subsection must be present
    (``sim`` has defaults, the others need at least their required keys).
    """

    kind: Literal["sim", "iq", "radio", "replay"] = Field(
        "sim", description="source of estimates: sim, iq (SigMF IQ), radio, replay")
    sim: SimSection = Field(default_factory=SimSection)
    iq: Optional[IqSection] = None
    radio: Optional[RadioSection] = None
    replay: Optional[ReplaySection] = None

    @model_validator(mode="after")
    def _kind_has_section(self) -> "DriverSection":
        if getattr(self, self.kind) is None:
            raise KeyProblem(("kind",), self.kind,
                             f"needs a driver.{self.kind} section with its settings")
        return self

    def selected(self) -> Section:
        """The subsection named by ``kind``."""
        return getattr(self, self.kind)


# --------------------------------------------------------------------------- estimator, change


class EstimatorSection(Section):
    """``estimator:`` per-tone SNR tracking (brimline.daemon.estimator)."""


class ChangeSection(Section):
    """``change:`` change control: margins, dwell times, bit swaps, emergency."""


# --------------------------------------------------------------------------- publish, status, record


class PublishSection(Section):
    """``publish:`` map, snapshot, heartbeat and acknowledgement sockets."""


class StatusSection(Section):
    """``status:`` the operators' status stream."""


class RecordSection(Section):
    """``record:`` what the daemon records, and where."""


# --------------------------------------------------------------------------- whole file


class FallbackSection(Section):
    """``fallback:`` the safe map sent when estimates go stale (owned by the service).

    The fallback map loads every data tone with the same ``bits`` at the same ``power_db``; it
    must be a map the loader itself could make (bits from ``loading.bits``, power within
    ``loading.cap_db`` and, summed over the tones, within ``loading.budget_db``).
    """

    stale_after_s: float = Field(
        1.0, description="send the fallback map when no valid estimate came for this long, s")
    bits: int = Field(2, description="bits on every data tone of the fallback map")
    power_db: float = Field(0.0, description="power on every data tone relative to nominal, dB")

    @field_validator("stale_after_s")
    @classmethod
    def _stale_ok(cls, v: float) -> float:
        if not (math.isfinite(v) and v > 0):
            raise ValueError(f"stale_after_s={v} must be a positive number of seconds")
        return v

    @field_validator("power_db")
    @classmethod
    def _power_ok(cls, v: float) -> float:
        if not math.isfinite(v):
            raise ValueError(f"power_db={v} must be finite")
        return v


class ServiceSection(Section):
    """``service:`` how the daemon loop runs (brimline.daemon.service)."""

    lead_frames: int = Field(
        4, description="a new map takes effect this many frames after the last frame seen")
    clock: Literal["auto", "source", "monotonic"] = Field(
        "auto", description="time fed to estimator and change control: source = the estimates' "
        "time_s, monotonic = the daemon's clock; auto = monotonic for radio, source otherwise")
    state_path: Optional[str] = Field(
        None, description="file keeping epoch, sequence and last map across restarts "
        "(relative: to the config file); none keeps no state")
    poll_s: float = Field(0.05, description="longest wait of one main-loop poll, s")
    driver_join_s: float = Field(2.0, description="wait for the driver thread at shutdown, s")

    @field_validator("lead_frames")
    @classmethod
    def _lead_ok(cls, v: int) -> int:
        if not 0 <= v <= 10_000:
            raise ValueError(f"lead_frames={v} must be in [0, 10000]")
        return v

    @field_validator("poll_s", "driver_join_s")
    @classmethod
    def _positive_s(cls, v: float, info) -> float:
        if not (math.isfinite(v) and v > 0):
            raise ValueError(f"{info.field_name}={v} must be a positive number of seconds")
        return v


class KeyProblem(ValueError):
    """A cross-section check failed at ``loc`` (key path inside the model) with ``value``."""

    def __init__(self, loc: tuple[str, ...], value: Any, msg: str) -> None:
        super().__init__(msg)
        self.loc = tuple(loc)
        self.value = value
        self.msg = msg


class Config(Section):
    """The whole daemon config. Sections not written in the file take their defaults."""

    link: LinkSection = Field(default_factory=LinkSection)
    driver: DriverSection = Field(default_factory=DriverSection)
    estimator: EstimatorSection = Field(default_factory=EstimatorSection)
    loading: LoadingSection = Field(default_factory=LoadingSection)
    change: ChangeSection = Field(default_factory=ChangeSection)
    publish: PublishSection = Field(default_factory=PublishSection)
    status: StatusSection = Field(default_factory=StatusSection)
    record: RecordSection = Field(default_factory=RecordSection)
    fallback: FallbackSection = Field(default_factory=FallbackSection)
    service: ServiceSection = Field(default_factory=ServiceSection)

    @model_validator(mode="after")
    def _fallback_fits_loading(self) -> "Config":
        fb, ld = self.fallback, self.loading
        if fb.bits not in ld.bits:
            raise KeyProblem(("fallback", "bits"), fb.bits,
                             f"is not one of loading.bits={list(ld.bits)}")
        if fb.bits == 0:
            raise KeyProblem(("fallback", "bits"), fb.bits, "a fallback map must carry data")
        if fb.power_db > ld.cap_db + 1e-9:
            raise KeyProblem(("fallback", "power_db"), fb.power_db,
                             f"exceeds the per-tone ceiling loading.cap_db={ld.cap_db}")
        # Uniform power on all N tones sums to N * 10^(p/10); the budget is N * 10^(b/10).
        if fb.power_db > ld.budget_db + 1e-9:
            raise KeyProblem(("fallback", "power_db"), fb.power_db,
                             f"on every tone exceeds the total budget loading.budget_db="
                             f"{ld.budget_db}")
        return self


# --------------------------------------------------------------------------- machinery


def _key_lines(node: yaml.Node, prefix: tuple = ()) -> dict[tuple, int]:
    """Map each key path in a composed YAML tree to its 1-based line number."""
    lines: dict[tuple, int] = {}
    if isinstance(node, yaml.MappingNode):
        for key_node, value_node in node.value:
            path = prefix + (str(key_node.value),)
            lines[path] = key_node.start_mark.line + 1
            lines.update(_key_lines(value_node, path))
    elif isinstance(node, yaml.SequenceNode):
        for i, item in enumerate(node.value):
            lines[prefix + (str(i),)] = item.start_mark.line + 1
            lines.update(_key_lines(item, prefix + (str(i),)))
    return lines


def read_yaml(path: str | Path) -> tuple[dict, dict[tuple, int]]:
    """Read a YAML mapping from ``path``; return it with a key-path -> line table.

    Raises
    ------
    ConfigError
        Missing file, a directory, unreadable text, a YAML syntax error (with its line) or a
        top level that is not a mapping.
    """
    p = Path(path)
    try:
        text = p.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise ConfigError(f"{p}: no such config file") from None
    except IsADirectoryError:
        raise ConfigError(f"{p}: is a directory, not a config file") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise ConfigError(f"{p}: cannot read config: {exc}") from exc
    try:
        node = yaml.compose(text, Loader=yaml.SafeLoader)
        data = yaml.safe_load(text)
    except yaml.MarkedYAMLError as exc:
        mark = exc.problem_mark or exc.context_mark
        line = f" line {mark.line + 1}" if mark is not None else ""
        raise ConfigError(f"{p}{line}: YAML syntax error: {exc.problem or exc}") from exc
    except yaml.YAMLError as exc:
        raise ConfigError(f"{p}: YAML error: {exc}") from exc
    if data is None:
        data = {}
    if not isinstance(data, dict):
        raise ConfigError(f"{p}: top level must be a mapping of sections, got "
                          f"{type(data).__name__}")
    return data, (_key_lines(node) if node is not None else {})


def _at(where: str, lines: dict[tuple, int], loc: tuple) -> str:
    """``where`` plus the line of the deepest key of ``loc`` that exists in the file."""
    for n in range(len(loc), 0, -1):
        line = lines.get(loc[:n])
        if line is not None:
            return f"{where} line {line}"
    return where


def _explain(exc: ValidationError, where: str, lines: dict[tuple, int],
             prefix: tuple = ()) -> ConfigError:
    err = exc.errors()[0]
    loc = prefix + tuple(str(x) for x in err["loc"])
    problem = (err.get("ctx") or {}).get("error")
    if isinstance(problem, KeyProblem):  # a model-level check that knows its key
        loc = loc + problem.loc
        at = _at(where, lines, loc)
        return ConfigError(f"{at}: {'.'.join(loc)}={problem.value!r}: {problem.msg}")
    key = ".".join(loc) if loc else "(top level)"
    at = _at(where, lines, loc)
    msg = err["msg"].removeprefix("Value error, ")
    if err["type"] == "extra_forbidden":
        return ConfigError(f"{at}: unknown key {key}")
    if err["type"] == "missing":
        return ConfigError(f"{at}: missing key {key}")
    return ConfigError(f"{at}: {key}={err.get('input')!r}: {msg}")


def parse_section(model: type[Section], data: Any, *, where: str, name: str,
                  lines: dict[tuple, int] | None = None) -> Section:
    """Validate one section's mapping into ``model``; errors name ``name.key``."""
    if data is None:
        data = {}
    if not isinstance(data, dict):
        raise ConfigError(f"{where}: {name} must be a mapping, got {type(data).__name__}")
    try:
        return model.model_validate(data)
    except ValidationError as exc:
        raise _explain(exc, where, lines or {}, (name,)) from None


def load_config(path: str | Path) -> Config:
    """Read and validate a daemon config file.

    Parameters
    ----------
    path : str or Path
        YAML file with the sections of :class:`Config`.

    Returns
    -------
    Config
        Frozen, validated configuration.

    Raises
    ------
    ConfigError
        One line naming the file, line, key path and value of the first problem.
    """
    data, lines = read_yaml(path)
    try:
        config = Config.model_validate(data)
    except ValidationError as exc:
        raise _explain(exc, str(path), lines) from None
    return _resolve_paths(config, Path(path).parent)


def _resolve_paths(config: Config, base: Path) -> Config:
    """Make the service's relative file paths relative to the config file's folder."""

    def rebase(value: str | None) -> str | None:
        if value is None or Path(value).is_absolute():
            return value
        return str(base / value)

    driver = config.driver
    if driver.replay is not None:
        driver = driver.model_copy(update={
            "replay": driver.replay.model_copy(update={"path": rebase(driver.replay.path)})})
    service = config.service.model_copy(update={"state_path": rebase(config.service.state_path)})
    return config.model_copy(update={"driver": driver, "service": service})

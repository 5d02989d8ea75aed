"""Sweeps over a campaign: every (recording, setting) replay as a task on ``dask.distributed``.

A sweep takes recordings (estimate recordings or SigMF IQ captures), a base config and a grid of
settings (``KEY=V1,V2`` for dotted config keys; the grid is their Cartesian product) and runs one
task per (recording, setting): the recording replayed offline under the config with that
setting, returning the replay's summary figures. Tasks run on a ``dask.distributed`` cluster:
a :class:`distributed.LocalCluster` of worker *processes* (one thread each: the work is numpy
and Python that holds the GIL, so threads would not run in parallel) or an existing scheduler's
address for a real cluster. Results come back as they finish; a task that fails is reported
with its recording and setting and does not stop the others.

``dask[distributed]`` is an optional extra (``pip install 'brimline[sweep]'``), imported inside
:func:`run_sweep`; without it the sweep stops with one line saying how to install it.

One mechanism
-------------
A sweep has no override or replay code of its own. A grid value is read by the config's own
override parser (:func:`~brimline.daemon.runtime.config.parse_override`), a setting is applied
by :func:`~brimline.daemon.runtime.config.config_with` (the config's validation and messages),
and a task is :func:`~brimline.daemon.runtime.offline.replay_offline`, the engine of ``brimline
replay``: the same recording and setting give a sweep row the same figures as that replay's
summary.

The task function
-----------------
:func:`replay_summary` is the task: ``replay_offline(config, recording, overrides=setting)``
and the summary's figures as a plain dict. It runs in worker processes, so its arguments (a
:class:`~brimline.daemon.runtime.config.Config`, a path, a dict) and its result are picklable,
and it is found by name (``brimline.daemon.runtime.sweep.replay_summary``): the workers need
brimline installed. Another task function with the same call
``task(config, recording, setting) -> dict`` can be given to :func:`run_sweep`.
"""

from __future__ import annotations

import dataclasses
import itertools
import logging
import uuid
from dataclasses import dataclass, field
from typing import Any, Callable, Iterable, Mapping, Sequence

from brimline.daemon.errors import BrimlineError, InputError
from brimline.daemon.runtime.config import Config, parse_override
from brimline.daemon.runtime.offline import replay_offline

__all__ = ["INSTALL_HINT", "TaskResult", "parse_grid", "grid_settings", "replay_summary",
           "run_sweep", "summary_columns", "flat_summary"]

log = logging.getLogger("brimline.sweep")

INSTALL_HINT = "install with pip install 'brimline[sweep]'"


@dataclass(frozen=True)
class TaskResult:
    """What one (recording, setting) task gave.

    Attributes
    ----------
    recording : str
        The recording's path as given.
    setting : dict
        Dotted config key -> value of this task.
    summary : dict or None
        The task's figures (None when it failed).
    error : str or None
        One line naming the failure (None when it succeeded).
    """

    recording: str
    setting: dict = field(default_factory=dict)
    summary: dict | None = None
    error: str | None = None

    @property
    def ok(self) -> bool:
        """True when the task succeeded."""
        return self.error is None

    def label(self) -> str:
        """``RECORDING KEY=VALUE ...`` for messages."""
        setting = " ".join(f"{k}={v}" for k, v in self.setting.items())
        return f"{self.recording} {setting}".strip()


# --------------------------------------------------------------------------- the grid


def parse_grid(items: Sequence[str]) -> dict[str, list]:
    """``["KEY=V1,V2", ...]`` -> ``{KEY: [v1, v2], ...}``.

    Each ``KEY=V`` is read by the config's override parser
    (:func:`~brimline.daemon.runtime.config.parse_override`: the value as YAML 1.2 reads it,
    ``0.5``, ``1e-3``, ``true``, ``rate``); whether the key exists and the value is allowed is
    the config's to say when the setting is applied (:func:`~brimline.daemon.runtime.config.
    config_with`).

    Raises
    ------
    InputError
        An item without ``=``, an empty key or value list, a key given twice.
    ConfigError
        A malformed key or a value YAML cannot read (the config's message).
    """
    grid: dict[str, list] = {}
    for item in items:
        key, eq, values = item.partition("=")
        key = key.strip()
        if not eq or not key or not values.strip():
            raise InputError(f"--grid {item!r}: expected KEY=V1,V2,... (a dotted config key "
                             f"such as change.hysteresis_db)")
        if key in grid:
            raise InputError(f"--grid {key}: given twice; list every value in one --grid")
        grid[key] = [parse_override(f"{key}={v.strip()}")[1] for v in values.split(",")]
    return grid


def grid_settings(grid: Mapping[str, Sequence]) -> list[dict]:
    """Every combination of the grid's values, in order (one empty setting for no grid)."""
    keys = list(grid)
    return [dict(zip(keys, combo)) for combo in itertools.product(*(grid[k] for k in keys))]


# --------------------------------------------------------------------------- the task


def replay_summary(config: Config, recording: str, setting: Mapping[str, Any]) -> dict:
    """Replay one recording offline under ``config`` with ``setting``; its summary figures.

    Parameters
    ----------
    config : Config
        The base configuration (its ``driver.iq`` settings other than ``path`` apply to a
        SigMF capture).
    recording : str
        An estimate recording or a SigMF capture.
    setting : dict
        Dotted config key -> value, applied by
        :func:`~brimline.daemon.runtime.config.config_with`.

    Returns
    -------
    dict
        The fields of :class:`~brimline.daemon.runtime.offline.OfflineSummary` (``frames``,
        ``accepted``, ``rejected`` and ``maps_by_kind`` by reason, ``maps``,
        ``changes_per_min``, ``rate_mean_bits``, ``margin_mean_db``, ``live_margin_min_db``,
        ``time_below_target_s``, ...), plain values.

    Raises
    ------
    BrimlineError
        The setting (the config's message) or the recording is refused (one line naming it).
    """
    result = replay_offline(config, recording, overrides=dict(setting))
    return dataclasses.asdict(result.summary)


# --------------------------------------------------------------------------- the cluster


def _load_distributed():
    try:
        # optional extra [sweep]; imported here so the rest of brimline runs without it
        from dask import distributed
    except ImportError as exc:
        raise BrimlineError(f"brimline sweep needs dask.distributed ({exc.name} is missing): "
                            f"{INSTALL_HINT}") from None
    return distributed


def _one_line(exc: BaseException) -> str:
    text = " ".join(str(exc).split())
    return text if isinstance(exc, BrimlineError) else f"{type(exc).__name__}: {text}"


def run_sweep(config: Config, recordings: Sequence[str], settings: Sequence[Mapping[str, Any]],
              *, workers: int = 2, scheduler: str | None = None,
              task: Callable[[Config, str, Mapping[str, Any]], dict] = replay_summary,
              on_result: Callable[[TaskResult], None] | None = None,
              connect_timeout_s: float = 30.0, client=None) -> list[TaskResult]:
    """Run every (recording, setting) task on a Dask cluster; results in grid order.

    Parameters
    ----------
    config : Config
        The base configuration.
    recordings : sequence of str
        Recordings to replay.
    settings : sequence of dict
        The settings (:func:`grid_settings`).
    workers : int
        Worker processes of the local cluster (ignored with ``scheduler``).
    scheduler : str or None
        Address of an existing scheduler (``tcp://host:8786``); None starts a local cluster.
    task : callable
        ``task(config, recording, setting) -> dict``, importable by name on the workers.
    on_result : callable or None
        Called with each :class:`TaskResult` as it arrives (progress).
    connect_timeout_s : float
        How long to wait for the scheduler.
    client : distributed.Client or None
        An existing client to use instead (``workers`` and ``scheduler`` are then ignored, and
        the client stays open): benchmarks and tools that run several sweeps on one cluster.

    Returns
    -------
    list of TaskResult
        One per (recording, setting), recordings outer, settings inner.

    Raises
    ------
    BrimlineError
        dask.distributed is not installed, ``workers`` is below 1, or the scheduler cannot be
        reached.
    """
    if scheduler is None and client is None and workers < 1:
        raise InputError(f"--workers={workers} must be >= 1")
    distributed = _load_distributed()
    pairs = [(str(rec), dict(setting)) for rec in recordings for setting in settings]
    if not pairs:
        return []
    if client is not None:
        return _collect(distributed, client, config, pairs, task, on_result)
    try:
        if scheduler is None:
            cluster = distributed.LocalCluster(
                n_workers=workers, threads_per_worker=1, processes=True,
                dashboard_address=None, silence_logs=logging.ERROR,
                host="127.0.0.1")
        else:
            cluster = None
    except (OSError, RuntimeError) as exc:
        raise BrimlineError(f"cannot start a local Dask cluster of {workers} workers: "
                            f"{_one_line(exc)}") from exc
    try:
        try:
            client = distributed.Client(cluster if cluster is not None else scheduler,
                                        timeout=f"{connect_timeout_s}s")
        except (OSError, TimeoutError, ValueError) as exc:
            raise BrimlineError(f"--scheduler {scheduler}: cannot connect: "
                                f"{_one_line(exc)}") from exc
        with client:
            return _collect(distributed, client, config, pairs, task, on_result)
    finally:
        if cluster is not None:
            cluster.close()


def _collect(distributed, client, config, pairs, task, on_result) -> list[TaskResult]:
    # The config goes to the workers once, not once per task. Keys are unique per sweep so that
    # two sweeps on one client never share (and release) each other's data.
    run_id = uuid.uuid4().hex[:12]
    config_future = client.scatter(config, broadcast=True, hash=False)
    futures = [client.submit(task, config_future, rec, setting, pure=False,
                             key=f"brimline-sweep-{run_id}-{i}")
               for i, (rec, setting) in enumerate(pairs)]
    index = {fut.key: i for i, fut in enumerate(futures)}
    results: list[TaskResult | None] = [None] * len(pairs)
    for fut in distributed.as_completed(futures):
        i = index[fut.key]
        rec, setting = pairs[i]
        try:
            result = TaskResult(rec, setting, summary=dict(fut.result()))
        except Exception as exc:  # noqa: BLE001 - any task's failure is reported, not raised
            result = TaskResult(rec, setting, error=_one_line(exc))
        results[i] = result
        if on_result is not None:
            on_result(result)
    return [r for r in results if r is not None]


def flat_summary(summary: Mapping[str, Any] | None) -> dict[str, Any]:
    """A task's figures with nested dicts spread into ``key.sub`` entries (for one table row).

    A task may return counts by reason as a dict (``{"rejected": {"outlier": 3}}``); the table
    gets a column ``rejected.outlier``.
    """
    out: dict[str, Any] = {}
    for key, value in (summary or {}).items():
        if isinstance(value, Mapping):
            for sub, inner in flat_summary(value).items():
                out[f"{key}.{sub}"] = inner
        else:
            out[key] = value
    return out


def summary_columns(results: Iterable[TaskResult]) -> list[str]:
    """Table columns of the tasks' figures (:func:`flat_summary`), in first-seen order."""
    seen: dict[str, None] = {}
    for r in results:
        for k in flat_summary(r.summary):
            seen.setdefault(k)
    return list(seen)

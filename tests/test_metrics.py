"""The Prometheus endpoint: scraped over loopback and read with the client library's own parser
(``prometheus_client.parser.text_string_to_metric_families``), so the names, types and label
sets are what the exposition format and its conventions (``_total`` counters, base units) say,
and the values are those of the status message the service published.
"""

from __future__ import annotations

import time
import urllib.request

import pytest

prometheus_client = pytest.importorskip("prometheus_client")
from _service_fakes import ScriptedDriver, loopback_config  # noqa: E402
from prometheus_client.parser import text_string_to_metric_families  # noqa: E402

from brimline.daemon.errors import ConfigError  # noqa: E402
from brimline.daemon.net.metrics import MetricsEndpoint  # noqa: E402
from brimline.daemon.runtime.config import Config  # noqa: E402
from brimline.daemon.runtime.service import Service  # noqa: E402
from brimline.daemon.runtime.status import ALARMS, build_status  # noqa: E402
from brimline.drivers.link.frame import make_plan  # noqa: E402


def scrape(url: str) -> dict:
    """``{family name: family}`` of one scrape (a generous timeout only catches a hang)."""
    with urllib.request.urlopen(url, timeout=10.0) as reply:
        text = reply.read().decode("utf-8")
    return {f.name: f for f in text_string_to_metric_families(text)}


def samples(family) -> dict:
    """``{(sample name, sorted label items): value}``."""
    return {(s.name, tuple(sorted(s.labels.items()))): s.value for s in family.samples}


def a_status(**extra) -> dict:
    frames = {"received": 120, "accepted": 110, "rejected": {"stale": 4, "plan": 6},
              "decode_errors": 2, "last_frame": 119, "tracking": {"tone_outliers": 3}}
    return build_status(time_s=12.5, epoch="ab12", driver={"name": "sim", "state": "running",
                                                           "counters": {"frames": 121}},
                        frames=frames, estimate_age_s=0.25, tone_index=None, snr_db=None,
                        maps_published={"initial": 1, "upgrade": 2},
                        acks={"followers": {"seq": 3, "age_s": 0.5}}, **extra)


class TestEndpoint:
    def test_before_the_first_status_only_up_is_zero(self):
        with MetricsEndpoint(port=0) as ep:
            got = scrape(ep.url)
        assert list(got) == ["brimline_up"] and got["brimline_up"].samples[0].value == 0.0

    def test_scrape_matches_the_status_message(self):
        """Exposition format (prometheus.io "Exposition formats"; naming: "Metric and label
        naming"): counters carry ``_total``, times are ``_seconds``, one family per quantity."""
        st = a_status(stale=True)
        with MetricsEndpoint(host="127.0.0.1", port=0, alarms=ALARMS) as ep:
            assert ep.url.startswith("http://127.0.0.1:")
            ep.update(st)
            got = scrape(ep.url)
        assert got["brimline_up"].samples[0].value == 1.0
        assert got["brimline_frames_received"].type == "counter"
        assert samples(got["brimline_frames_received"]) == {
            ("brimline_frames_received_total", ()): 120.0}
        assert samples(got["brimline_frames_accepted"]) == {
            ("brimline_frames_accepted_total", ()): 110.0}
        assert samples(got["brimline_decode_errors"]) == {
            ("brimline_decode_errors_total", ()): 2.0}
        assert samples(got["brimline_frames_rejected"]) == {
            ("brimline_frames_rejected_total", (("reason", "plan"),)): 6.0,
            ("brimline_frames_rejected_total", (("reason", "stale"),)): 4.0}
        assert samples(got["brimline_maps_published"]) == {
            ("brimline_maps_published_total", (("kind", "initial"),)): 1.0,
            ("brimline_maps_published_total", (("kind", "upgrade"),)): 2.0}
        assert samples(got["brimline_estimator_events"]) == {
            ("brimline_estimator_events_total", (("counter", "tone_outliers"),)): 3.0}
        assert samples(got["brimline_driver_events"]) == {
            ("brimline_driver_events_total", (("counter", "frames"),)): 121.0}
        assert got["brimline_estimate_age_seconds"].type == "gauge"
        assert got["brimline_estimate_age_seconds"].samples[0].value == 0.25
        assert got["brimline_last_frame"].samples[0].value == 119.0
        assert "brimline_sample_clock_offset_ppm" not in got  # the simulator measures none
        state = samples(got["brimline_driver_state"])
        assert state[("brimline_driver_state", (("state", "running"),))] == 1.0
        assert sum(state.values()) == 1.0
        assert samples(got["brimline_follower_ack_seq"]) == {
            ("brimline_follower_ack_seq", (("follower", "followers"),)): 3.0}
        assert samples(got["brimline_follower_ack_age_seconds"]) == {
            ("brimline_follower_ack_age_seconds", (("follower", "followers"),)): 0.5}
        alarms = samples(got["brimline_alarm"])
        assert {k[1][0][1] for k in alarms} == set(ALARMS)
        assert {k[1][0][1] for k, v in alarms.items() if v == 1.0} == {"stale", "no_map"}
        # no map yet: no map gauges rather than invented zeros
        assert not {"brimline_map_bits", "brimline_map_margin_decibels"} & set(got)
        assert samples(got["brimline_daemon_epoch"]) == {
            ("brimline_daemon_epoch", (("epoch", "ab12"),)): 1.0}

    def test_the_radios_sample_clock_offset_is_a_gauge(self):
        st = a_status()
        st["driver"]["clock_offset_ppm"] = 49.96
        with MetricsEndpoint(host="127.0.0.1", port=0, alarms=ALARMS) as ep:
            ep.update(st)
            got = scrape(ep.url)
        fam = got["brimline_sample_clock_offset_ppm"]
        assert fam.type == "gauge" and fam.samples[0].value == 49.96

    def test_close_is_idempotent_and_releases_the_port(self):
        ep = MetricsEndpoint(port=0)
        port = ep.port
        ep.close()
        ep.close()
        with pytest.raises(RuntimeError, match="closed"):
            ep.update({})
        with MetricsEndpoint(port=port) as again:  # the port is free again
            assert again.port == port

    def test_a_taken_port_is_one_line(self):
        with MetricsEndpoint(port=0) as ep:
            with pytest.raises(ConfigError, match=rf"127\.0\.0\.1:{ep.port}: cannot bind"):
                MetricsEndpoint(port=ep.port)

    def test_port_out_of_range(self):
        with pytest.raises(ValueError, match="metrics.port=70000"):
            MetricsEndpoint(port=70000)


class TestConfig:
    def test_defaults_loopback_and_off(self):
        section = Config().metrics
        assert (section.enabled, section.host, section.port) == (False, "127.0.0.1", 7349)

    @pytest.mark.parametrize("metrics, match", [
        ({"port": 70000}, "port=70000"),
        ({"host": "127.0.0.1/24"}, "host="),
        ({"enabled": "yes please"}, "enabled"),
    ])
    def test_bad_values(self, metrics, match):
        with pytest.raises(ValueError, match=match):
            Config.model_validate({"metrics": metrics})


class TestService:
    def test_service_feeds_the_status_it_publishes(self):
        """The daemon's endpoint shows the counters of the status message it last published."""
        cfg = loopback_config(metrics={"enabled": True, "port": 0})
        plan = make_plan(**cfg.link.model_dump())
        with Service(cfg, driver=ScriptedDriver(plan, frames=40)) as svc:
            url = svc.endpoints["metrics"]
            deadline = time.monotonic() + 20.0  # only catches a hang
            while time.monotonic() < deadline:
                svc.step(0.005)
                st = svc.last_status
                if st is not None and st["frames"]["received"] == 40 and st["map"] is not None:
                    break
            svc.publish_status()
            st = svc.last_status
            got = scrape(url)
        assert got["brimline_frames_received"].samples[0].value == st["frames"]["received"] == 40
        assert got["brimline_map_bits"].samples[0].value == st["rate"]["bits_per_symbol"] > 0
        assert got["brimline_map_seq"].samples[0].value == st["map"]["seq"]
        assert got["brimline_map_rate_bits_per_second"].samples[0].value == pytest.approx(
            st["rate"]["rate_bps"])
        assert got["brimline_map_margin_decibels"].samples[0].value == pytest.approx(
            st["margin_db"])
        assert got["brimline_map_target_margin_decibels"].samples[0].value == \
            st["margin"]["target_db"] == 3.0
        assert sum(s.value for s in got["brimline_maps_published"].samples) == \
            sum(st["maps_published"].values())


def test_service_close_releases_the_metrics_port():
    """The endpoint is one of the service's resources: closing the service frees its port."""
    cfg = loopback_config(metrics={"enabled": True, "port": 0})
    plan = make_plan(**cfg.link.model_dump())
    with Service(cfg, driver=ScriptedDriver(plan, frames=5)) as svc:
        port = int(svc.endpoints["metrics"].rsplit(":", 1)[1].split("/")[0])
    with MetricsEndpoint(port=port) as again:
        assert again.port == port


def test_missing_client_library_is_one_line(monkeypatch):
    import builtins

    real_import = builtins.__import__

    def no_client(name, *args, **kwargs):
        if name.startswith("prometheus_client"):
            raise ImportError(name)
        return real_import(name, *args, **kwargs)

    monkeypatch.setattr(builtins, "__import__", no_client)
    with pytest.raises(ConfigError, match=r"pip install 'brimline\[metrics\]'"):
        MetricsEndpoint(port=0)

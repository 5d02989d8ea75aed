"""Machinery of the browser tests and of the README's picture of the browser view.

- :func:`find_browser` looks for Debian's ``chromium`` and ``chromedriver`` (never downloads
  one: selenium is given the system driver's path, so its driver manager is never asked);
- :func:`headless_chromium` opens a headless window of a fixed size as a context manager;
- :func:`chart_ink` measures how much of a screenshot region is drawn (not page background);
- :class:`LinkClock` and :func:`demo_run` run the demo config in lockstep with the link time as
  the service's clock, so the status messages (one per 0.25 s of link time) are the same every
  run, and hand each to a callback (the picture waits there until the view has it).
"""

from __future__ import annotations

import contextlib
import io
import os
import shutil
from pathlib import Path
from typing import Callable

import numpy as np

ROOT = Path(__file__).resolve().parents[1]
WINDOW = (1280, 1180)


def find_browser() -> tuple[str, str] | str:
    """``(chromium, chromedriver)`` paths, or the one-line reason why there is no browser."""
    try:
        import selenium  # noqa: F401  (the test extra; checked here to skip with a reason)
    except ImportError:
        return "selenium is not installed (pip install -e '.[test]')"
    browser = next((p for p in (shutil.which("chromium"), shutil.which("chromium-browser"))
                    if p), None)
    driver = shutil.which("chromedriver") or (
        "/usr/bin/chromedriver" if os.access("/usr/bin/chromedriver", os.X_OK) else None)
    if browser is None or driver is None:
        return "no chromium/chromedriver on this machine (apt-get install chromium chromium-driver)"
    return browser, driver


@contextlib.contextmanager
def headless_chromium(browser: str, driver: str, *, size: tuple[int, int] = WINDOW):
    """A headless chromium driven through the system chromedriver, closed on exit."""
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

    os.environ.setdefault("SE_OFFLINE", "true")  # selenium's driver manager: never download
    options = webdriver.ChromeOptions()
    options.binary_location = browser
    for arg in ("--headless=new", "--no-sandbox", "--disable-gpu", "--disable-dev-shm-usage",
                "--hide-scrollbars", "--force-device-scale-factor=1", "--mute-audio",
                "--no-first-run", "--disable-extensions", "--disable-background-networking",
                f"--window-size={size[0]},{size[1]}"):
        options.add_argument(arg)
    chrome = webdriver.Chrome(service=Service(executable_path=driver), options=options)
    try:
        chrome.set_page_load_timeout(60)
        yield chrome
    finally:
        chrome.quit()


def element_box(chrome, element_id: str) -> tuple[int, int, int, int]:
    """``(left, top, right, bottom)`` of an element in screenshot pixels."""
    r = chrome.execute_script(
        "const r = document.getElementById(arguments[0]).getBoundingClientRect();"
        "return [r.left, r.top, r.right, r.bottom];", element_id)
    return tuple(int(round(v)) for v in r)


def chart_ink(png: bytes, box: tuple[int, int, int, int]) -> dict[str, float]:
    """How much of ``box`` in the screenshot ``png`` is drawn.

    Returns
    -------
    dict
        ``inked``: fraction of pixels that differ from the box's most common colour (the
        background); ``colours``: distinct colours in the box.
    """
    from PIL import Image  # matplotlib's dependency, in the test extra

    with Image.open(io.BytesIO(png)) as im:
        pixels = np.asarray(im.convert("RGB").crop(box), dtype=np.uint8)
    flat = pixels.reshape(-1, 3)
    if flat.size == 0:
        return {"inked": 0.0, "colours": 0}
    packed = (flat[:, 0].astype(np.int64) << 16) | (flat[:, 1].astype(np.int64) << 8) | flat[:, 2]
    values, counts = np.unique(packed, return_counts=True)
    background = values[np.argmax(counts)]
    return {"inked": float(np.mean(packed != background)), "colours": int(values.size)}


class LinkClock:
    """The service's clock read from the simulated link: the time of the next frame, s.

    Given to a lockstep :class:`Service`, it makes heartbeats and the status period run on link
    time, so the statuses of a run do not depend on how fast the machine is.
    """

    def __init__(self) -> None:
        self.service = None

    def __call__(self) -> float:
        drv = getattr(self.service, "driver", None)
        if drv is None or not hasattr(drv, "frame_time_s"):
            return 0.0
        return drv.start_s + drv.frame_time_s(drv.next_frame)


def demo_run(until_s: float, on_status: Callable[[dict], None], *,
             config_path: Path = ROOT / "config" / "demo.yaml") -> None:
    """Run ``config_path`` in lockstep to link time ``until_s``; call ``on_status`` per status.

    The status endpoint binds a free loopback port: ``on_status`` is first called with
    ``{"endpoint": ...}`` (nothing published yet), then with each status message after it
    was published.
    """
    from brimline.daemon.runtime.config import load_config
    from brimline.daemon.runtime.service import Service

    cfg = load_config(config_path, overrides={
        "driver.sim.realtime": False,
        "status.endpoint": "tcp://127.0.0.1:0",
        "publish.map_endpoint": "tcp://127.0.0.1:0",
        "publish.snapshot_endpoint": "tcp://127.0.0.1:0",
        "publish.ack_endpoint": "tcp://127.0.0.1:0",
        "service.state_path": None,
        "record.path": None,
        "metrics.enabled": False,
    })
    clock = LinkClock()
    with Service(cfg, clock=clock) as svc:
        clock.service = svc
        on_status({"endpoint": svc.endpoints["status"]})
        while clock() < until_s and svc.driver_state == "running":
            status = svc.step(0.0)
            if status is not None:
                on_status(status)

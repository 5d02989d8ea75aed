"""Makes ``demo-view.png``: the browser view (``brimline lookout``) at the end of the demo run.

Runs ``config/demo.yaml`` for 25 s of link time in lockstep, with the link time as the service's
clock, so the status messages are the same every run; hands each to the view (and so to a page
open in Debian's headless chromium) and waits until the view has it; photographs the whole page
at the end of the run. The machinery is the
browser test's (``tests/browser_rig.py``). Needs the test extra (selenium) and the ``chromium``
and ``chromium-driver`` packages::

    .venv/bin/python replay/make_demo_view.py

Only the "last status ... ago" age differs between runs.
"""

from __future__ import annotations

import contextlib
import io
import sys
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent / "tests"))

from browser_rig import demo_run, find_browser, headless_chromium  # noqa: E402
from protocol_helpers import until  # noqa: E402

from brimline.daemon.views.lookout import Lookout  # noqa: E402

LINK_TIME_S = 25.0
WIDTH_PX = 1280
HANG_S = 60.0


def main() -> int:
    found = find_browser()
    if isinstance(found, str):
        print(f"make_demo_view: {found}", file=sys.stderr)
        return 2
    with contextlib.ExitStack() as stack:
        chrome = stack.enter_context(headless_chromium(*found))
        shots: list[bytes] = []
        sent = [0]
        views: list[Lookout] = []

        def on_status(status: dict) -> None:
            if "endpoint" in status:  # before the first status: the view and the page
                views.append(stack.enter_context(Lookout(status["endpoint"], port=0)))
                chrome.get(views[0].url)
                return
            sent[0] += 1
            view = views[0]
            if not until(lambda: view.counters["received"] >= sent[0], HANG_S):
                raise SystemExit(f"make_demo_view: the view did not get status {sent[0]}")
            if status["time_s"] >= LINK_TIME_S - 0.5 and not shots:
                shots.append(photograph(chrome, view.counters["received"] - 1))

        demo_run(LINK_TIME_S, on_status)
    if not shots:
        raise SystemExit("make_demo_view: the run ended before the picture was taken")
    from PIL import Image  # matplotlib's dependency, in the test extra

    out = HERE / "demo-view.png"
    with Image.open(io.BytesIO(shots[0])) as im:
        im.convert("RGB").quantize(colors=192, dither=Image.Dither.NONE).save(out, optimize=True)
    print(f"wrote {out} ({out.stat().st_size // 1024} KiB, {sent[0]} status messages)")
    return 0


def photograph(chrome, status_seq: int) -> bytes:
    """The whole page once it shows status ``status_seq``, as PNG bytes."""
    if not until(lambda: chrome.execute_script("return document.body.dataset.statusSeq")
                 == str(status_seq), HANG_S):
        raise SystemExit(f"make_demo_view: the page did not show status {status_seq}")
    height = chrome.execute_script("return document.documentElement.scrollHeight")
    chrome.execute_cdp_cmd("Emulation.setDeviceMetricsOverride", {
        "width": WIDTH_PX, "height": int(height), "deviceScaleFactor": 1, "mobile": False})
    chrome.execute_script("window.dispatchEvent(new Event('resize'));")
    until(lambda: False, 0.5)  # let the page redraw at its full height
    return chrome.get_screenshot_as_png()


if __name__ == "__main__":
    raise SystemExit(main())

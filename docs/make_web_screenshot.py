"""Make docs/web-view.png: the built-in demo (the crossing boat and the pinger) in the browser view.

    python docs/make_web_screenshot.py [--seconds 45]

Starts ``beamtap serve`` (the demo) and ``beamtap web`` on loopback, opens the page in Debian's
headless Chromium (selenium, the Debian chromedriver), waits, and saves the screenshot.
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path

from selenium import webdriver
from selenium.webdriver.chrome.service import Service

from beamtap.processes import stop, wait_ready

HERE = Path(__file__).resolve().parent


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seconds", type=float, default=45.0, help="how long the page runs before the picture")
    ap.add_argument("--out", default=str(HERE / "web-view.png"))
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        svc = subprocess.Popen([sys.executable, "-m", "beamtap", "serve", "--publish", "tcp://127.0.0.1:*",
                                "--control", "tcp://127.0.0.1:*", "--ready-file", f"{tmp}/svc.json"],
                               stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        ends = wait_ready(svc, f"{tmp}/svc.json", 60)
        web = subprocess.Popen([sys.executable, "-m", "beamtap", "web", "--endpoint", ends["publish"], "--control",
                                ends["control"], "--listen", "127.0.0.1:0", "--ready-file", f"{tmp}/web.json"],
                               stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        url = wait_ready(web, f"{tmp}/web.json", 60)["url"]
        opts = webdriver.ChromeOptions()
        opts.binary_location = "/usr/bin/chromium"
        for a in ("--headless=new", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
                  "--disable-component-update", "--disable-sync", "--no-first-run", "--window-size=1280,900"):
            opts.add_argument(a)
        driver = webdriver.Chrome(service=Service("/usr/bin/chromedriver"), options=opts)
        try:
            driver.get(url)
            time.sleep(args.seconds)  # a picture after the scene has run for a while: nothing to synchronise
            driver.save_screenshot(args.out)
            print(json.dumps({"out": args.out, "rows": driver.execute_script("return window.beamtapView.total")}))
        finally:
            driver.quit()
            stop(web)
            stop(svc)
    return 0


if __name__ == "__main__":
    sys.exit(main())

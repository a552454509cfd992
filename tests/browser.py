"""A headless Chromium for report tests and screenshots (not collected by pytest).

Debian's ``chromium`` and ``chromium-driver`` packages (``/usr/bin/chromium``,
``/usr/bin/chromedriver``) driven by selenium; both paths are given explicitly, so selenium
never looks for a browser or a driver on the network. ``open_chromium()`` returns None when
either is missing, so that tests can skip.

Screenshots of a report (desktop and phone widths)::

    python tests/browser.py countscale_demo/report.html --out shots/
"""

from __future__ import annotations

import argparse
import shutil
import tempfile
from pathlib import Path

#: Flags for a quiet, sandbox-free, offline headless run (the sandbox needs kernel features
#: a container may not give; nothing here is fetched from the network).
FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
         "--disable-component-update", "--disable-sync", "--no-first-run",
         "--disable-dev-shm-usage", "--hide-scrollbars")

DESKTOP = (1280, 900)
PHONE = (390, 844)


def chromium_paths() -> tuple[str, str] | None:
    browser = shutil.which("chromium") or shutil.which("chromium-browser")
    driver = shutil.which("chromedriver")
    return (browser, driver) if browser and driver else None


def open_chromium(width: int = DESKTOP[0], height: int = DESKTOP[1]):
    """A selenium Chrome driver on Debian's Chromium with a fresh profile, or None."""
    paths = chromium_paths()
    if paths is None:
        return None
    try:
        from selenium import webdriver
        from selenium.webdriver.chrome.service import Service
    except ImportError:
        return None
    profile = tempfile.mkdtemp(prefix="countscale-chromium-")
    options = webdriver.ChromeOptions()
    options.binary_location = paths[0]
    for flag in FLAGS:
        options.add_argument(flag)
    options.add_argument(f"--user-data-dir={profile}")
    options.add_argument(f"--window-size={width},{height}")
    options.set_capability("goog:loggingPrefs", {"browser": "ALL"})
    driver = webdriver.Chrome(service=Service(executable_path=paths[1]), options=options)
    driver.countscale_profile = profile
    return driver


def close_chromium(driver) -> None:
    profile = getattr(driver, "countscale_profile", None)
    driver.quit()
    if profile:
        shutil.rmtree(profile, ignore_errors=True)


def full_page_screenshot(driver, url: str, path: Path, width: int, height: int) -> None:
    """Load `url` at `width` and save the whole page, top to bottom, as a PNG."""
    driver.set_window_size(width, height)
    driver.get(url)
    total = driver.execute_script("return document.documentElement.scrollHeight")
    driver.set_window_size(width, min(int(total) + 40, 30_000))
    driver.save_screenshot(str(path))


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("html", type=Path)
    parser.add_argument("--out", type=Path, default=Path("."))
    args = parser.parse_args(argv)
    driver = open_chromium()
    if driver is None:
        print("chromium, chromedriver or selenium not found")
        return 1
    args.out.mkdir(parents=True, exist_ok=True)
    url = args.html.resolve().as_uri()
    try:
        for name, (width, height) in (("desktop", DESKTOP), ("phone", PHONE)):
            path = args.out / f"report_{name}.png"
            full_page_screenshot(driver, url, path, width, height)
            print(path)
    finally:
        close_chromium(driver)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())

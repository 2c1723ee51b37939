"""Headless Chromium for the browser-app tests (Debian's chromium and chromium-driver).

``chromium(tmp_path)`` starts a Selenium driver with the browser's console log kept
(the tests refuse severe entries); without the browser the test is skipped, except
on CI (``CI=true``), where it must be there. ``assert_not_blank`` checks a screenshot.
"""

from __future__ import annotations

import os
import shutil
from pathlib import Path

import numpy as np
import pytest


def chromium(tmp_path: Path, window: str = "1300,2200"):
    """A Selenium Chrome driver on the system Chromium, headless, with its own profile."""
    exe = shutil.which("chromium") or shutil.which("chromium-browser")
    driver = shutil.which("chromedriver")
    if not (exe and driver):
        if os.environ.get("CI") == "true":
            pytest.fail("chromium and chromium-driver must be installed (the CI script does)")
        pytest.skip("chromium or chromedriver not installed")
    pytest.importorskip("selenium")
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

    opts = webdriver.ChromeOptions()
    opts.binary_location = exe
    for flag in (
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-quic",
        "--no-first-run",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        f"--user-data-dir={tmp_path / 'profile'}",
        f"--window-size={window}",
    ):
        opts.add_argument(flag)
    opts.set_capability("goog:loggingPrefs", {"browser": "ALL"})
    return webdriver.Chrome(service=Service(driver), options=opts)


def assert_not_blank(path: Path) -> None:
    """The screenshot shows something: enough pixels differ from its background colour."""
    from matplotlib.image import imread

    img = imread(path)[..., :3]
    background = np.median(img.reshape(-1, 3), axis=0)
    differs = np.any(np.abs(img - background) > 0.1, axis=-1)
    assert differs.mean() > 0.03 and img.std() > 0.03, path

"""Shared pytest fixtures and the Hypothesis settings profile."""

import os

import numpy as np
import pytest
from hypothesis import settings

# Property tests run derandomized everywhere (CI included): the examples come from a fixed
# seed, so a run is repeatable and a failure reproduces on any machine.
settings.register_profile("audiodsm", derandomize=True, print_blob=True)
settings.load_profile("audiodsm")


@pytest.fixture
def rng():
    """A seeded generator so every test is reproducible."""
    return np.random.default_rng(20261201)


@pytest.fixture(autouse=True, scope="session")
def _loop_cache_in_a_temporary_folder(tmp_path_factory):
    """The chain's on-disk design cache (stages/loop_cache.py) writes to the session's
    temporary folder, not the user's cache (subprocesses inherit the setting)."""
    before = os.environ.get("AUDIODSM_LOOP_CACHE")
    os.environ["AUDIODSM_LOOP_CACHE"] = str(tmp_path_factory.mktemp("loop-cache"))
    yield
    if before is None:
        os.environ.pop("AUDIODSM_LOOP_CACHE", None)
    else:
        os.environ["AUDIODSM_LOOP_CACHE"] = before


def _browser_programs():
    """(chromium, chromedriver) paths, or a reason why the browser tests cannot run."""
    import importlib.util
    import shutil

    browser = next(
        (shutil.which(n) for n in ("chromium", "chromium-browser") if shutil.which(n)), None
    )
    driver = shutil.which("chromedriver")
    if browser is None or driver is None:
        missing = [n for n, p in (("chromium", browser), ("chromedriver", driver)) if p is None]
        return None, "not installed: " + ", ".join(missing) + " (Debian: chromium chromium-driver)"
    if importlib.util.find_spec("selenium") is None:
        return None, "the selenium package is not installed (pip install -e '.[test]')"
    return (browser, driver), None


@pytest.fixture
def browser(tmp_path, monkeypatch):
    """A headless Chromium driven by Selenium, with a fresh profile and a download folder.

    Skips with the reason when Chromium, chromedriver or selenium is missing. The browser is
    kept off the network: no background networking, no component updates, no sync, no QUIC;
    Selenium's driver manager is told to stay offline. ``browser.download_dir`` is the
    folder downloads land in.
    """
    programs, reason = _browser_programs()
    if programs is None:
        pytest.skip(reason)
    from selenium import webdriver
    from selenium.webdriver.chrome.service import Service

    monkeypatch.setenv("SE_OFFLINE", "true")
    downloads = tmp_path / "browser-downloads"
    downloads.mkdir()
    options = webdriver.ChromeOptions()
    options.binary_location = programs[0]
    for arg in (
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-quic",
        "--no-first-run",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        "--disable-dev-shm-usage",
        "--autoplay-policy=no-user-gesture-required",
        f"--user-data-dir={tmp_path / 'browser-profile'}",
        "--window-size=1280,1024",
    ):
        options.add_argument(arg)
    options.add_experimental_option(
        "prefs",
        {
            "download.default_directory": str(downloads),
            "download.prompt_for_download": False,
            "safebrowsing.enabled": False,
        },
    )
    driver = webdriver.Chrome(service=Service(executable_path=programs[1]), options=options)
    driver.download_dir = downloads
    try:
        yield driver
    finally:
        driver.quit()

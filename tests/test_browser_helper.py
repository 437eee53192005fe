"""The browser tests' Chromium lookup: a local run without Chromium skips, CI fails."""
import pytest

import browser


def test_missing_chromium_skips_locally_and_fails_in_ci(monkeypatch):
    monkeypatch.setattr(browser, "find_chromium", lambda: None)
    monkeypatch.delenv("SLICEFIND_REQUIRE_BROWSER", raising=False)
    with pytest.raises(pytest.skip.Exception, match="Chromium not found"):
        browser.chromium_or_skip("this check")
    monkeypatch.setenv("SLICEFIND_REQUIRE_BROWSER", "1")
    with pytest.raises(pytest.fail.Exception, match="makes this a failure"):
        browser.chromium_or_skip("this check")


def test_found_chromium_is_returned(monkeypatch):
    monkeypatch.setattr(browser, "find_chromium", lambda: "/opt/chromium")
    monkeypatch.setenv("SLICEFIND_REQUIRE_BROWSER", "1")
    assert "/opt/chromium" == browser.chromium_or_skip()

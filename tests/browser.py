"""Finding Chromium for the browser tests: a local run may skip, CI may not.

`.ci/run` sets ``SLICEFIND_REQUIRE_BROWSER=1``; there a missing Chromium fails the test
instead of skipping it, so CI cannot go green with the browser tests left out.
"""
import os
import shutil

import pytest

#: flags for headless Chromium on a machine with no network (no background connections)
CHROMIUM_ARGS = ["--no-sandbox", "--disable-gpu", "--disable-background-networking",
                 "--disable-component-update", "--disable-sync", "--no-first-run"]
_CANDIDATES = ("chromium", "chromium-browser", "google-chrome")


def find_chromium():
    """The path of a Chromium executable, or None."""
    for candidate in ("/usr/bin/chromium", *(shutil.which(c) for c in _CANDIDATES)):
        if candidate and os.path.exists(candidate):
            return candidate
    return None


def chromium_or_skip(what: str = "the browser test") -> str:
    """A Chromium path; otherwise skip with the reason, or fail where CI requires the browser."""
    path = find_chromium()
    if path is None:
        reason = (f"Chromium not found (looked for /usr/bin/chromium and {', '.join(_CANDIDATES)} on "
                  f"PATH), so {what} cannot run; install Debian's chromium (apt-get install chromium).")
        if os.environ.get("SLICEFIND_REQUIRE_BROWSER") == "1":
            pytest.fail(reason + " SLICEFIND_REQUIRE_BROWSER=1 (set by .ci/run) makes this a failure.")
        pytest.skip(reason)
    return path

"""Shared end-to-end fixtures: the sample site audited once per session, and where pictures of it are kept.

The browser and printed-page tests (``test_browser.py``, ``test_pdf_layout.py``) look at the same
sample-site report; running the audit once for both keeps the stage short. Screenshots and page
images are written under pytest's temporary folder and listed at the end of the run.
"""

from __future__ import annotations

import os
import shutil
from pathlib import Path

import pytest

from audit.cli import main

ROOT = Path(__file__).resolve().parents[2]
SAMPLE = ROOT / "sample_site" / "loops.xlsx"
SITE = "Larkmoor Water Reclamation Works"

PICTURES: list[str] = []
"""Folders holding screenshots or page images written by this session's tests (shown in the summary)."""


def tool(name: str, path: str | None = None) -> str:
    """The path of an outside program the test needs; skip without it, but fail under CI=true.

    Parameters
    ----------
    name : str
        Program name, e.g. ``chromium`` or ``pdftoppm``.
    path : str, optional
        A fixed path to prefer (e.g. ``/usr/bin/chromium``).
    """
    found = path if path and os.access(path, os.X_OK) else shutil.which(name)
    if found:
        return found
    message = f"{name} is not installed (Debian: .ci/run installs it)"
    if os.environ.get("CI", "").lower() == "true":
        pytest.fail(message)
    pytest.skip(message)


def keep_pictures(folder: Path) -> Path:
    """Record a folder of pictures so the end-of-run summary says where a person can look."""
    PICTURES.append(str(folder))
    return folder


def pytest_terminal_summary(terminalreporter):
    if PICTURES:
        terminalreporter.write_sep("-", "report pictures for a person to look at")
        for folder in PICTURES:
            terminalreporter.write_line(folder)


@pytest.fixture(scope="session")
def sample_report(tmp_path_factory) -> Path:
    """Output folder of the sample site's audit (report.html and report.pdf), run once per session."""
    out = tmp_path_factory.mktemp("sample-report")
    code = main(["run", str(SAMPLE), "--out", str(out), "--date", "2024-05-01", "--site", SITE,
                 "--quiet", "--no-history"])
    assert code in (0, 1)
    return out

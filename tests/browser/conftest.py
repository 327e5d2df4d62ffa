"""Browser tests run only when asked for: ``python -m pytest -m browser tests/browser``.

They need Debian's chromium, playwright and a JupyterLab server, so the
default test run (the README's command) does not collect them at all; CI
runs them explicitly after installing chromium and the ``browser`` extra.
"""

from __future__ import annotations


def _wanted(config) -> bool:
    return "browser" in (config.getoption("-m") or "")


def pytest_ignore_collect(collection_path, config):
    if (
        not _wanted(config)
        and collection_path.suffix == ".py"
        and collection_path.name.startswith("test_")
    ):
        return True
    return None

"""Command line: the demo runs end to end on the embedded scenario."""

from __future__ import annotations

import subprocess
import sys


def test_demo_prints_the_analysis():
    out = subprocess.run(
        [sys.executable, "-m", "basinview", "demo", "--starts", "6"],
        capture_output=True,
        text=True,
        timeout=300,
    )
    assert out.returncode == 0, out.stderr
    text = out.stdout
    assert "Runs by learning rate" in text
    assert "Where converged runs ended" in text
    # The scenario's two mirror-image minima are both found (rounded positions).
    assert "4.97" in text and "2.97" in text
    assert "-2.78" in text


def test_unknown_command_fails_with_usage():
    out = subprocess.run(
        [sys.executable, "-m", "basinview", "plot"], capture_output=True, text=True
    )
    assert out.returncode == 2
    assert "invalid choice" in out.stderr

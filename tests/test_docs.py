"""The generated tables under docs/ match what their script writes from the sources."""

from __future__ import annotations

import json

import pytest

from benchmarks.docs import RESULTS, benchmarks_markdown
from tests.test_bad_inputs import CATALOGUE
from tools.make_docs import DOCS, bad_inputs_markdown, main


def test_bad_input_catalogue_file_is_generated_from_the_tests():
    committed = (DOCS / "bad_inputs.md").read_text(encoding="utf-8")
    assert committed == bad_inputs_markdown(), "run `python -m tools.make_docs` and commit docs/"
    # every catalogued case has its row, once
    for case in CATALOGUE:
        assert committed.count(f"| `{case.id}` |") == 1, case.id


def test_benchmark_file_is_generated_from_the_results():
    committed = (DOCS / "benchmarks.md").read_text(encoding="utf-8")
    assert committed == benchmarks_markdown(), "run `python -m tools.make_docs` and commit docs/"
    results = json.loads(RESULTS.read_text(encoding="utf-8"))
    w3 = results["workloads"]["W3"]["X @ theta"]
    # the numbers in the file are those of the JSON (rounded to 3 digits)
    assert f"| {w3['speedup_vs_a']:.3g}x |" in committed
    assert results["machine"]["date"] in committed


def test_the_check_fails_on_a_stale_file(tmp_path, monkeypatch, capsys):
    import tools.make_docs as make_docs

    stale = tmp_path / "bad_inputs.md"
    stale.write_text("| `loss-signature` | edited by hand |\n", encoding="utf-8")
    monkeypatch.setattr(make_docs, "pages", lambda: {stale: bad_inputs_markdown})
    monkeypatch.setattr(make_docs, "ROOT", tmp_path)
    assert main(["--check"]) == 1
    assert "out of date: bad_inputs.md" in capsys.readouterr().out
    assert stale.read_text(encoding="utf-8").startswith("| `loss-signature` | edited")
    assert main([]) == 0
    assert stale.read_text(encoding="utf-8") == bad_inputs_markdown()
    assert main(["--check"]) == 0


@pytest.mark.parametrize("page", ["bad_inputs.md", "benchmarks.md"])
def test_generated_pages_say_how_to_regenerate(page):
    assert "python -m tools.make_docs" in (DOCS / page).read_text(encoding="utf-8")

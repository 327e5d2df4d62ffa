"""Regenerate the tables under docs/ from their sources.

``python -m tools.make_docs`` (from the repository root) writes

* ``docs/bad_inputs.md``: the bad-input catalogue of ``tests/test_bad_inputs.py``;
* ``docs/benchmarks.md``: the tables of ``benchmarks/results.json``.

``python -m tools.make_docs --check`` writes nothing and exits 1 when a file
differs from what would be written (``tests/test_docs.py`` checks the same).
"""

from __future__ import annotations

import argparse
import sys
from collections.abc import Callable, Sequence
from pathlib import Path

__all__ = ["DOCS", "bad_inputs_markdown", "pages"]

ROOT = Path(__file__).resolve().parents[1]
DOCS = ROOT / "docs"


def bad_inputs_markdown() -> str:
    """docs/bad_inputs.md: the catalogue table with a short heading."""
    from tests.test_bad_inputs import catalogue_markdown

    head = [
        "# Bad-input catalogue",
        "",
        "Generated from `tests/test_bad_inputs.py` by `python -m tools.make_docs`; do not edit by",
        "hand. Every row is a test: the bad input gives the listed error, whose message names",
        "the problem and says the fix, and nothing the user had is changed (docs/testing.md,",
        '"Bad-input catalogue and fault isolation").',
        "",
    ]
    return "\n".join(head) + "\n" + catalogue_markdown() + "\n"


def pages() -> dict[Path, Callable[[], str]]:
    """Each generated file and the function that writes its text."""
    from benchmarks.docs import benchmarks_markdown

    return {
        DOCS / "bad_inputs.md": bad_inputs_markdown,
        DOCS / "benchmarks.md": benchmarks_markdown,
    }


def main(argv: Sequence[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m tools.make_docs", description=__doc__)
    parser.add_argument("--check", action="store_true", help="only report files that differ")
    args = parser.parse_args(argv)
    stale = []
    for path, make in pages().items():
        text = make()
        old = path.read_text(encoding="utf-8") if path.exists() else None
        if old == text:
            continue
        stale.append(path)
        if not args.check:
            path.parent.mkdir(exist_ok=True)
            path.write_text(text, encoding="utf-8")
            print(f"wrote {path.relative_to(ROOT)}")
    if args.check and stale:
        print("out of date: " + ", ".join(str(p.relative_to(ROOT)) for p in stale))
        return 1
    return 0


if __name__ == "__main__":
    sys.exit(main())

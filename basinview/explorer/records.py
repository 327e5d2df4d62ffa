"""Recorded snapshots: kept in a table and written into the notebook as an output.

The record area is a normal cell output created when the Explorer is
displayed (``display(..., display_id=...)``). Recording updates that output
from the widget callback, so the snapshots are part of the saved notebook
file (plain Markdown with the settings JSON), readable without a kernel.
"""

from __future__ import annotations

from typing import Any

import pandas as pd
from IPython.display import Markdown, display

from ..core import Settings

__all__ = ["SnapshotLog", "snapshot_markdown"]


def snapshot_row(i: int, s: Settings) -> dict[str, Any]:
    hyper = ", ".join(f"{k}={','.join(f'{x:g}' for x in v)}" for k, v in s.hyper.items())
    return {
        "snapshot": i,
        "created": s.created,
        "optimizer": s.optimizer,
        "learning_rate": ", ".join(f"{x:g}" for x in s.learning_rate),
        "hyper": hyper,
        "steps": s.steps,
        "plane": s.plane.get("kind"),
        "span": s.span,
        "resolution": s.resolution[0],
        "starts": (
            f"schemes {', '.join(str(r['name']) for r in s.schemes)}"
            if s.schemes
            else s.starts.get("kind")
        ),
        "fingerprint": s.fingerprint,
        "note": s.note,
    }


def snapshot_markdown(snapshots: list[Settings]) -> str:
    """Markdown of the snapshot list with the latest settings as JSON."""
    if not snapshots:
        return "*basinview: no snapshot recorded yet (press “record”).*"
    lines = [f"**basinview snapshots** ({len(snapshots)}), loss `{snapshots[-1].loss_name}`", ""]
    lines.append("| # | optimizer | learning rate | hyper-parameters | steps | plane | note |")
    lines.append("|---|---|---|---|---|---|---|")
    for i, s in enumerate(snapshots, 1):
        row = snapshot_row(i, s)
        note = str(row["note"]).replace("|", "/")
        lines.append(
            f"| {i} | {row['optimizer']} | {row['learning_rate']} | {row['hyper']} | {row['steps']} | {row['plane']} | {note} |"
        )
    lines += [
        "",
        f"Latest settings (snapshot {len(snapshots)}; `Settings.from_json` rebuilds it):",
        "",
        "```json",
        snapshots[-1].to_json(),
        "```",
    ]
    return "\n".join(lines)


class SnapshotLog:
    """Snapshots recorded by one Explorer, and the notebook outputs showing them."""

    def __init__(self) -> None:
        self._items: list[Settings] = []
        self._handles: list[Any] = []

    def __len__(self) -> int:
        return len(self._items)

    def __getitem__(self, index: int) -> Settings:
        return self._items[index]

    def attach(self) -> None:
        """Show the record area in the current cell output (called on display)."""
        self._handles.append(display(Markdown(snapshot_markdown(self._items)), display_id=True))

    def add(self, settings: Settings) -> None:
        self._items.append(settings)
        md = Markdown(snapshot_markdown(self._items))
        for handle in self._handles:
            if handle is not None:
                handle.update(md)

    @property
    def table(self) -> pd.DataFrame:
        """One row per snapshot."""
        return pd.DataFrame([snapshot_row(i, s) for i, s in enumerate(self._items, 1)])

    @property
    def items(self) -> list[Settings]:
        return list(self._items)

"""Pieces several sub-commands print: the bench safety note and the one-line record summary."""

from __future__ import annotations

import numpy as np

from ..record import Record

SAFETY_NOTE = (
    "Caution: bench instruments are mains powered and a scope's probe ground is tied to protective earth; "
    "never clip a ground lead to a node that is not at earth. Keep outputs inside the DUT's ratings. "
    "Follow local codes and licensed practice."
)


def levels(record: Record, channel: str) -> tuple[float, float]:
    """(pre-trigger baseline, final level) of a channel: the mean of the pre-trigger samples and of the last tenth."""
    samples = record.channel(channel).samples
    pre = record.timebase.pretrigger_samples
    baseline = float(np.mean(samples[:pre])) if pre else float("nan")
    return baseline, float(np.mean(samples[-max(1, len(samples) // 10):]))


def record_line(index: int, record: Record) -> str:
    """``#12 2026-12-02T03:50:01 rising edge, v_c 0.000→1.000 V pass``: what a bench engineer scans for.

    The levels are those of the last scope input (by the profile's order, the DUT's output comes last);
    math channels are left out because they are derived.
    """
    captured = [c for c in record.channels if c.source.upper().startswith("CH")] or record.channels
    shown = captured[-1]
    before, after = levels(record, shown.name)
    shown_verdict = {"pass": " [green]pass[/green]", "fail": " [red]FAIL[/red]", "untested": " untested"}
    verdict = shown_verdict.get((record.analysis or {}).get("verdict", ""), "")
    return (f"#{index} {record.utc[:19]} {record.stimulus.edge} edge, {shown.name} "
            f"{before:.3f}→{after:.3f} {shown.unit}{verdict}")

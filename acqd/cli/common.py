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
    """``#12 2026-12-02T03:50:01 rising v_c 0.000→1.000 V pass``: what a bench engineer scans for."""
    last = record.channels[min(2, len(record.channels) - 1)].name if record.channels else ""
    before, after = levels(record, last) if last else (float("nan"), float("nan"))
    verdict = ""
    if record.analysis:
        verdict = " [green]pass[/green]" if record.analysis.get("passed") else " [red]FAIL[/red]"
    return (f"#{index} {record.utc[:19]} {record.stimulus.edge} edge, {last} "
            f"{before:.3f}→{after:.3f} {record.channel(last).unit}{verdict}")

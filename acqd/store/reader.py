"""The reader: ``open_records(path)`` sees every record of every segment in order, the live one included.

It never writes: a live ``.part`` (whether its writer is running or died) is first opened by a child
process (``recovery.examine``) so that a damaged file cannot crash the caller, then opened here with
``swmr=True``. Only rows that verify are visible; ``refresh()`` picks up records appended since.
"""

from __future__ import annotations

from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path
from typing import Any, NamedTuple

from ..errors import ConfigError
from ..record import Record
from .naming import DAMAGED, LIVE, Segment, StorePaths
from .overview import is_overview
from .recovery import damaged_extent, examine
from .schema import row_summary
from .segment import SegmentView


@dataclass(frozen=True)
class RecordSummary:
    """What ``acqd ls`` shows of one record; built from the index and the shared channel list only."""

    index: int
    utc: str
    n_channels: int
    n_samples: int
    channel_names: tuple[str, ...]
    units: tuple[str, ...]
    edge: str
    low_v: float
    high_v: float
    checksum: int
    verdict: str
    segment: str


class RecordAnalysis(NamedTuple):
    """One record's comparator result (None if it had none) and when the record was taken."""

    index: int
    utc: str
    monotonic_s: float
    analysis: dict[str, Any] | None


class RecordReader:
    """Read access to a store (``data/night.h5``) or to one segment file given by its own name."""

    def __init__(self, path: str | Path) -> None:
        self.path = Path(path)
        self._paths = StorePaths(path)
        self._views: dict[int, SegmentView] = {}
        self.notes: list[str] = []
        self.refresh()
        damaged = self._damaged_notes()
        self.notes += damaged
        if not self._views and not damaged and not self.path.is_file() and not self._paths.lock.exists():
            segments = f"{self._paths.stem}.NNNNNN.h5[.part]"
            raise ConfigError(str(path), "", f"no such record store: no file and no segments {segments} there")

    def _damaged_notes(self) -> list[str]:
        """One note per ``.damaged`` segment beside the store, with how many records it holds: recovery set
        it aside for a person, so its records are not listed, but nobody may miss that it is there."""
        if self.path.is_file() and not is_overview(self.path):
            return []
        notes = []
        for seg in self._paths.segments():
            if seg.state != DAMAGED:
                continue
            extent = damaged_extent(seg.path)
            if isinstance(extent, str):
                notes.append(f"{seg.path}: damaged segment, not listed; it cannot be opened ({extent})")
                continue
            first, rows = extent
            span = f" (records {first}-{first + rows - 1})" if first is not None and rows else ""
            notes.append(f"{seg.path}: damaged segment, not listed; its index holds {rows} record(s){span}")
        return notes

    def _segments(self) -> list[Segment]:
        if self.path.is_file() and not is_overview(self.path):
            return [Segment(0, self.path, LIVE if self.path.name.endswith(LIVE) else "")]
        return [s for s in self._paths.segments() if s.state in ("", LIVE)]

    def refresh(self) -> int:
        """Pick up new segments and records (a live store keeps growing); returns the record count."""
        for seg in self._segments():
            view = self._views.get(seg.number)
            if view is not None:
                view.refresh()
            else:
                view = self._open(seg)
                if view is not None:
                    self._views[seg.number] = view
        self._ordered = [self._views[n] for n in sorted(self._views)]
        return len(self)

    def _open(self, seg: Segment) -> SegmentView | None:
        """Open a segment; a live one after a child process showed it opens; None if it is unreadable or gone.

        A live segment's writer renames it to the finished name at any moment: one that is gone by the time
        it is examined or opened is read under that name, with the same damage note as any finished one."""
        if seg.state == LIVE:
            why = examine(seg.path)
            if why and seg.path.exists():
                self.notes.append(f"{seg.path}: skipped, {why}")
                return None
        try:
            view = SegmentView(seg.path, live=seg.state == LIVE)
        except FileNotFoundError:  # renamed by its writer (or removed) between the listing and the open
            finished = self._paths.finished(seg.number)
            if not finished.exists():
                return None
            view = SegmentView(finished, live=False)
        if view.damage:
            self.notes.append(view.damage)
        return view

    def __len__(self) -> int:
        return sum(len(v.rows) for v in self._ordered)

    def index(self) -> list[RecordSummary]:
        """One summary per record, in order, read from the index rows (no sample data is touched)."""
        out = []
        for view in self._ordered:
            rows = view.rows
            channels = view.blob_values("channels", rows)
            numbers = ("index", "n_channels", "n_samples", "stim_low_v", "stim_high_v", "samples_crc")
            cols = {name: rows[name].tolist() for name in numbers}
            texts = {name: [bytes(b).decode() for b in rows[name]] for name in ("utc", "stim_edge", "verdict")}
            for k, chans in enumerate(channels):
                out.append(
                    RecordSummary(
                        index=cols["index"][k],
                        utc=texts["utc"][k],
                        n_channels=cols["n_channels"][k],
                        n_samples=cols["n_samples"][k],
                        channel_names=tuple(c["name"] for c in chans),
                        units=tuple(c["unit"] for c in chans),
                        edge=texts["stim_edge"][k],
                        low_v=cols["stim_low_v"][k],
                        high_v=cols["stim_high_v"][k],
                        checksum=cols["samples_crc"][k],
                        verdict=texts["verdict"][k],
                        segment=view.path.name,
                    )
                )
        return out

    def analyses(self) -> list[RecordAnalysis]:
        """Every record's analysis with its time, without reading samples (for drift over a campaign)."""
        out = []
        for view in self._ordered:
            for row, analysis in zip(view.rows, view.blob_values("analysis", view.rows), strict=True):
                summary = row_summary(row)
                out.append(RecordAnalysis(summary["index"], summary["utc"], summary["monotonic_s"], analysis))
        return out

    def _locate(self, index: int) -> tuple[SegmentView, int]:
        """The segment holding record ``index`` and its position there (indices run on within a segment)."""
        for view in self._ordered:
            if len(view.rows) and int(view.rows["index"][0]) <= index <= int(view.rows["index"][-1]):
                return view, index - int(view.rows["index"][0])
        raise ConfigError(str(self.path), "record", f"{index} is not in this store; it holds {self._ranges()}")

    def _ranges(self) -> str:
        spans: list[list[int]] = []
        for view in self._ordered:
            if len(view.rows):
                first, last = int(view.rows["index"][0]), int(view.rows["index"][-1])
                if spans and spans[-1][1] + 1 == first:
                    spans[-1][1] = last
                else:
                    spans.append([first, last])
        return "records " + ", ".join(f"{a}-{b}" for a, b in spans) if spans else "no records"

    def metadata(self, index: int) -> dict[str, Any]:
        """Everything about record ``index`` except its samples (what ``acqd show`` prints)."""
        view, position = self._locate(index)
        return {**view.metadata(position), "segment": str(view.path)}

    def read(self, index: int) -> Record:
        """The full record ``index``; its samples are checked against the stored CRC-32."""
        view, position = self._locate(index)
        return view.record(position)

    def __iter__(self) -> Iterator[Record]:
        for view in list(self._ordered):
            for position in range(len(view.rows)):
                yield view.record(position)

    def close(self) -> None:
        for view in self._views.values():
            view.close()
        self._views.clear()
        self._ordered = []

    def __enter__(self) -> RecordReader:
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.close()


def open_records(path: str | Path) -> RecordReader:
    """Open the store (or single segment file) at ``path`` for reading."""
    return RecordReader(path)

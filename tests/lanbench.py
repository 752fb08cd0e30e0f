"""What the LAN-transport tests share: a quiet bench served over the raw socket and one other transport, and
the demo step test run over a chosen transport of the embedded simulated bench (``[bench.simulated]
transport``), its records read back from the store."""

from __future__ import annotations

from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from pathlib import Path
from typing import Any

from acqd.cli import main
from acqd.record import Record
from acqd.sim.bench import Serving, SimBench, SimBenchConfig
from acqd.store import open_records

ROOT = Path(__file__).resolve().parents[1]
DEMO = ROOT / "profiles" / "demo-bridge-filter.toml"


def demo_profile(folder: Path, transport: str) -> Path:
    """The demo profile served over ``transport``, storing into ``folder``."""
    text = DEMO.read_text()
    assert "[bench.simulated]\n" in text and 'file = "data/kt9-demo.h5"' in text, "demo profile changed"
    text = text.replace("[bench.simulated]\n", f'[bench.simulated]\ntransport = "{transport}"\n', 1)
    text = text.replace('file = "data/kt9-demo.h5"', f'file = "{folder / "records.h5"}"')
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / "profile.toml"
    path.write_text(text)
    return path


def run_and_read(folder: Path, transport: str, count: int = 1) -> list[Record]:
    """``acqd run`` of the demo over ``transport``; the stored records."""
    assert main(["run", str(demo_profile(folder, transport)), "--count", str(count)]) == 0
    with open_records(folder / "records.h5") as reader:
        return [reader.read(i) for i in range(len(reader))]


@contextmanager
def served_beside_the_socket(table: Mapping[str, Any], transport: str) -> Iterator[SimBench]:
    """A bench of ``table`` (unquantised) over the raw socket, the reference, and ``transport``."""
    config = SimBenchConfig.from_mapping({**table, "quantise": False}, "test fixture")
    bench = SimBench(config, serving=Serving(("socket", transport))).start()
    try:
        yield bench
    finally:
        bench.stop()

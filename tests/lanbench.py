"""What the LAN-transport tests share: a quiet bench served over the raw socket and one other transport, and
the demo step test run over a chosen transport of the embedded simulated bench (``[bench.simulated]
transport``), its records read back from the store."""

from __future__ import annotations

from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from pathlib import Path
from typing import Any

import numpy as np
import pytest
import pyvisa

from acqd.cli import main
from acqd.errors import InstrumentError
from acqd.record import Record
from acqd.sim.bench import Serving, SimBench, SimBenchConfig
from acqd.store import open_records
from acqd.visa import Session

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


def block_faults_recover(bench: SimBench, resource: str, fault: str) -> None:
    """A block reply cut half-way (connection dropped) or with a garbled header is one InstrumentError line
    naming the resource; the session recovers (drained or reconnected) and the next block is whole, the
    same samples as the raw socket's (pyvisa-py's plain binary read on the socket transport)."""
    rm = pyvisa.ResourceManager("@py")
    reference = rm.open_resource(bench.resources_by_transport["socket"]["scope"], read_termination="\n",
                                 write_termination="\n")
    try:
        for command in ("FORMat REAL,32", "TRIGger:SOURce IMMediate", "SWEep:POINts 20000", "INITiate"):
            reference.write(command)
        assert reference.query("*OPC?") == "1"
        expected = reference.query_binary_values("TRACe? CH1", datatype="f", is_big_endian=True)
    finally:
        reference.close()
    with Session(resource, timeout_s=1.0) as scope:
        setattr(bench.scope.faults, fault, True)
        with pytest.raises(InstrumentError) as info:
            scope.query_block("TRACe? CH1")
        assert str(info.value).startswith(resource) and "\n" not in str(info.value)
        setattr(bench.scope.faults, fault, False)
        np.testing.assert_array_equal(np.frombuffer(scope.query_block("TRACe? CH1"), ">f4"), expected)
        assert scope.query("*IDN?") == scope.identity

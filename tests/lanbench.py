"""What the LAN-transport tests share: a quiet bench served over the raw socket and one other transport, and
the block faults' recovery checked against the raw socket's samples. (The step test and replay over every
transport are in test_run.py and test_replay.py, through the ``transport`` fixture.)"""

from __future__ import annotations

from collections.abc import Iterator, Mapping
from contextlib import contextmanager
from typing import Any

import numpy as np
import pytest
import pyvisa

from acqd.errors import InstrumentError
from acqd.sim.bench import Serving, SimBench, SimBenchConfig
from acqd.visa import Session


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

"""A dropped link during `acqd run`: a TCP proxy on 127.0.0.1 between acqd and the simulated generator cuts
every connection (and refuses new ones) for a while, as a pulled cable or a rebooting LAN switch would.

Checked on what reached the simulated generator (its command log over real TCP): the run backs off and
reconnects instead of using up its step tests, the first command after the generator answers again
(beyond the *IDN? that proves who answers) is the output switched off, and a bench that never comes back
or step tests that keep failing stop the run after the stated number of attempts. The reconnection is
checked over each transport: the raw socket, HiSLIP (both channels through the one proxied port) and
VXI-11 (its core channel; pyvisa-py never opens the abort channel). Reference for the
proxy's behaviour: POSIX sockets (a closed peer reads as end of file; shutdown(2) ends both directions).
"""

from __future__ import annotations

import re
import socket
import threading
import time
from pathlib import Path

import pytest

from acqd.cli import main, run
from acqd.sim.bench import TRANSPORTS
from test_run import output_commands, profile_file

SIM_BENCH = """[bench.simulated]
seed = 9
noise_v_rms = 0.002
"""


class CuttableProxy:
    """Forwards 127.0.0.1:port to ``target``; ``cut()`` drops every connection and stops listening, so a
    new connection is refused at once (the fastest failure, the one that used up a run's step tests in
    milliseconds), until ``restore()`` listens on the same port again."""

    def __init__(self, target: tuple[str, int]) -> None:
        self.target = target
        self.port = 0
        self._open: list[socket.socket] = []
        self._lock = threading.Lock()
        self._listener: socket.socket | None = None
        self.restore()

    def restore(self) -> None:
        self._listener = socket.create_server(("127.0.0.1", self.port), reuse_port=False)
        self.port = self._listener.getsockname()[1]
        threading.Thread(target=self._accept, args=(self._listener,), daemon=True).start()

    def _accept(self, listener: socket.socket) -> None:
        while True:
            try:
                client, _ = listener.accept()
            except OSError:
                return  # cut or closed
            upstream = socket.create_connection(self.target)
            with self._lock:
                self._open += [client, upstream]
            for a, b in ((client, upstream), (upstream, client)):
                threading.Thread(target=self._pump, args=(a, b), daemon=True).start()

    @staticmethod
    def _pump(source: socket.socket, sink: socket.socket) -> None:
        try:
            while data := source.recv(65536):
                sink.sendall(data)
        except OSError:
            pass
        for s in (source, sink):
            try:
                s.shutdown(socket.SHUT_RDWR)
            except OSError:
                pass

    def cut(self) -> None:
        listener, self._listener = self._listener, None
        if listener is not None:  # shutdown(2) first: a bare close leaves the blocked accept() listening (Linux)
            listener.shutdown(socket.SHUT_RDWR)
            listener.close()
        with self._lock:
            dropped, self._open = self._open, []
        for s in dropped:
            try:
                s.shutdown(socket.SHUT_RDWR)
            except OSError:
                pass
            s.close()

    def close(self) -> None:
        self.cut()


# The TCP port in each transport's resource string, and the same resource on another port (VISA resource
# syntax as pyvisa parses it; HiSLIP's two channels share its one port, VXI-11 without a portmapper names
# its core channel's).
PORT_IN = {"socket": r"::(\d+)::SOCKET$", "hislip": r"::hislip\d+,(\d+)::INSTR$", "vxi11": r",(\d+)::inst\d+::INSTR$"}


def _port(resource: str, transport: str = "socket") -> int:
    return int(re.search(PORT_IN[transport], resource).group(1))


def _on_port(resource: str, transport: str, port: int) -> str:
    match = re.search(PORT_IN[transport], resource)
    return resource[:match.start(1)] + str(port) + resource[match.end(1):]


@pytest.fixture
def linked(tmp_path: Path, sim_bench, request):
    """A simulated bench, the generator behind a cuttable proxy, and a 'visa' profile that uses both; over
    the transport ``request.param`` names when the test is parametrised (the raw socket otherwise)."""
    transport = getattr(request, "param", "socket")
    bench = sim_bench(seed=9, transport=transport)
    proxy = CuttableProxy(("127.0.0.1", _port(bench.resources["generator"], transport)))
    via_proxy = _on_port(bench.resources["generator"], transport, proxy.port)
    path = profile_file(tmp_path, ('kind = "simulated"', 'kind = "visa"'),
                        ('driver = "scpi-generator"', f'driver = "scpi-generator"\nresource = "{via_proxy}"\ntimeout_s = 1.0'),
                        ('driver = "scpi-digitiser"',
                         f'driver = "scpi-digitiser"\nresource = "{bench.resources["scope"]}"'))
    text = path.read_text()
    start, end = text.index("[bench.simulated]"), text.index("[limits]")
    path.write_text(text[:start] + text[end:])  # a visa bench has no [bench.simulated] table
    yield bench, proxy, path
    proxy.close()


def _cut_after_output_on(bench, proxy: CuttableProxy, outage_s: float) -> dict[str, float]:
    """In the background: once the output is on (a step test under way), cut the link for ``outage_s``."""
    times: dict[str, float] = {}

    def act() -> None:
        log = bench.generator.command_log
        while "OUTPUT ON" not in output_commands(log):
            time.sleep(0.01)
        time.sleep(0.2)
        times["cut"] = time.monotonic()
        proxy.cut()
        time.sleep(outage_s)
        times["restored"] = time.monotonic()
        proxy.restore()

    threading.Thread(target=act, daemon=True).start()
    return times


RECORDS = 30


@pytest.mark.parametrize("linked", TRANSPORTS, indirect=True)
def test_a_dropped_link_is_reconnected_and_the_output_switched_off_first(linked, capsys) -> None:

    bench, proxy, profile = linked
    # Longer than the failed step test takes to give up, so the first attempt to reach the bench again
    # meets the cut link: over VXI-11 that is pyvisa-py's RPC timeout (the I/O timeout + 1 s) on top of
    # the reply timeout, which outlasted a 3 s cut on a busy machine.
    outage_s = 7.0 if "vxi11" in bench.serving.transports else 3.0
    times = _cut_after_output_on(bench, proxy, outage_s=outage_s)
    # Enough records that the run is still going when the cut lands 0.2 s after the output went on (six
    # records once took less than that).
    status = main(["run", str(profile), "-n", str(RECORDS)])
    out, err = capsys.readouterr()
    log = bench.generator.command_log
    assert "restored" in times, out + err
    # The outage cost at most the step test it hit, not the rest of the run (before: all of them, in ms).
    not_acquired = out.count("not acquired:")
    assert status == 1 and 1 <= not_acquired <= 2, out
    assert f"{RECORDS - not_acquired} record(s) stored" in out
    assert "lost the bench" in out and "generator output switched off first" in out
    # While the link was down the generator's output stayed on (nothing could reach it)...
    assert output_commands([e for e in log if e.monotonic_s < times["cut"]])[-1] == "OUTPUT ON"
    # ...and the first command after it answered again, past the *IDN? of the new connection, is output off.
    after = [e.text.upper() for e in log if e.monotonic_s > times["restored"]]
    assert [t for t in after if t != "*IDN?"][0] == "OUTPUT OFF"
    assert output_commands(log)[-1] == "OUTPUT OFF"
    assert "Traceback" not in err


def test_a_bench_that_never_answers_again_stops_the_run(linked, capsys, monkeypatch) -> None:
    bench, proxy, profile = linked
    monkeypatch.setattr(run, "RECONNECT_FIRST_DELAY_S", 0.05)
    monkeypatch.setattr(run, "RECONNECT_ATTEMPTS", 4)
    _cut_after_output_on(bench, proxy, outage_s=3600)
    started = time.monotonic()
    status = main(["run", str(profile), "-n", "50"])
    elapsed_s = time.monotonic() - started
    out, err = capsys.readouterr()
    assert status == 2 and out.count("not acquired:") == 1
    (line,) = err.strip().splitlines()
    # 0.05 + 0.1 + 0.2 + 0.4 s of waiting, doubling (the stated schedule), then the run stops.
    assert "did not answer again within 0.75 s (4 attempts" in line and "output may still be on" in line
    assert elapsed_s < 30


def test_step_tests_that_keep_failing_stop_the_run(tmp_path: Path, capsys) -> None:
    # A trigger level above both levels: the edge never crosses it, each capture times out (common practice).
    profile = profile_file(tmp_path, ("averages = 1", "averages = 1\ntimeout_s = 0.3\ntrigger_level_v = 1.5"))
    status = main(["run", str(profile), "-n", "40"])
    out, err = capsys.readouterr()
    assert status == 2 and out.count("not acquired:") == run.MAX_FAILURES_IN_A_ROW
    (line,) = err.strip().splitlines()
    assert f"{run.MAX_FAILURES_IN_A_ROW} step tests in a row not acquired" in line



def test_a_run_switches_off_an_output_a_killed_run_left_on_before_anything_else(linked, visa) -> None:
    bench, _, profile = linked
    session = visa(bench.resources["generator"])
    session.write("OUTPut ON")  # as a run SIGKILLed mid-measurement leaves it
    assert session.query("OUTPut?") in ("1", "ON")
    bench.scope.start_logging()
    started = time.monotonic()
    assert main(["run", str(profile), "-n", "1"]) == 0
    # Housekeeping that drives nothing: who answers (*IDN?), the status emptied and read (*CLS, SYSTem:ERRor?,
    # *ESR?; IEEE 488.2 §10.3, §11.5.1; SCPI-1999 Vol 2 §21.8).
    quiet = ("*IDN?", "*CLS", "SYSTEM:ERROR?", "*ESR?")
    first_off = next(e.monotonic_s for e in bench.generator.command_log
                     if e.monotonic_s > started and e.text.upper() == "OUTPUT OFF")
    first_scope_setting = next(e.monotonic_s for e in bench.scope.command_log
                               if e.monotonic_s > started and e.text.upper() not in quiet)
    assert first_off < first_scope_setting  # the output goes off before the scope is set up at all

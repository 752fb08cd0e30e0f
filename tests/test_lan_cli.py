"""``acqd sim --transport``: the simulated bench served over the raw socket, HiSLIP and VXI-11 at once, each
resource answering through pyvisa-py; ports in use and wrong values as one line; ``acqd identify`` over each;
pyvisa's own shell (``pyvisa-shell``) as an independent client on every transport.

References: pyvisa-py's clients for each transport (its resource-string parser and protocols); pyvisa's
shell, a program of pyvisa's own; IEEE 488.2 §10.14 (from memory) for the ``*IDN?`` reply, the same
instrument whatever carries it.
"""

from __future__ import annotations

import socket

import pytest

from acqd.cli import main
from acqd.sim.bench import TRANSPORTS, Serving, SimBench
from lanbench import served_beside_the_socket
from served import serving
from visashell import run_shell, session_script


@pytest.mark.timeout(60)
def test_acqd_sim_serves_every_transport_and_json_names_every_resource(visa):
    with serving("sim", "--transport", "all", "--hislip-port", "0", "--no-portmapper") as served:
        assert list(served) == ["socket", "hislip", "vxi11"]
        assert all(sorted(r) == ["divscope", "generator", "scope"] for r in served.values())
        # pyvisa-py parses each resource string and reaches the same instrument through each transport.
        sessions = {transport: {name: visa(resource) for name, resource in resources.items()}
                    for transport, resources in served.items()}
        identities = {transport: {name: s.query("*IDN?") for name, s in opened.items()}
                      for transport, opened in sessions.items()}
        assert identities["hislip"] == identities["vxi11"] == identities["socket"]
        for opened in sessions.values():  # closed while the server is there (a VXI-11 or HiSLIP close to a
            for s in opened.values():     # server that has gone waits out its timeout)
                s.close()
        assert served["hislip"]["scope"].split("::")[2].startswith("hislip1,")
        assert served["vxi11"]["scope"].split("::")[2] == "inst1"


def test_a_hislip_port_in_use_is_one_line_naming_the_option(capsys):
    with socket.socket() as taken:
        taken.bind(("127.0.0.1", 0))
        taken.listen()
        port = taken.getsockname()[1]
        assert main(["sim", "--transport", "hislip", "--hislip-port", str(port)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and "--hislip-port" in err[0] and f"port {port} (hislip)" in err[0]


def test_the_profiles_transport_is_checked(tmp_path, capsys):
    profile = tmp_path / "p.toml"
    profile.write_text('[bench.simulated]\ntransport = "usb"\n')
    assert main(["sim", str(profile)]) == 2
    err = capsys.readouterr().err.strip().splitlines()
    assert len(err) == 1 and str(profile) in err[0] and "bench.simulated.transport" in err[0]
    assert "socket, hislip, vxi11" in err[0]


@pytest.mark.parametrize("transport", ["hislip", "vxi11"])
def test_acqd_identify_names_the_same_driver_over_each_transport(quiet_table, capsys, transport):
    with served_beside_the_socket(quiet_table, transport) as bench:
        printed = {}
        for over in ("socket", transport):
            resource = bench.resources_by_transport[over]["scope"]
            assert main(["identify", resource]) == 0
            out = capsys.readouterr().out
            assert out.startswith(f"{resource}: acqd-sim,DIG,")
            printed[over] = out.split("\n", 1)[1]  # the driver line, the same whatever carries *IDN?
    assert printed[transport] == printed["socket"] and "scpi-digitiser" in printed["socket"]


@pytest.mark.timeout(90)
def test_pyvisa_shell_opens_queries_and_closes_on_every_transport():
    """One pyvisa-shell session opens the generator over each transport in turn (VXI-11 without a portmapper
    here; tests/vxi11_netns.py does it through the portmapper on port 111)."""
    with SimBench(serving=Serving(TRANSPORTS)) as bench:
        frequencies_hz = [2000 + 1000 * n for n in range(len(TRANSPORTS))]  # each session sets its own
        scripts = [session_script(bench.resources_by_transport[t]["generator"], f)
                   for t, f in zip(TRANSPORTS, frequencies_hz)]
        replies, printed = run_shell([line for script in scripts for line in script])
    # Per transport: the *IDN? reply (acqd-sim's, IEEE 488.2 §10.14's four fields) and FREQ? after that
    # session's FREQ (the instrument's NR3 form, SCPI-1999 Vol 1 §7.2.1.3, from memory).
    assert len(replies) == 2 * len(TRANSPORTS), printed
    for idn, frequency, set_hz in zip(replies[::2], replies[1::2], frequencies_hz, strict=True):
        assert idn.startswith("acqd-sim,FG,") and len(idn.split(",")) == 4
        assert float(frequency) == set_hz
    assert printed.count("has been opened") == printed.count("has been closed") == len(TRANSPORTS)
    assert "VI_ERROR" not in printed

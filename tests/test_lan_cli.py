"""``acqd sim --transport``: the simulated bench served over the raw socket, HiSLIP and VXI-11 at once, each
resource answering through pyvisa-py; ports in use and wrong values as one line; ``acqd identify`` over each.

References: pyvisa-py's clients for each transport (its resource-string parser and protocols); IEEE 488.2
§10.14 (from memory) for the ``*IDN?`` reply, the same instrument whatever carries it.
"""

from __future__ import annotations

import socket

import pytest

from acqd.cli import main
from lanbench import served_beside_the_socket
from served import serving


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

"""Run inside a network namespace of the test's own (``unshare -rn``): loopback up, the simulated bench's
VXI-11 server with its portmapper on port 111, and pyvisa-py, pyvisa's shell (``pyvisa-shell``) and
python-vxi11 finding the core channel through it.

Prints one JSON line of what it saw; the test (test_vxi11.py) checks it. Nothing outside the namespace is
touched: it has its own loopback and its own port 111.
"""

from __future__ import annotations

import fcntl
import json
import socket
import struct
import sys

SIOCGIFFLAGS, SIOCSIFFLAGS, IFF_UP = 0x8913, 0x8914, 0x1  # linux/sockios.h, linux/if.h
IFREQ = "16sh22x"  # struct ifreq on Linux: the name, then the flags in a 24-byte union


def loopback_up() -> None:
    """``ip link set lo up`` without iproute2: SIOCSIFFLAGS with IFF_UP (netdevice(7))."""
    with socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as sock:
        flags = struct.unpack(IFREQ, fcntl.ioctl(sock, SIOCGIFFLAGS, struct.pack(IFREQ, b"lo", 0)))[1]
        fcntl.ioctl(sock, SIOCSIFFLAGS, struct.pack(IFREQ, b"lo", flags | IFF_UP))


def independent_client() -> dict[str, object] | None:
    """What the python-vxi11 package (another VXI-11 client, of its own RPC code) sees; None without it."""
    try:
        import vxi11
    except ImportError:
        return None
    seen: dict[str, object] = {}
    scope = vxi11.Instrument("127.0.0.1", "inst1")
    seen["idn"] = scope.ask("*IDN?")
    scope.write("BOGUs")
    seen["stb_after_error"] = scope.read_stb()
    seen["error"] = scope.ask("SYSTem:ERRor?")
    scope.lock()
    scope.unlock()
    scope.clear()
    scope.local()
    scope.remote()
    scope.abort()  # the abort channel, with nothing in progress: no error
    try:
        scope.trigger()
        seen["trigger"] = 0
    except vxi11.vxi11.Vxi11Exception as exc:
        seen["trigger"] = exc.err
    seen["idn_again"] = scope.ask("*IDN?")
    scope.close()
    return seen


def main() -> int:
    loopback_up()
    import pyvisa
    from pyvisa_py.protocols import rpc, vxi11

    from acqd.sim.bench import Serving, SimBench
    from acqd.visa import Session
    from visashell import run_shell, session_script  # pyvisa's shell, in this namespace too

    bench = SimBench(serving=Serving(("vxi11",), portmapper_port=rpc.PMAP_PORT)).start()
    try:
        seen: dict[str, object] = {"resources": bench.resources}
        mapper = rpc.TCPPortMapperClient("127.0.0.1")
        seen["getport_core"] = mapper.get_port((vxi11.DEVICE_CORE_PROG, vxi11.DEVICE_CORE_VERS, rpc.IPPROTO_TCP, 0))
        seen["getport_unknown"] = mapper.get_port((0x20000000, 1, rpc.IPPROTO_TCP, 0))
        seen["dump"] = sorted(tuple(m) for m in mapper.dump())
        mapper.close()
        rm = pyvisa.ResourceManager("@py")
        gen = rm.open_resource(bench.resources["generator"], read_termination="\n", write_termination="\n")
        seen["idn"] = gen.query("*IDN?")
        seen["core_port"] = gen.visalib.sessions[gen.session].interface.port
        gen.close()
        with Session(bench.resources["scope"]) as scope:
            seen["scope_idn"] = scope.identity
        seen["python_vxi11"] = independent_client()
        seen["pyvisa_shell"] = run_shell(session_script(bench.resources["generator"], 5000))[0]
    finally:
        bench.stop()
    print(json.dumps(seen))
    return 0


if __name__ == "__main__":
    sys.exit(main())

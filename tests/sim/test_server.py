"""Raw-SCPI socket server: plain sockets, pyvisa-py, concurrent clients, the shared lock, stop()."""

from __future__ import annotations

import socket
import threading
from collections.abc import Iterator

import pytest
import pyvisa

from tonebench.sim import scpi_parser as scpi
from tonebench.sim.scpi_parser import ScpiDevice, parse_number
from tonebench.sim.server import InstrumentServer

TIMEOUT_S = 5.0
IDN = "Toy Works,S1,0002,1.0"


class ToySource(ScpiDevice):
    def __init__(self) -> None:
        super().__init__(IDN)
        self.freq_hz = 1e9
        self.command("[SOURce]:FREQuency", self._set_freq, nparams=1)
        self.query("[SOURce]:FREQuency", lambda p: f"{self.freq_hz:.1f}", nparams=0)
        self.command("CRASh", self._crash, nparams=0)

    def _set_freq(self, params: list[str]) -> None:
        self.freq_hz = parse_number(params[0], "HZ")

    def _crash(self, params: list[str]) -> None:
        raise RuntimeError("simulated bug")


class LineClient:
    """Minimal newline-framed client over a plain socket."""

    def __init__(self, port: int) -> None:
        self.sock = socket.create_connection(("127.0.0.1", port), timeout=TIMEOUT_S)
        self.buffer = b""

    def send(self, text: str) -> None:
        self.sock.sendall(text.encode("ascii"))

    def read_line(self) -> str:
        while b"\n" not in self.buffer:
            chunk = self.sock.recv(4096)
            if not chunk:
                raise ConnectionError("closed by server")
            self.buffer += chunk
        line, self.buffer = self.buffer.split(b"\n", 1)
        return line.decode("ascii")

    def query(self, text: str) -> str:
        self.send(text + "\n")
        return self.read_line()

    def close(self) -> None:
        self.sock.close()


@pytest.fixture
def server() -> Iterator[InstrumentServer]:
    with InstrumentServer(ToySource(), threading.RLock()) as srv:
        yield srv


def test_plain_socket_query_and_set(server: InstrumentServer) -> None:
    client = LineClient(server.port)
    try:
        assert client.query("*IDN?") == IDN
        # A command gives no reply line, so the next line read is the query's answer;
        # CRLF and LF terminators are both accepted.
        client.send("FREQ 2.5 GHZ\r\nSOUR:FREQ?\r\n")
        assert client.read_line() == "2500000000.0"
        assert client.query("FREQ?;*OPC?") == "2500000000.0;1"
        assert client.query("SYST:ERR?") == '0,"No error"'
    finally:
        client.close()


def test_line_split_across_packets(server: InstrumentServer) -> None:
    client = LineClient(server.port)
    try:
        client.send("*ID")
        client.send("N?")
        client.send("\n")
        assert client.read_line() == IDN
    finally:
        client.close()


def test_pyvisa_py_raw_socket(server: InstrumentServer) -> None:
    rm = pyvisa.ResourceManager("@py")
    try:
        inst = rm.open_resource(server.resource, read_termination="\n", write_termination="\n")
        inst.timeout = int(TIMEOUT_S * 1000)
        assert inst.query("*IDN?") == IDN
        inst.write("SOUR:FREQ 123456789.000")
        assert float(inst.query("SOUR:FREQ?")) == 123456789.0
        inst.write("BOGUS")
        assert inst.query("SYST:ERR?").startswith('-113,"Undefined header')
        inst.close()
    finally:
        rm.close()


def test_resource_string(server: InstrumentServer) -> None:
    assert server.resource == f"TCPIP0::127.0.0.1::{server.port}::SOCKET"
    assert server.port > 0


def test_two_clients_are_served_independently(server: InstrumentServer) -> None:
    first, second = LineClient(server.port), LineClient(server.port)
    try:
        first.send("*IDN")  # an unfinished line must not block the other client
        assert second.query("FREQ 3e9;FREQ?") == "3000000000.0"
        first.send("?\n")
        assert first.read_line() == IDN
        # Both see the one instrument state.
        assert first.query("FREQ?") == "3000000000.0"
    finally:
        first.close()
        second.close()


def test_lines_wait_for_the_shared_lock() -> None:
    lock = threading.RLock()
    with InstrumentServer(ToySource(), lock) as srv:
        client = LineClient(srv.port)
        try:
            with lock:
                client.send("*IDN?\n")
                client.sock.settimeout(0.3)
                with pytest.raises(socket.timeout):
                    client.read_line()
            client.sock.settimeout(TIMEOUT_S)
            assert client.read_line() == IDN
        finally:
            client.close()


def test_handler_bug_is_reported_and_connection_survives(server: InstrumentServer) -> None:
    client = LineClient(server.port)
    try:
        client.send("CRASH\n")
        assert client.query("SYST:ERR?").startswith(f'{scpi.DEVICE_SPECIFIC_ERROR},"Device-specific error')
        assert client.query("*IDN?") == IDN
    finally:
        client.close()


def test_stop_closes_clients_and_frees_the_port() -> None:
    srv = InstrumentServer(ToySource(), threading.RLock())
    srv.start()
    port = srv.port
    client = LineClient(port)
    assert client.query("*IDN?") == IDN
    srv.stop()
    assert client.sock.recv(16) == b""  # the server closed the connection
    client.close()
    with pytest.raises(ConnectionRefusedError):
        socket.create_connection(("127.0.0.1", port), timeout=TIMEOUT_S)
    # The same port can be served again at once.
    with InstrumentServer(ToySource(), threading.RLock(), port=port) as again:
        assert again.port == port
        other = LineClient(port)
        try:
            assert other.query("*IDN?") == IDN
        finally:
            other.close()
    srv.stop()  # a second stop is harmless


@pytest.mark.parametrize("host", ["0.0.0.0", "192.168.1.10", "10.0.0.1", "example.com", "::1", ""])
def test_non_loopback_host_is_refused(host: str) -> None:
    with pytest.raises(ValueError, match="loopback"):
        InstrumentServer(ToySource(), threading.RLock(), host=host)


@pytest.mark.parametrize("host", ["127.0.0.1", "127.0.0.2", "localhost"])
def test_loopback_hosts_are_accepted(host: str) -> None:
    with InstrumentServer(ToySource(), threading.RLock(), host=host) as srv:
        assert srv.resource.startswith("TCPIP0::127.0.0.")

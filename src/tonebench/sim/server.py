"""Raw-SCPI socket server for one simulated instrument on loopback (newline-terminated lines)."""

from __future__ import annotations

import ipaddress
import logging
import socket
import struct
import threading
import time

from tonebench.sim.faults import FaultSchedule, FaultSpec
from tonebench.sim.scpi_parser import DEVICE_SPECIFIC_ERROR, STANDARD_MESSAGES, ScpiDevice

_log = logging.getLogger(__name__)

_ACCEPT_POLL_S = 0.1  # how often the accept loop checks for stop()
_RECV_BYTES = 4096


class InstrumentServer:
    """Serves one ScpiDevice as a raw-SCPI socket on loopback: newline-terminated lines.

    Each line is handled under `lock`, which all instruments of one simulated bench share so the
    physics sees one consistent state. Several clients may connect at once. `faults` (settable at
    any time) injects the faults scheduled for `name` (by default the device's own name).
    """

    def __init__(self, device: ScpiDevice, lock: threading.RLock, host: str = "127.0.0.1", port: int = 0,
                 *, name: str | None = None, faults: FaultSchedule | None = None):
        self.name = name if name is not None else getattr(device, "name", "")
        self.faults = faults
        # Wall-clock (time.monotonic) end of a stall: until then no line of any connection is served.
        self._stalled_until = 0.0
        self._host = _loopback_ipv4(host)
        self._requested_port = port
        self._device = device
        self._lock = lock
        self._listener: socket.socket | None = None
        self._stopping = threading.Event()
        self._accept_thread: threading.Thread | None = None
        self._clients: dict[socket.socket, threading.Thread] = {}
        self._clients_lock = threading.Lock()
        # Connections reset by a power cycle: a line that reached one before its serving thread
        # woke (Linux still delivers data after SHUT_RD) must not be answered.
        self._reset: set[socket.socket] = set()

    @property
    def port(self) -> int:
        """The listening port (the one picked by the OS when 0 was asked); only valid after start()."""
        if self._listener is None:
            raise RuntimeError("InstrumentServer.port: the server is not started")
        return self._listener.getsockname()[1]

    @property
    def resource(self) -> str:
        """VISA resource string for pyvisa-py's raw socket session."""
        return f"TCPIP0::{self._host}::{self.port}::SOCKET"

    def start(self) -> None:
        """Bind, listen and start the accept thread; returns once connections are accepted."""
        if self._listener is not None:
            raise RuntimeError("InstrumentServer.start: already started")
        listener = socket.socket(socket.AF_INET, socket.SOCK_STREAM)
        # Lets a restarted bench take the same port while old connections sit in TIME_WAIT.
        listener.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        try:
            listener.bind((self._host, self._requested_port))
            listener.listen()
        except OSError:
            listener.close()
            raise
        listener.settimeout(_ACCEPT_POLL_S)
        self._listener = listener
        self._stopping.clear()
        self._accept_thread = threading.Thread(
            target=self._accept_loop, name=f"scpi-accept-{self.port}", daemon=True
        )
        self._accept_thread.start()

    def stop(self) -> None:
        """Close the listener and every client connection, then join the threads. Safe to repeat."""
        self._stopping.set()
        if self._accept_thread is not None:
            self._accept_thread.join()
            self._accept_thread = None
        if self._listener is not None:
            self._listener.close()
            self._listener = None
        with self._clients_lock:
            clients = list(self._clients.items())
        for conn, _thread in clients:
            # shutdown() wakes the client thread blocked in recv().
            try:
                conn.shutdown(socket.SHUT_RDWR)
            except OSError:
                pass
        for conn, thread in clients:
            thread.join()
            conn.close()

    def __enter__(self) -> InstrumentServer:
        self.start()
        return self

    def __exit__(self, *exc_info: object) -> None:
        self.stop()

    def _accept_loop(self) -> None:
        assert self._listener is not None
        while not self._stopping.is_set():
            try:
                conn, _addr = self._listener.accept()
            except socket.timeout:
                continue
            except OSError:
                return
            conn.settimeout(None)
            thread = threading.Thread(target=self._serve_client, args=(conn,), daemon=True,
                                      name=f"scpi-client-{self.port}")
            with self._clients_lock:
                self._clients[conn] = thread
            thread.start()

    def _serve_client(self, conn: socket.socket) -> None:
        buffer = b""
        try:
            while not self._stopping.is_set():
                chunk = conn.recv(_RECV_BYTES)
                if not chunk:
                    return
                buffer += chunk
                while b"\n" in buffer:
                    if conn in self._reset:
                        return
                    raw, buffer = buffer.split(b"\n", 1)
                    line = raw.rstrip(b"\r").decode("ascii", errors="replace")
                    if not self._serve_line(conn, line):
                        return
        except OSError:
            return  # the client went away or stop() shut the socket
        finally:
            with self._clients_lock:
                self._clients.pop(conn, None)
                self._reset.discard(conn)
            conn.close()

    def _serve_line(self, conn: socket.socket, line: str) -> bool:
        """Execute one line (with any fault due on it) and send its reply; False ends the connection."""
        self._wait_out_stall()
        due = self.faults.faults_for(self.name, line) if self.faults is not None else []
        execute, stall, unsettle, replaced = True, None, None, None
        for spec in due:
            if spec.kind == "drop":
                _abort(conn)
                return False
            if spec.kind == "reboot":
                with self._lock:
                    self._device.power_cycle()
                if not spec.keep_connection:
                    self._abort_all(last=conn)
                    return False
            elif spec.kind == "error":
                with self._lock:
                    message = STANDARD_MESSAGES.get(spec.code, "Device-specific error")
                    self._device.push_error(spec.code, f"{message};simulated fault on {line.strip()!r}")
                execute = execute and "?" in line  # a command in error is not executed
            elif spec.kind == "stall":
                stall = spec
            elif spec.kind in ("unsettled", "drift"):
                unsettle = spec
            elif spec.kind == "reading":
                replaced = spec.reading
        reply = self._reply_for(line) if execute else None
        if replaced is not None and reply is not None:
            reply = replaced
        if unsettle is not None:
            self._unsettle(unsettle)
        if stall is not None:
            self._stalled_until = max(self._stalled_until, time.monotonic() + stall.duration_s)
            self._wait_out_stall()
            if not stall.late_reply:
                reply = None
        if reply is not None:
            conn.sendall(reply.encode("ascii", errors="replace") + b"\n")
        return True

    def _wait_out_stall(self) -> None:
        # An Event wait rather than a sleep so that stop() ends a stall at once.
        while not self._stopping.is_set():
            remaining_s = self._stalled_until - time.monotonic()
            if remaining_s <= 0.0:
                return
            self._stopping.wait(remaining_s)

    def _unsettle(self, spec: FaultSpec) -> None:
        """An unsettled or drift fault: the source's level moves on the virtual clock."""
        hook = getattr(self._device, "unsettle" if spec.kind == "unsettled" else "drift", None)
        if hook is None:
            _log.warning("%s: a %s fault needs a source device; ignored", self.name, spec.kind)
            return
        with self._lock:
            if spec.kind == "unsettled":
                hook(spec.level_error_db, spec.duration_s)
            else:
                hook(spec.drift_db_per_s)

    def _abort_all(self, last: socket.socket | None = None) -> None:
        """Reset every connection of this instrument (a power cycle). The connection whose line
        caused it goes last: once its client sees the reset, no other connection is served again."""
        with self._clients_lock:
            clients = [conn for conn in self._clients if conn is not last]
            self._reset.update(clients)
        for conn in clients + ([last] if last is not None else []):
            _abort(conn)

    def _reply_for(self, line: str) -> str | None:
        """Reply text for one received line, or None. The one place where per-line faults can be added."""
        with self._lock:
            try:
                return self._device.handle_line(line)
            except Exception:
                # A bug in a simulated instrument: keep serving, but log it and tell the client
                # through the error queue rather than leaving it to time out silently.
                _log.exception("simulated instrument failed on %r", line)
                self._device.push_error(DEVICE_SPECIFIC_ERROR, STANDARD_MESSAGES[DEVICE_SPECIFIC_ERROR])
                return None


def _abort(conn: socket.socket) -> None:
    """Make the connection end with a TCP reset, as when an instrument drops off the network.

    SO_LINGER with a zero timeout makes close() send RST instead of FIN, so the client sees
    "connection reset" at once rather than waiting out its read timeout; shutdown(SHUT_RD) wakes
    the thread serving this connection, whose close() then sends the reset.
    """
    try:
        conn.setsockopt(socket.SOL_SOCKET, socket.SO_LINGER, struct.pack("ii", 1, 0))
        conn.shutdown(socket.SHUT_RD)
    except OSError:
        pass  # already gone


def _loopback_ipv4(host: str) -> str:
    """The IPv4 loopback address to bind to; anything else is refused so the bench is never exposed."""
    if host == "localhost":
        return "127.0.0.1"
    try:
        address = ipaddress.ip_address(host)
    except ValueError:
        address = None
    if address is None or address.version != 4 or not address.is_loopback:
        raise ValueError(f"InstrumentServer host {host!r}: must be an IPv4 loopback address (127.0.0.0/8 or 'localhost')")
    return host

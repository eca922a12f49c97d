"""Opening VISA resources (hardware or the simulated bench) with a dialect's I/O settings."""

from __future__ import annotations

import socket

import pyvisa

from tonebench.errors import InputError, InstrumentError
from tonebench.config.resource_names import ALLOWED_FORMS, check_resource_name  # noqa: F401 - named here too
from tonebench.instruments.dialect import Dialect

_manager: pyvisa.ResourceManager | None = None


def resource_manager() -> pyvisa.ResourceManager:
    """The one pyvisa-py resource manager of this process, created on first use.

    pyvisa hands out one shared manager per backend, so anyone's close() closes ours too: a
    closed one is replaced rather than failing every later open (a worker runs for days).
    """
    global _manager
    if _manager is not None:
        try:
            _manager.session
        except pyvisa.errors.InvalidSession:
            _manager = None
    if _manager is None:
        _manager = pyvisa.ResourceManager("@py")
    return _manager


class Unreachable(InstrumentError):
    """An instrument that cannot be connected to, or does not answer its identify query."""


def open_resource(resource: str, dialect: Dialect, rm: pyvisa.ResourceManager | None = None):
    """Open `resource` with the dialect's terminations and timeout, and check that it answers.

    pyvisa-py opens a SOCKET resource without noticing a refused connection, so the dialect's
    identify query is sent once here: an instrument that cannot be reached fails now, as bad
    input, not halfway through a run.
    """
    check_resource_name(resource)
    try:
        handle, _idn = connect(resource, dialect, rm)
    except Unreachable as exc:
        raise InputError(str(exc)) from None
    return handle


def connect(resource: str, dialect: Dialect, rm: pyvisa.ResourceManager | None = None) -> tuple[object, str]:
    """Open `resource` (terminations, timeout, TCP_NODELAY); return the handle and its identify reply.

    Raises Unreachable when the instrument cannot be reached or does not identify itself. Also
    used to reopen a connection during a run, where that is a fault to retry, not bad input.
    """
    rm = rm if rm is not None else resource_manager()
    timeout_ms = round(dialect.io.query_timeout_s * 1000)
    where = f"{resource} ({dialect.role})"
    try:
        handle = rm.open_resource(
            resource,
            read_termination=dialect.io.read_termination,
            write_termination=dialect.io.write_termination,
            timeout=timeout_ms,
            open_timeout=timeout_ms,
        )
    except (pyvisa.errors.VisaIOError, OSError) as exc:
        raise Unreachable(f"cannot reach {where}: {_reason(exc)}") from None
    _disable_nagle(handle)
    try:
        idn = handle.query(dialect.operations["identify"].template).strip()
    except pyvisa.errors.VisaIOError as exc:
        handle.close()
        if exc.error_code == pyvisa.constants.StatusCode.error_timeout:
            reason = f"no reply to identify within {dialect.io.query_timeout_s:g} s"
        else:
            reason = _reason(exc)
        raise Unreachable(f"cannot reach {where}: {reason}") from None
    except OSError as exc:
        handle.close()
        raise Unreachable(f"cannot reach {where}: {_reason(exc)}") from None
    return handle, idn


def _disable_nagle(handle) -> None:
    """Send each command at once on a raw socket.

    With Nagle's algorithm on, a short command followed by `*OPC?` waits for the instrument's
    delayed ACK (about 40 ms on Linux) before the query leaves: a hidden fixed delay per point.
    pyvisa-py 0.8 does not accept VI_ATTR_TCPIP_NODELAY on SOCKET sessions, so the option is set
    on its socket directly when the standard attribute is refused.
    """
    if handle.resource_info.interface_type != pyvisa.constants.InterfaceType.tcpip:
        return
    try:
        handle.set_visa_attribute(pyvisa.constants.VI_ATTR_TCPIP_NODELAY, pyvisa.constants.VI_TRUE)
        return
    except Exception:  # noqa: BLE001 - refused by this backend: fall back to the socket itself
        pass
    sock = getattr(handle.visalib.sessions.get(handle.session), "interface", None)
    if isinstance(sock, socket.socket):
        sock.setsockopt(socket.IPPROTO_TCP, socket.TCP_NODELAY, 1)


def _reason(exc: Exception) -> str:
    if isinstance(exc, OSError) and exc.strerror:
        return exc.strerror.lower()
    return str(exc).splitlines()[0] if str(exc) else type(exc).__name__

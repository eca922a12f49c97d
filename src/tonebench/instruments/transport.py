"""Opening VISA resources (hardware or the simulated bench) with a dialect's I/O settings."""

from __future__ import annotations

import logging
import os
import socket

import pyvisa
from pyvisa.util import read_user_library_path

from tonebench.errors import InputError, InstrumentError
from tonebench.config.resource_names import ALLOWED_FORMS, check_resource_name  # noqa: F401 - named here too
from tonebench.instruments.dialect import Dialect

# One resource manager per VISA library (a specification, or what pyvisa's defaults point at).
_managers: dict[str, pyvisa.ResourceManager] = {}
# Every command and reply of every instrument, at DEBUG (the CLI's --trace and -v switch it on).
scpi_trace = logging.getLogger("tonebench.scpi")

LIBRARY_FORMS = ("'@py' (pyvisa-py, installed with tonebench), '@ivi' (an installed vendor VISA), "
                 "a path to a VISA shared library, or 'path@ivi'")


def resource_manager(visa_library: str = "") -> pyvisa.ResourceManager:
    """The resource manager of this process for `visa_library` (pyvisa's specification: '@py',
    '@ivi', a library path), created on first use. "" follows pyvisa's own conventions: the
    PYVISA_LIBRARY environment variable, then ~/.pyvisarc, then an installed VISA, then pyvisa-py.

    pyvisa hands out one shared manager per backend, so anyone's close() closes ours too: a
    closed one is replaced rather than failing every later open (a worker runs for days). A
    library that cannot be loaded is InputError, one line naming it.
    """
    # pyvisa's defaults read the environment and ~/.pyvisarc: a changed one is another library.
    key = visa_library or f"{os.environ.get('PYVISA_LIBRARY', '')}|{read_user_library_path() or ''}"
    manager = _managers.get(key)
    if manager is not None:
        try:
            manager.session
        except pyvisa.errors.InvalidSession:
            manager = None
    if manager is None:
        try:
            manager = pyvisa.ResourceManager(visa_library)
        except ValueError as exc:  # pyvisa: "Wrapper not found: No package named pyvisa_xyz"
            package = str(exc).rsplit(" ", 1)[-1].replace("_", "-")
            raise InputError(f"VISA library {library_origin(visa_library)}: the pyvisa backend package {package} "
                             f"is not installed; allowed: {LIBRARY_FORMS}") from None
        except OSError as exc:  # pyvisa's LibraryError is an OSError: no such shared library
            reason = _reason(exc).rstrip(":")
            if "cannot open shared object file" in str(exc):  # the loader's words, after the path twice
                reason = "no such shared library, or it cannot be loaded"
            raise InputError(f"VISA library {library_origin(visa_library)} cannot be loaded ({reason}); "
                             f"install it, or choose another in [bench] visa_library: {LIBRARY_FORMS}") from None
        _managers[key] = manager
    return manager


def library_in_use(visa_library: str) -> str:
    """The library a manager was opened with, e.g. "'@py', chosen by pyvisa's defaults (...)"."""
    used = _spec_of(resource_manager(visa_library))
    return repr(used) if visa_library else f"{used!r}, {library_origin(visa_library)}"


def _spec_of(rm: pyvisa.ResourceManager) -> str:
    """'@py' for pyvisa-py (any '@name' backend package), else the IVI library's path."""
    backend = type(rm.visalib).__module__.split(".", 1)[0].removeprefix("pyvisa_")
    return f"@{backend}" if backend != "pyvisa" else str(getattr(rm.visalib, "library_path", "") or "@ivi")


def library_origin(visa_library: str) -> str:
    """Which library was asked for and by whom, for a message."""
    if visa_library:
        return repr(visa_library)
    if os.environ.get("PYVISA_LIBRARY"):
        return f"{os.environ['PYVISA_LIBRARY']!r} (from PYVISA_LIBRARY)"
    from_rc = read_user_library_path()
    if from_rc:
        return f"{from_rc!r} (from .pyvisarc)"
    return "chosen by pyvisa's defaults (.pyvisarc, else an installed VISA, else pyvisa-py)"


class Unreachable(InstrumentError):
    """An instrument that cannot be connected to, or does not answer its identify query."""


def open_resource(resource: str, dialect: Dialect, label: str, visa_library: str = ""):
    """Open `resource` with the dialect's terminations and timeout, and check that it answers.

    pyvisa-py opens a SOCKET resource without noticing a refused connection, so the dialect's
    identify query is sent once here: an instrument that cannot be reached fails now, as bad
    input, not halfway through a run.
    """
    check_resource_name(resource)
    try:
        handle, _idn = connect(resource, dialect, label, visa_library)
    except Unreachable as exc:
        raise InputError(str(exc)) from None
    return handle


def connect(resource: str, dialect: Dialect, label: str, visa_library: str = "") -> tuple[object, str]:
    """Open `resource` for the role `label` (terminations, timeout, TCP_NODELAY) through
    `visa_library`; return the handle and its identify reply.

    Raises Unreachable when the instrument cannot be reached or does not identify itself. Also
    used to reopen a connection during a run, where that is a fault to retry, not bad input. A
    resource the library cannot open at all (pyvisa-py without linux-gpib or pyusb) is InputError.
    """
    rm = resource_manager(visa_library)
    timeout_ms = round(dialect.io.query_timeout_s * 1000)
    where = f"{resource} ({label})"
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
    except ValueError as exc:  # pyvisa-py: "Please install PyUSB to use this resource type."
        needs = _reason(exc).split(". ", 1)[0].rstrip(".")
        raise InputError(f"cannot open {where} with VISA library {_spec_of(rm)!r}: {needs}; or set [bench] "
                         "visa_library to one that can (e.g. '@ivi' for an installed vendor VISA)") from None
    disable_nagle(handle)
    if scpi_trace.isEnabledFor(logging.DEBUG):
        _trace(handle, label)
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


def _trace(handle, label: str) -> None:
    """Log every line written to and read from `handle` (pyvisa's query is a write and a read)."""
    write, read = handle.write, handle.read

    def traced_write(message: str, *args, **kwargs):
        scpi_trace.debug("%s > %s", label, message)
        return write(message, *args, **kwargs)

    def traced_read(*args, **kwargs):
        try:
            reply = read(*args, **kwargs)
        except Exception as exc:
            scpi_trace.debug("%s < (no reply: %s)", label, _reason(exc))
            raise
        scpi_trace.debug("%s < %s", label, reply.rstrip("\r\n"))
        return reply

    handle.write, handle.read = traced_write, traced_read


def disable_nagle(handle) -> None:
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

"""VISA resource strings: the forms a bench file may give, checked before any connection."""

from __future__ import annotations

from pyvisa import rname

from tonebench.errors import InputError

ALLOWED_FORMS = (
    "TCPIP0::host::port::SOCKET, TCPIP0::host::INSTR, GPIB0::n::INSTR, "
    "USB0::vendor::product::serial::INSTR, ASRL1::INSTR"
)


def check_resource_name(resource: str, where: str = "") -> None:
    """Raise InputError unless `resource` has the shape of a VISA resource string and its numeric
    fields (board, port, addresses) are numbers; `where` (e.g. "bench file X: instruments.source1")
    starts the message.

    pyvisa's parser takes any text between the '::' (a port 'abc' included) and pyvisa-py then
    fails with a traceback when it opens the socket; checked here, before any connection.
    """
    prefix = f"{where}: " if where else ""
    try:
        parsed = rname.parse_resource_name(resource)
    except ValueError as exc:  # rname.InvalidResourceName is a ValueError
        raise InputError(
            f"{prefix}resource {resource!r} is not a VISA resource string ({exc}); "
            f"allowed forms: {ALLOWED_FORMS}"
        ) from None
    problem = _numeric_field_problem(parsed)
    if problem:
        raise InputError(f"{prefix}resource {resource!r}: {problem}; allowed forms: {ALLOWED_FORMS}")


# Fields that must be whole numbers, with their allowed range (VISA resource syntax; GPIB
# addresses 0..30 from IEEE 488.1, TCP ports 1..65535 from RFC 793).
_NUMERIC_FIELDS = {"board": (0, 10**6), "port": (1, 65535), "primary_address": (0, 30),
                   "secondary_address": (0, 30)}


def _numeric_field_problem(parsed) -> str | None:
    for name, (low, high) in _NUMERIC_FIELDS.items():
        if name == "board" and parsed.interface_type == "ASRL":
            continue  # a serial board may be a device path (ASRL/dev/ttyUSB0::INSTR)
        value = getattr(parsed, name, None)
        if value is None or value == "":
            continue
        text = str(value)
        if not text.isdigit() or not low <= int(text) <= high:
            return f"{name.replace('_', ' ')} {text!r} is not a whole number from {low} to {high}"
    return None

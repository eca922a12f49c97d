"""SCPI error vocabulary of the simulated bench: error codes and texts, the error type, and the
event status bits each error class sets.

SCPI-1999 volume 2 ch. 21 (error codes) and IEEE 488.2 (status bits), cited from memory.
"""

from __future__ import annotations

# Error codes, SCPI-1999 vol 2 ch. 21 (from memory).
NO_ERROR = 0
COMMAND_ERROR = -100
INVALID_CHARACTER = -101
SYNTAX_ERROR = -102
INVALID_SEPARATOR = -103
DATA_TYPE_ERROR = -104
PARAMETER_NOT_ALLOWED = -108
MISSING_PARAMETER = -109
COMMAND_HEADER_ERROR = -110
UNDEFINED_HEADER = -113
HEADER_SUFFIX_OUT_OF_RANGE = -114
NUMERIC_DATA_ERROR = -120
INVALID_SUFFIX = -131
SUFFIX_NOT_ALLOWED = -138
INVALID_STRING_DATA = -151
EXECUTION_ERROR = -200
SETTINGS_CONFLICT = -221
DATA_OUT_OF_RANGE = -222
ILLEGAL_PARAMETER_VALUE = -224
HARDWARE_ERROR = -240
DEVICE_SPECIFIC_ERROR = -300
SYSTEM_ERROR = -310
QUEUE_OVERFLOW = -350
QUERY_ERROR = -400
QUERY_INTERRUPTED = -410
QUERY_UNTERMINATED = -420

STANDARD_MESSAGES: dict[int, str] = {
    NO_ERROR: "No error",
    COMMAND_ERROR: "Command error",
    INVALID_CHARACTER: "Invalid character",
    SYNTAX_ERROR: "Syntax error",
    INVALID_SEPARATOR: "Invalid separator",
    DATA_TYPE_ERROR: "Data type error",
    PARAMETER_NOT_ALLOWED: "Parameter not allowed",
    MISSING_PARAMETER: "Missing parameter",
    COMMAND_HEADER_ERROR: "Command header error",
    UNDEFINED_HEADER: "Undefined header",
    HEADER_SUFFIX_OUT_OF_RANGE: "Header suffix out of range",
    NUMERIC_DATA_ERROR: "Numeric data error",
    INVALID_SUFFIX: "Invalid suffix",
    SUFFIX_NOT_ALLOWED: "Suffix not allowed",
    INVALID_STRING_DATA: "Invalid string data",
    EXECUTION_ERROR: "Execution error",
    SETTINGS_CONFLICT: "Settings conflict",
    DATA_OUT_OF_RANGE: "Data out of range",
    ILLEGAL_PARAMETER_VALUE: "Illegal parameter value",
    HARDWARE_ERROR: "Hardware error",
    DEVICE_SPECIFIC_ERROR: "Device-specific error",
    SYSTEM_ERROR: "System error",
    QUEUE_OVERFLOW: "Queue overflow",
    QUERY_ERROR: "Query error",
    QUERY_INTERRUPTED: "Query INTERRUPTED",
    QUERY_UNTERMINATED: "Query UNTERMINATED",
}

# Standard Event Status Register bits, IEEE 488.2 11.5.1.1 (from memory).
ESR_OPERATION_COMPLETE = 1 << 0
ESR_QUERY_ERROR = 1 << 2
ESR_DEVICE_ERROR = 1 << 3
ESR_EXECUTION_ERROR = 1 << 4
ESR_COMMAND_ERROR = 1 << 5
ESR_POWER_ON = 1 << 7


class ScpiError(Exception):
    """An SCPI error: `code` as in SCPI-1999 vol 2 ch. 21, `message` the text put in the error queue."""

    def __init__(self, code: int, message: str = ""):
        self.code = code
        self.message = message or STANDARD_MESSAGES.get(code, "Error")
        super().__init__(f"{code},{self.message}")


def scpi_error(code: int, detail: str) -> ScpiError:
    # SCPI-1999 vol 2 21.8 (from memory): device info follows the standard text after ';'.
    return ScpiError(code, f"{STANDARD_MESSAGES[code]};{detail}")


def esr_bit(code: int) -> int:
    """Event status bit for an error code class (IEEE 488.2 11.5.1.1 and SCPI-1999 vol 2 21.8, from memory)."""
    if -199 <= code <= -100:
        return ESR_COMMAND_ERROR
    if -299 <= code <= -200:
        return ESR_EXECUTION_ERROR
    if -499 <= code <= -400:
        return ESR_QUERY_ERROR
    if code != NO_ERROR:
        return ESR_DEVICE_ERROR
    return 0

"""Error types shared by every layer.

InputError is for anything a person typed or a file held (plan, bench file, resource string,
database URL): the CLI prints its one-line message and exits with code 2.
InstrumentError is for an instrument that answered wrongly, reported an SCPI error or did not answer.
LimitError is for a setting that would break a limit (a dialect's range, the bench's power limits);
it lives here so the plan's run-time power check and the instrument drivers raise the same class.
"""


class TonebenchError(Exception):
    """Base class for errors tonebench reports in one line."""


class InputError(TonebenchError):
    """Bad input from a file or an option; the message names the source, the field and what is allowed."""


class InstrumentError(TonebenchError):
    """An instrument reported an error, replied with something unparseable, or did not reply."""


class DatabaseError(TonebenchError):
    """The database cannot be used as it is (newer than the code, unreachable, wrong URL)."""


class LimitError(TonebenchError):
    """A setting outside the limits its dialect file declares for the instrument, or one the bench
    file's power limits refuse."""

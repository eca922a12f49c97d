"""A pass-through around a real pyvisa resource that keeps every string written (for the tests
that pin a dialect's exact SCPI strings against a pyvisa-sim dialogue)."""


class Recorder:
    """Passes everything to a real pyvisa resource and keeps the strings written."""

    def __init__(self, resource):
        self._resource = resource
        self.sent: list[str] = []

    def write(self, message):
        self.sent.append(message)
        return self._resource.write(message)

    def query(self, message):
        self.sent.append(message)
        return self._resource.query(message)

    @property
    def timeout(self):
        return self._resource.timeout

    @timeout.setter
    def timeout(self, value):
        self._resource.timeout = value

    def close(self):
        self._resource.close()

"""Which of the two sources the sequencer has switched on, so each is only told when its state
changes."""

from __future__ import annotations


class RfSwitches:
    def __init__(self, bench):
        self.bench = bench
        self.on = [False, False]

    @property
    def all_on(self) -> bool:
        return all(self.on)

    def set(self, on1: bool, on2: bool) -> None:
        """Switch each source only if its state changes (off first, so two tones never meet the meter)."""
        wanted = [on1, on2]
        for index in sorted((0, 1), key=lambda i: wanted[i]):
            if self.on[index] != wanted[index]:
                source = self.bench.sources()[index]
                source.rf_on() if wanted[index] else source.rf_off()
                self.on[index] = wanted[index]

    def take_from_sources(self) -> None:
        """After a restore the sources are as they were last told to be."""
        self.on = [source.wanted.rf_on for source in self.bench.sources()]

    def forget(self) -> None:
        """The run is ending: whatever the sources are, RF is switched off by the bench next."""
        self.on = [False, False]

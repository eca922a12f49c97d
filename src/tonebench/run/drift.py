"""Slow level drift of a source across the points of a run (not within one point: point_guard.py's
settle check covers that).

What is watched: the difference between the two tones' analyzer readings, f1 minus f2 (dB). Both
tones are set to the same power at the DUT input, pass the same paths at fixed frequencies within
a sweep, and compress together (equal drive), and an attenuation change moves both alike; so in a
sweep the difference stays constant to within the reading noise, from the noise floor up to
compression. A source whose real output moves while it reports its setting moves that difference.
The settle check cannot see it: a level moving linearly with time lies on the line through the
sweep's last two points, which is what it extrapolates.

- In a sweep: the excursion from the sweep's first point beyond `tolerance_db`, one-sided over
  three consecutive points (the two before it on the same side), is drift: one event per sweep,
  and a reason with every point of that sweep from then on whose excursion is beyond tolerance.
- Revisited: the same f1, f2 and tone power measured again in another sweep (a bias sweep, a
  resumed run) must give the same difference within `tolerance_db`.

Not seen: a drift both sources share (it looks like a change of DUT gain, which compression also
makes); a power meter bench re-levels every sweep, which takes such a drift out between sweeps.
This module never touches instruments or the store: events leave through `log.event`.
"""

from __future__ import annotations

from dataclasses import dataclass, field

from tonebench.plan.axes import SweepKey

# Consecutive points of a sweep on the same side of its first point before a move counts as drift.
ONE_SIDED_POINTS = 3


@dataclass
class _Sweep:
    """The tone differences (dB) of a sweep's accepted points, in measuring order."""

    diffs_db: list[float] = field(default_factory=list)
    reported: bool = False

    def excursions_db(self) -> list[float]:
        return [diff_db - self.diffs_db[0] for diff_db in self.diffs_db]


class DriftTracker:
    """Fed with each accepted point; returns the point's drift reason or None. 0 dB disables it."""

    def __init__(self, tolerance_db: float, log):
        self.tolerance_db = tolerance_db
        self.log = log
        self._sweeps: dict[SweepKey, _Sweep] = {}
        self._first_seen: dict[tuple[float, float, float], tuple[SweepKey, float]] = {}
        self.events = 0

    def observe(self, point, f1_dbm: float, f2_dbm: float) -> str | None:
        """Record one accepted point (its raw tone readings, dBm); the drift reason, or None."""
        if self.tolerance_db <= 0:
            return None
        diff_db = f1_dbm - f2_dbm
        sweep_key = point.sweep_key
        sweep = self._sweeps.setdefault(sweep_key, _Sweep())
        sweep.diffs_db.append(diff_db)
        reasons = [reason for reason in (self._in_sweep(point, sweep), self._revisited(point, sweep_key, diff_db))
                   if reason]
        return "; ".join(reasons) or None

    def _in_sweep(self, point, sweep: _Sweep) -> str | None:
        excursions = sweep.excursions_db()
        moved_db = excursions[-1]
        if abs(moved_db) <= self.tolerance_db:
            return None
        recent = excursions[-ONE_SIDED_POINTS:]
        one_sided = len(recent) == ONE_SIDED_POINTS and all(e * moved_db > 0 for e in recent)
        if not (one_sided or sweep.reported):
            return None
        reason = (f"source drift: the f1-f2 tone difference moved {moved_db:+.2f} dB since the sweep's first "
                  f"point (tolerance {self.tolerance_db:g} dB)")
        if not sweep.reported:
            sweep.reported = True
            self._say(point, reason, {"moved_db": moved_db, "excursions_db": [round(e, 4) for e in excursions]})
        return reason

    def _revisited(self, point, sweep_key: SweepKey, diff_db: float) -> str | None:
        tones = (point.f1_hz, point.f2_hz, point.tone_dbm)
        first_sweep, first_db = self._first_seen.setdefault(tones, (sweep_key, diff_db))
        moved_db = diff_db - first_db
        if first_sweep == sweep_key or abs(moved_db) <= self.tolerance_db:
            return None
        reason = (f"source drift: the f1-f2 tone difference moved {moved_db:+.2f} dB since these tones were "
                  f"measured in an earlier sweep (tolerance {self.tolerance_db:g} dB)")
        self._say(point, reason, {"moved_db": moved_db, "revisit": True})
        return reason

    def _say(self, point, reason: str, details: dict) -> None:
        self.events += 1
        self.log.event("warning", "source-drift", f"point {point.name}: {reason}",
                       {"point_key": point.key, "tolerance_db": self.tolerance_db, **details})

"""The numbers a dialect file may declare per role ([limits], [performance], [status]): one list,
read by the dialect loader (instruments/dialect.py) and by the bench file, which may override the
analyzer's [performance] figures."""

from __future__ import annotations

# The numbers of [limits], [performance] and [status] per role: (required, optional) keys. These
# are the keys the role drivers, the safety checks and the planning read (instruments/*.py,
# safety.py, sequencer.py, runner.py); any other key is refused, so a misspelled one cannot
# silently remove a limit. The analyzer's damage level is required: the safety checks and the
# reply judging (an impossible reading) need it.
KNOWN_LIMITS: dict[str, tuple[tuple[str, ...], tuple[str, ...]]] = {
    "source": (("min_power_dbm", "max_power_dbm", "min_freq_hz", "max_freq_hz"), ()),
    "analyzer": (("min_freq_hz", "max_freq_hz", "min_atten_db", "max_atten_db", "damage_dbm"),
                 ("max_mixer_dbm", "atten_step_db")),
    "power_meter": (("min_power_dbm", "max_power_dbm", "min_freq_hz", "max_freq_hz"), ()),
    # Voltage may be negative (a depletion-mode gate); the current limit is a magnitude.
    "supply": (("min_voltage_v", "max_voltage_v", "min_current_a", "max_current_a"), ()),
    "chamber": (("min_temp_c", "max_temp_c"), ()),
}
# level_accuracy_db is optional here and may also come from the bench file, which takes the same
# keys (config/bench_file.py reads ANALYZER_PERFORMANCE_KEYS).
KNOWN_PERFORMANCE: dict[str, tuple[tuple[str, ...], tuple[str, ...]]] = {
    # LO phase noise (dBc/Hz) at a stated offset: the reciprocal-mixing check at close spacing.
    "analyzer": (("mixer_toi_dbm", "danl_dbm_per_hz", "sweep_time_factor"),
                 ("level_accuracy_db", "mixer_shi_dbm", "phase_noise_dbc_per_hz", "phase_noise_offset_hz")),
    # How long a new frequency or level takes to be in force: the bench-time estimate's share.
    "source": ((), ("settle_time_s",)),
}
ANALYZER_PERFORMANCE_KEYS: tuple[str, ...] = sum(KNOWN_PERFORMANCE["analyzer"], ())
KNOWN_STATUS: dict[str, tuple[tuple[str, ...], tuple[str, ...]]] = {"analyzer": (("overload_bit",), ())}

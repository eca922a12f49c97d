"""assess_sweeps (many sweeps back to back, the point-by-point steps run once over all their points)
gives each sweep what assess_sweep gives it alone: flags with their texts, bound terms' names,
step changes, notes and refusal reasons exactly, and every number to 1e-9 relative (the fit of
the valid region runs as segment reductions over all the sweeps, its sums in another order). Sweeps measured on the simulated bench, one of
each kind the flags know (clean with step reads, analyzer-made IM3, source intermod, noise,
compression), each with its own settings."""

import dataclasses
import math

import numpy as np
import pytest
from simsweep import measure_sweep

from tonebench.analysis import AnalysisSettings, assess_sweep
from tonebench.analysis.assess import SweepData, assess_sweeps
from tonebench.errors import InputError
from tonebench.sim.scenario import Scenario

CENTER_HZ, SPACING_HZ = 2.45e9, 1e6
DUT = {"gain_db": 15.0, "iip3_dbm": -2.0, "p1db_dbm": -12.0}

# (analyzer, sources, tones, atten_db, mixer TOI, system IP3): the kinds test_simulated_scenarios checks.
KINDS = {
    "clean": ({}, {}, np.arange(-34.0, -21.0, 2.0), None, 15.0, 45.0),
    "analyzer": ({"mixer_toi_dbm": 5.0}, {}, np.arange(-40.0, -25.0, 2.0), 0.0, 5.0, None),
    "source": ({}, {"system_ip3_dbm": 5.0}, np.arange(-34.0, -21.0, 2.0), None, 15.0, 5.0),
    "noise": ({}, {}, np.arange(-60.0, -43.0, 2.0), None, 15.0, None),
    "compressed": ({}, {}, np.arange(-34.0, -5.0, 2.0), None, None, None),
}


def measured(kind: str) -> tuple[SweepData, AnalysisSettings]:
    analyzer, sources, tones, atten_db, toi_dbm, system_ip3_dbm = KINDS[kind]
    sc = Scenario(seed=7, coherent_phase_deg=0.0, dut=DUT, analyzer={"level_error_db": 0.4, **analyzer}, sources=sources)
    data = measure_sweep(sc, CENTER_HZ, SPACING_HZ, tones, atten_db=atten_db, mixer_toi_dbm=toi_dbm or 15.0)
    return data, AnalysisSettings(mixer_toi_dbm=toi_dbm, max_mixer_dbm=-10.0, system_ip3_dbm=system_ip3_dbm)


def joined(datas: list[SweepData]) -> tuple[SweepData, list[slice]]:
    """The sweeps' arrays back to back, and each one's slice of them."""
    arrays = [d.arrays() for d in datas]
    stops = np.cumsum([a["tone_dbm"].size for a in arrays]).tolist()
    parts = [slice(start, stop) for start, stop in zip([0, *stops[:-1]], stops)]
    return SweepData(**{name: np.concatenate([a[name] for a in arrays]) for name in arrays[0]}), parts


def plain(value):
    """Any result as nested plain values, NaN spelled out, so that == compares bit for bit."""
    if dataclasses.is_dataclass(value):
        return {f.name: plain(getattr(value, f.name)) for f in dataclasses.fields(value)}
    if isinstance(value, np.ndarray):
        return [plain(v) for v in value.tolist()]
    if isinstance(value, dict):
        return {k: plain(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [plain(v) for v in value]
    if isinstance(value, float) and math.isnan(value):
        return "nan"
    return value


def assert_close(a, b, where: str) -> None:
    """plain(a) == plain(b) but for floats, which need only agree to 1e-9 relative."""
    if isinstance(a, float) and isinstance(b, float):
        assert math.isclose(a, b, rel_tol=1e-9, abs_tol=1e-12), f"{where}: {a!r} != {b!r}"
    elif isinstance(a, dict) and isinstance(b, dict):
        assert a.keys() == b.keys(), where
        for key in a:
            assert_close(a[key], b[key], f"{where}.{key}")
    elif isinstance(a, list) and isinstance(b, list):
        assert len(a) == len(b), where
        for i, (x, y) in enumerate(zip(a, b)):
            assert_close(x, y, f"{where}[{i}]")
    else:
        assert a == b, f"{where}: {a!r} != {b!r}"


def test_many_sweeps_at_once_give_each_what_it_gives_alone():
    cases = [measured(kind) for kind in KINDS]
    data, parts = joined([d for d, _ in cases])
    together = assess_sweeps(data, parts, [s for _, s in cases])
    alone = [assess_sweep(d, s) for d, s in cases]
    assert len(together) == len(KINDS)
    for kind, a, b in zip(KINDS, together, alone):
        assert_close(plain(a), plain(b), kind)
    # The kinds differ, so a mix-up between sweeps would show.
    assert len({repr(plain(a.result_flags)) for a in alone}) >= 4


def test_a_settings_list_of_another_length_is_refused():
    data, settings = measured("clean")
    with pytest.raises(InputError, match="2 sweeps but 1 settings"):
        assess_sweeps(data, [slice(0, 3), slice(3, 7)], [settings])

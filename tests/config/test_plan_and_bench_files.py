"""Plan and bench files, loss tables, point expansion and the pre-flight limit check."""

import numpy as np
import pytest
from conftest import SAMPLE_RUNS

from tonebench.config.bench_file import load_bench
from tonebench.config.plan_file import load_plan
from tonebench.errors import InputError
from tonebench.planes.loss_table import LossTable
from tonebench.plan.points import expand
from tonebench.run.start import offsets_from_bench
from tonebench.plan.limits import SourceRange, check_plan


def write(tmp_path, name, text):
    path = tmp_path / name
    path.write_text(text)
    return path


def test_sample_files_load():
    plan = load_plan(SAMPLE_RUNS / "demo_plan.toml")
    bench = load_bench(SAMPLE_RUNS / "sim_bench.toml")
    template = load_bench(SAMPLE_RUNS / "hardware_bench_template.toml")
    assert plan.settings.device.part_number == "KLN-2417A"
    assert bench.settings.simulated and bench.scenario.dut.iip3_dbm == -2.0
    assert not template.settings.simulated
    assert len(plan.sha256) == 64


@pytest.mark.parametrize(
    "old, new, expected",
    [
        ("tone_step_dbm = 2.0", 'tone_step_dbm = "two"', "tone_step_dbm"),  # wrong type
        ('part_number = "KLN-2417A"\n', "", "device.part_number' is missing"),  # missing field
        ("tone_stop_dbm = -8.0", "tone_stop_dbm = 45.0", "tone_stop_dbm"),  # power out of range
        ("rbw_hz = 1000.0", "rbw_hz = 1000.0\nrbw_khz = 1", "rbw_khz' is not a known setting"),
        ("spacings_hz = [1.0e6]", "spacings_hz = [1.0e3]", "narrower than the tone spacing"),
    ],
)
def test_bad_plan_gives_one_line_naming_the_field(tmp_path, demo_plan_text, old, new, expected):
    assert old in demo_plan_text
    path = write(tmp_path, "plan.toml", demo_plan_text.replace(old, new))
    with pytest.raises(InputError) as caught:
        load_plan(path)
    message = str(caught.value)
    assert expected in message and str(path) in message and "\n" not in message


def test_unparseable_plan(tmp_path):
    path = write(tmp_path, "plan.toml", "[plan\nname=")
    with pytest.raises(InputError, match="not valid TOML"):
        load_plan(path)


def test_bench_offsets_must_increase(tmp_path, sim_bench_text):
    text = sim_bench_text.replace("in1 = [[2.30e9, 6.38], [2.60e9, 6.62]]", "in1 = [[2.60e9, 6.62], [2.30e9, 6.38]]")
    with pytest.raises(InputError, match="offsets.in1.*increase"):
        load_bench(write(tmp_path, "bench.toml", text))


def test_hardware_bench_needs_resources(tmp_path):
    text = (SAMPLE_RUNS / "hardware_bench_template.toml").read_text()
    text = text.replace('resource = "TCPIP0::192.0.2.30::5025::SOCKET"', "")
    with pytest.raises(InputError, match="instruments.analyzer.resource"):
        load_bench(write(tmp_path, "bench.toml", text))


def test_simulation_table_is_validated(tmp_path, sim_bench_text):
    text = sim_bench_text.replace("nf_db = 1.2", "nf_db = -3")
    with pytest.raises(InputError, match=r"\[simulation\].*nf_db"):
        load_bench(write(tmp_path, "bench.toml", text))


def test_loss_table_interpolates_linearly_in_db_and_never_extrapolates():
    table = LossTable.from_rows("in1", [[1e9, 2.0], [2e9, 4.0], [3e9, 5.0]], "test")
    # Reference: straight-line interpolation by hand between the rows.
    assert table.loss_db(1.5e9) == pytest.approx(3.0)
    assert table.loss_db(2.75e9) == pytest.approx(4.75)
    np.testing.assert_allclose(table.loss_db(np.array([1e9, 3e9])), [2.0, 5.0])
    with pytest.raises(InputError, match="covers 1 GHz to 3 GHz"):
        table.loss_db(3.1e9)
    with pytest.raises(InputError, match="does not extrapolate"):
        table.loss_db(np.array([2e9, 0.5e9]))


def test_loss_table_asked_again_gives_the_same_loss_and_still_refuses_outside(monkeypatch):
    """Scalar losses are kept per frequency (a run asks the same ones at every point): asked
    again, the same value without interpolating anew; outside the table, refused every time."""
    import tonebench.planes.loss_table as loss_table

    table = LossTable.from_rows("in1", [[1e9, 2.0], [2e9, 4.0]], "test")
    assert table.loss_db(1.25e9) == pytest.approx(2.5)  # by hand, a quarter of the way from 2 to 4 dB
    monkeypatch.setattr(loss_table.np, "interp", lambda *args: pytest.fail("interpolated again"))
    assert table.loss_db(1.25e9) == pytest.approx(2.5)
    for _ in range(2):
        with pytest.raises(InputError, match="does not extrapolate"):
            table.loss_db(2.5e9)
    monkeypatch.undo()  # np.interp back
    monkeypatch.setattr(loss_table, "MAX_CACHED_FREQS", 1)
    assert table.loss_db(1.5e9) == pytest.approx(3.0)  # the cache is cleared, not grown past its bound
    assert list(table._scalar_db) == [1.5e9]


def test_points_have_stable_unique_keys_and_product_frequencies():
    plan = load_plan(SAMPLE_RUNS / "demo_plan.toml").settings
    points = expand(plan)
    assert len(points) == 3 * 1 * 17
    assert len({p.key for p in points}) == len(points)
    assert [p.seq for p in points] == list(range(len(points)))
    first = points[0]
    assert first.key == "c2400000000/d1000000/p-40.00"
    # 2f1 - f2 and 2f2 - f1 sit 1.5 spacings either side of the centre.
    assert first.lower_hz == pytest.approx(2.4e9 - 1.5e6)
    assert first.upper_hz == pytest.approx(2.4e9 + 1.5e6)
    assert expand(plan)[5].key == points[5].key


def test_limit_check_refuses_the_plan_before_rf(tmp_path, demo_plan_text):
    bench = load_bench(SAMPLE_RUNS / "sim_bench.toml")
    offsets = offsets_from_bench(bench)
    sources = (SourceRange("source1", -130, 20), SourceRange("source2", -130, 20))
    plan = load_plan(write(tmp_path, "plan.toml", demo_plan_text.replace("tone_stop_dbm = -8.0", "tone_stop_dbm = 4.0")))
    with pytest.raises(InputError, match="max_tone_dbm is 0.00 dBm"):
        check_plan(expand(plan.settings), offsets, bench.settings.limits, sources, 30.0, "plan")
    # Within the tone limit but too much for the analyzer: 0 dBm + 3 dB + 16 dB gain - 1.5 dB loss.
    limits = bench.settings.limits.model_copy(update={"max_analyzer_input_dbm": 10.0, "max_tone_dbm": 10.0})
    plan = load_plan(write(tmp_path, "plan2.toml", demo_plan_text.replace("tone_stop_dbm = -8.0", "tone_stop_dbm = 0.0")))
    with pytest.raises(InputError, match="into the analyzer"):
        check_plan(expand(plan.settings), offsets, limits, sources, 30.0, "plan")
    # A source that cannot reach the power needed.
    weak = (SourceRange("source1", -130, -40), sources[1])
    demo = load_plan(SAMPLE_RUNS / "demo_plan.toml")
    with pytest.raises(InputError, match="source1 would be set to"):
        check_plan(expand(demo.settings), offsets, bench.settings.limits, weak, 30.0, "plan")
    check_plan(expand(demo.settings), offsets, bench.settings.limits, sources, 30.0, "plan")

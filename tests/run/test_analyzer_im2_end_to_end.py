"""The analyzer-limited check of IM2 end to end: the simulated analyzer's own second-order products
(sim/analyzer_im2.py, mixer SHI) against the dialect/bench figure mixer_shi_dbm the analysis uses
(analysis/second_order_checks.py). DUT IIP2 +22 dBm; tones -36..-26 dBm, 10 dB attenuation: with
SHI +40 dBm the analyzer's IM2 sits about 8.5 dB under the DUT's, in phase: IIP2 reads ~3 dB low
(20 log10(1 + 10^(-8.5/20)), from memory) unless those points are left out."""

from __future__ import annotations

from flag_benches import run, write_bench, write_plan
from sqlalchemy import select

from tonebench.store.models import Result

TRUE_IIP2_DBM = 22.0


def result_of(tmp_path, sim_shi_dbm, declared_shi_dbm):
    bench = write_bench(tmp_path, iip2_dbm=TRUE_IIP2_DBM, wide_out=True, declared_toi_dbm=15.0)
    text = bench.read_text()
    if declared_shi_dbm is not None:
        text = text.replace("performance = { mixer_toi_dbm = 15.0 }",
                            f"performance = {{ mixer_toi_dbm = 15.0, mixer_shi_dbm = {declared_shi_dbm!r} }}")
    bench.write_text(text.replace("[simulation.analyzer]\n", f"[simulation.analyzer]\nmixer_shi_dbm = {sim_shi_dbm!r}\n"))
    _, session, _ = run(tmp_path, write_plan(tmp_path, -36.0, -26.0, atten_db=10.0, second_order=True), bench)
    return session.scalars(select(Result)).one()


def test_undeclared_analyzer_im2_biases_iip2(tmp_path):
    result = result_of(tmp_path, 40.0, None)
    assert result.iip2_dbm < TRUE_IIP2_DBM - 2.0  # what the check is for


def test_declared_shi_leaves_the_analyzer_made_points_out(tmp_path):
    result = result_of(tmp_path, 40.0, 40.0)
    assert result.iip2_dbm is None
    notes = result.details_json["notes"]
    assert any("analyzer-limited (distortion) IM2" in note and "mixer SHI 40 dBm" in note for note in notes)


def test_a_clean_analyzer_keeps_every_point(tmp_path):
    result = result_of(tmp_path, 80.0, 80.0)
    assert abs(result.iip2_dbm - TRUE_IIP2_DBM) <= 0.3
    assert not any("IM2" in note for note in result.details_json["notes"])

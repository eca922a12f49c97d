"""A worked example of tonebench's Python API, run against the demo database.

    tonebench demo                                     # measures, and writes tonebench-demo/tonebench.db
    python sample_runs/analysis_example.py tonebench-demo/tonebench.db

It loads a lot, draws the IIP3 distribution of its results (iip3-by-lot.html, beside the
database), and fits one sweep again over a narrower drive range than the stored analysis chose.
The same lines work in a Jupyter notebook, where the figures display inline. Nothing here writes
to the database.
"""

import sys
from pathlib import Path

import plotly.express as px

import tonebench


def main(location: str) -> None:
    db = tonebench.open(location)

    # 1. A lot: every result of its devices, as `tonebench find --lot ...` lists them.
    runs = db.runs()
    lot = runs["lot"].iloc[0]
    results = db.find(lot=lot)
    print(f"lot {lot}: {len(results)} results from {results['serial'].nunique()} device(s)")
    print(results[["serial", "center_hz", "spacing_hz", "iip3_dbm", "iip3_bound_db", "verdict"]].to_string(index=False))

    # 2. The IIP3 distribution of the lot, per center frequency.
    figure = px.histogram(results, x="iip3_dbm", color=results["center_hz"] / 1e9, nbins=20,
                          labels={"iip3_dbm": "IIP3 (dBm)", "color": "center (GHz)"}, title=f"IIP3 of lot {lot}")
    page = Path(location).with_name("iip3-by-lot.html")
    figure.write_html(page, include_plotlyjs=True)
    print(f"figure: {page}")

    # 3. One sweep fitted again with a different valid region: only drive levels up to -30 dBm.
    run = db.run(runs["run_guid"].iloc[0])
    points = run.points()
    center_hz, spacing_hz = points["center_hz"].iloc[0], points["spacing_hz"].iloc[0]
    sweep = points[(points["center_hz"] == center_hz) & (points["spacing_hz"] == spacing_hz)]
    stored = run.results().query("center_hz == @center_hz and spacing_hz == @spacing_hz").iloc[0]
    settings = run.analysis_settings(center_hz, spacing_hz)  # what the stored analysis knew of the bench
    again = tonebench.analysis.fit(sweep, settings)
    narrower = tonebench.analysis.fit(sweep[sweep["tone_dbm"] <= -30.0], settings)
    print(f"sweep {center_hz / 1e9:g} GHz: stored IIP3 {stored['iip3_dbm']:+.3f} dBm, fitted again "
          f"{again.fit.iip3_dbm:+.3f} dBm (valid {again.fit.n_valid} of {again.fit.n_points}), up to -30 dBm only "
          f"{narrower.fit.iip3_dbm:+.3f} dBm ± {narrower.iip3_bound_db:.2f} dB (valid {narrower.fit.n_valid} of "
          f"{narrower.fit.n_points})")
    db.close()


if __name__ == "__main__":
    main(sys.argv[1] if len(sys.argv) > 1 else "tonebench-demo/tonebench.db")

"""Smooth the latest week of the invented demo region and draw raw beside smoothed ratios.

Run:  python examples/smooth_and_map.py [OUTPUT_FOLDER]

Uses only the public API. The figures are analytic aids, not public-health directives.
"""

from __future__ import annotations

import sys
import tempfile
from pathlib import Path

import matplotlib

matplotlib.use("Agg")

import areamap


def main(out: Path) -> None:
    config = areamap.load_config(areamap.write_demo(out))
    study = areamap.load_study(config)
    graph = areamap.build_graph(study.boundaries, method=config.graph.method)

    weeks = study.period_weeks("latest", 2)  # a two-week window steadies small counts
    cases = study.case_matrix(weeks)
    expected = areamap.expected_counts(cases, study.population_matrix())
    observed = cases.sum(axis=1)

    sir = areamap.standardized_ratio(observed, expected).to_frame()
    fit = areamap.fit_car(observed, expected, graph, model="bym2")
    print(fit.summary())

    fig = areamap.raw_beside_smoothed(study.boundaries, sir["ratio"], fit.to_frame()["rr_mean"])
    path = out / "raw_beside_smoothed.png"
    fig.savefig(path, dpi=120)
    print(f"Figure written to {path}")


if __name__ == "__main__":
    main(Path(sys.argv[1]) if len(sys.argv) > 1 else Path(tempfile.mkdtemp(prefix="areamap-example-")))

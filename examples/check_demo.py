"""Write the invented demo region, check it, and look at the inputs from Python.

Run:  python examples/check_demo.py [OUTPUT_FOLDER]

Everything here uses the public API; `areamap demo --out DIR` and `areamap check DIR/run.toml`
print the same numbers.
"""

from __future__ import annotations

import sys
import tempfile
from pathlib import Path

from areamap.config import load_config
from areamap.demo import write_demo
from areamap.intake import check_study


def main(out: Path) -> None:
    config_path = write_demo(out, seed=20261202)
    config = load_config(config_path)
    report = check_study(config)
    print(report.summary())

    study = report.study
    # Cases in the latest four weeks by district and age group (rows in boundary order)
    recent = study.period_weeks("latest", 4)
    cases = study.case_matrix(recent)
    population = study.population_matrix()
    crude_per_100k = 1e5 * cases.sum(axis=1) / population.sum(axis=1)
    top = crude_per_100k.sort_values(ascending=False).head(5)
    names = study.boundaries["area_name"]
    print(f"\nHighest crude rates per 100,000, {recent[0]} to {recent[-1]} (not age-standardized;")
    print("small districts swing widely - compare with the smoothed estimates of the bulletin):")
    for area_id, rate in top.items():
        print(f"  {names[area_id]:<24} {area_id}  {rate:8.1f}  ({int(cases.loc[area_id].sum())} cases)")


if __name__ == "__main__":
    folder = Path(sys.argv[1]) if len(sys.argv) > 1 else Path(tempfile.mkdtemp(prefix="areamap-demo-"))
    main(folder)

"""Generate data.csv for the bakery-demand scenario (seeded, so it is reproducible).

An invented neighbourhood bakery predicts how many loaves it sells in a
morning from the temperature, whether it rained, the day of the week and how
many people passed a footfall counter. The true relation is mildly nonlinear.

Usage: ``python make_data.py [OUT]`` writes ``OUT`` (default: data.csv beside
this script). The same seed always gives the same bytes.
"""

import argparse
from pathlib import Path

import numpy as np


def rows() -> list[str]:
    """The CSV lines, header first."""
    rng = np.random.default_rng(20261201)
    n = 240
    temperature = rng.uniform(-2.0, 28.0, n)
    rain = (rng.uniform(size=n) < 0.3).astype(float)
    weekday = rng.integers(0, 7, n).astype(float)
    footfall = rng.normal(800.0, 150.0, n)
    weekend = (weekday >= 5).astype(float)
    loaves = (
        60.0
        + 0.05 * footfall
        + 25.0 * weekend
        - 12.0 * rain
        - 0.06 * (temperature - 14.0) ** 2
        + rng.normal(0.0, 4.0, n)
    )
    lines = ["temperature,rain,weekday,footfall,loaves"]
    for row in zip(temperature, rain, weekday, footfall, loaves):
        lines.append(f"{row[0]:.1f},{row[1]:.0f},{row[2]:.0f},{row[3]:.0f},{row[4] / 100.0:.4f}")
    return lines


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description="Write the bakery-demand data set.")
    parser.add_argument("out", nargs="?", type=Path, default=Path(__file__).with_name("data.csv"),
                        help="where to write the CSV file (default: data.csv beside this script)")
    args = parser.parse_args(argv)
    args.out.write_text("\n".join(rows()) + "\n", encoding="utf-8", newline="\n")


if __name__ == "__main__":
    main()

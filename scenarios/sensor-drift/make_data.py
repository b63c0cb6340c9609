"""Generate data.csv for the sensor-drift scenario (seeded, so it is reproducible).

An invented market garden runs humidity sensors in its polytunnels. Once a
month someone checks each sensor against a reference and notes whether its
reading had drifted too far. Drift is likelier the longer since the sensor was
last calibrated, much likelier when that time was spent in big daily
temperature swings, and likelier after many hours wet with condensation. The
label is drawn at random from that chance, so some rows contradict others.

Usage: ``python make_data.py [OUT]`` writes ``OUT`` (default: data.csv beside
this script). The same seed always gives the same bytes.
"""

import argparse
from pathlib import Path

import numpy as np


def rows() -> list[str]:
    """The CSV lines, header first."""
    rng = np.random.default_rng(55120)
    n = 260
    days = rng.uniform(5.0, 240.0, n)
    swing = rng.gamma(4.0, 2.5, n)          # daily max - min temperature, degrees Celsius
    wet_hours = rng.uniform(0.0, 14.0, n)   # mean hours per day with condensation
    logit = -5.0 + 0.012 * days + 0.0022 * days * swing + 0.22 * wet_hours
    chance = 1.0 / (1.0 + np.exp(-logit))
    drifted = (rng.uniform(size=n) < chance).astype(int)
    lines = ["days_since_calibration,temperature_swing,wet_hours,drifted"]
    for i in range(n):
        lines.append(f"{days[i]:.0f},{swing[i]:.1f},{wet_hours[i]:.1f},{drifted[i]}")
    return lines


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description="Write the sensor-drift data set.")
    parser.add_argument("out", nargs="?", type=Path, default=Path(__file__).with_name("data.csv"),
                        help="where to write the CSV file (default: data.csv beside this script)")
    args = parser.parse_args(argv)
    args.out.write_text("\n".join(rows()) + "\n", encoding="utf-8", newline="\n")


if __name__ == "__main__":
    main()

"""Generate data.csv for the hive-gate scenarios (seeded, so it is reproducible).

An invented rooftop beekeeping cooperative weighs one hive every evening. The
hive gains weight when its bees bring in nectar, and they fly only when it is
warm, sunny and calm enough: the weather opens or shuts a gate, and how much
comes in through the open gate depends on how much is in flower. Every
evening the hive also loses a little (the colony eats and fans off water).

Usage: ``python make_data.py [OUT]`` writes ``OUT`` (default: data.csv beside
this script). The same seed always gives the same bytes. Both hive-gate
scenarios (buggy and fixed) use this data.
"""

import argparse
from pathlib import Path

import numpy as np


def rows() -> list[str]:
    """The CSV lines, header first."""
    rng = np.random.default_rng(80412)
    n = 220
    temperature = rng.uniform(6.0, 30.0, n)      # afternoon temperature, degrees Celsius
    sun_hours = rng.uniform(0.0, 11.0, n)        # hours of sunshine that day
    wind = rng.gamma(2.0, 2.2, n)                # mean wind speed, metres per second
    bloom = rng.beta(2.0, 2.0, n)                # share of the nearby forage in flower, 0 to 1
    warm = 1.0 / (1.0 + np.exp(-(temperature - 14.0) / 2.5))
    sunny = 1.0 / (1.0 + np.exp(-1.2 * (sun_hours - 3.0)))
    calm = np.exp(-wind / 6.0)
    gain = 1.9 * bloom * warm * sunny * calm - 0.15 + rng.normal(0.0, 0.06, n)
    lines = ["temperature,sun_hours,wind,bloom,gain_kg"]
    for i in range(n):
        lines.append(f"{temperature[i]:.1f},{sun_hours[i]:.1f},{wind[i]:.1f},{bloom[i]:.2f},{gain[i]:.3f}")
    return lines


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description="Write the hive-gate data set.")
    parser.add_argument("out", nargs="?", type=Path, default=Path(__file__).with_name("data.csv"),
                        help="where to write the CSV file (default: data.csv beside this script)")
    args = parser.parse_args(argv)
    args.out.write_text("\n".join(rows()) + "\n", encoding="utf-8", newline="\n")


if __name__ == "__main__":
    main()

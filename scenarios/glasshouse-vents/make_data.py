"""Generate data.csv for the glasshouse-vents scenario (seeded, so it is reproducible).

An invented glasshouse opens its roof vents by a fraction between 0 (shut)
and 1 (wide open). A grower logged, every half hour, how far the vents were
open together with four readings, each already in units of order one: how much
warmer it is inside than outside (in tens of degrees), the sunshine (0 to 1),
the wind (in tens of metres per second) and the relative humidity inside (0 to 1).

Usage: ``python make_data.py [OUT]`` writes ``OUT`` (default: data.csv beside
this script). The same seed always gives the same bytes.
"""

import argparse
from pathlib import Path

import numpy as np


def rows() -> list[str]:
    """The CSV lines, header first."""
    rng = np.random.default_rng(20261202)
    n = 200
    warmth = rng.uniform(-0.5, 2.0, n)
    sun = rng.uniform(0.0, 1.0, n)
    wind = rng.gamma(2.0, 0.3, n)
    humidity = rng.uniform(0.3, 1.0, n)
    # Vents open with warmth, sun and humidity, and close in strong wind.
    drive = 2.2 * warmth + 1.5 * sun + 2.0 * (humidity - 0.65) - 1.8 * wind ** 2 - 1.0
    vent = np.clip(1.0 / (1.0 + np.exp(-drive)) + rng.normal(0.0, 0.04, n), 0.0, 1.0)
    lines = ["warmth,sun,wind,humidity,vent"]
    for row in zip(warmth, sun, wind, humidity, vent):
        lines.append(",".join(f"{value:.3f}" for value in row))
    return lines


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description="Write the glasshouse-vents data set.")
    parser.add_argument("out", nargs="?", type=Path, default=Path(__file__).with_name("data.csv"),
                        help="where to write the CSV file (default: data.csv beside this script)")
    args = parser.parse_args(argv)
    args.out.write_text("\n".join(rows()) + "\n", encoding="utf-8", newline="\n")


if __name__ == "__main__":
    main()

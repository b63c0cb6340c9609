"""Generate data.csv for the fan-bearing scenario (seeded, so it is reproducible).

An invented ventilation plant listens to each extractor fan with an
accelerometer on its housing and keeps windows of 32 readings. Every fan hums:
a sine at its own rotation speed, with a random phase and loudness, under
sensor noise. A fan whose bearing is wearing out also knocks: a short sharp
pulse, a positive spike and a smaller negative rebound, once per turn of the
damaged ball, every 6 to 9 readings. A healthy fan may knock once or twice too
(a loose panel), so a pulse alone is not enough: the pattern is the repeat.

Usage: ``python make_data.py [OUT]`` writes ``OUT`` (default: data.csv beside
this script). The same seed always gives the same bytes.
"""

import argparse
from pathlib import Path

import numpy as np

LENGTH = 32


def window(rng: np.random.Generator, worn: bool) -> np.ndarray:
    """32 readings of one fan."""
    t = np.arange(LENGTH)
    hum = rng.uniform(0.5, 1.2) * np.sin(2 * np.pi * t / rng.uniform(10.0, 16.0) + rng.uniform(0, 2 * np.pi))
    signal = hum + rng.normal(0.0, 0.2, LENGTH)
    if worn:
        period = int(rng.integers(6, 10))
        starts = range(int(rng.integers(0, period)), LENGTH - 1, period)
    else:
        starts = list(rng.integers(0, LENGTH - 1, int(rng.integers(0, 3))))
    for s in starts:
        size = rng.uniform(0.4, 0.8)
        signal[s] += size
        signal[s + 1] -= 0.5 * size
    return signal


def rows() -> list[str]:
    """The CSV lines, header first: readings t00 .. t31, then worn (1) or healthy (0)."""
    rng = np.random.default_rng(5217)
    n = 320
    worn = rng.random(n) < 0.5
    lines = [",".join([f"t{i:02d}" for i in range(LENGTH)] + ["worn"])]
    for w in worn:
        lines.append(",".join(f"{v:.3f}" for v in window(rng, bool(w))) + f",{int(w)}")
    return lines


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description="Write the fan-bearing data set.")
    parser.add_argument("out", nargs="?", type=Path, default=Path(__file__).with_name("data.csv"),
                        help="where to write the CSV file (default: data.csv beside this script)")
    args = parser.parse_args(argv)
    args.out.write_text("\n".join(rows()) + "\n", encoding="utf-8", newline="\n")


if __name__ == "__main__":
    main()

"""Generate data.csv for the seed-sorter scenario (seeded, so it is reproducible).

An invented seed-sorting machine at a wildflower nursery photographs and weighs
each seed and must class it as one of three kinds, named after where the
plants grow: dune, marsh or ridge. Dune seeds are long, light and glossy; marsh
seeds are round and heavy; ridge seeds sit between the two on size but are
dull, and their mass grows faster with their size. The kinds overlap, so no
network sorts every seed correctly.

Usage: ``python make_data.py [OUT]`` writes ``OUT`` (default: data.csv beside
this script). The same seed always gives the same bytes.
"""

import argparse
from pathlib import Path

import numpy as np

KINDS = ("dune", "marsh", "ridge")


def rows() -> list[str]:
    """The CSV lines, header first."""
    rng = np.random.default_rng(7402)
    n = 300
    kind = rng.integers(0, 3, n)
    # Per kind: mean length (mm), mean width (mm), gloss (0 dull .. 1 shiny).
    length_mean = np.array([4.2, 3.0, 3.6])[kind]
    width_mean = np.array([1.6, 2.6, 2.1])[kind]
    gloss_mean = np.array([0.70, 0.45, 0.25])[kind]
    length = rng.normal(length_mean, 0.45)
    width = rng.normal(width_mean, 0.30)
    # Mass (mg) grows with length * width; ridge seeds are denser.
    density = np.array([0.55, 0.80, 0.95])[kind]
    mass = density * length * width * rng.lognormal(0.0, 0.08, n)
    gloss = np.clip(rng.normal(gloss_mean, 0.15), 0.0, 1.0)
    onehot = np.eye(3)[kind]
    lines = ["length_mm,width_mm,mass_mg,gloss," + ",".join(KINDS)]
    for i in range(n):
        label = ",".join(f"{v:.0f}" for v in onehot[i])
        lines.append(f"{length[i]:.2f},{width[i]:.2f},{mass[i]:.2f},{gloss[i]:.3f},{label}")
    return lines


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description="Write the seed-sorter data set.")
    parser.add_argument("out", nargs="?", type=Path, default=Path(__file__).with_name("data.csv"),
                        help="where to write the CSV file (default: data.csv beside this script)")
    args = parser.parse_args(argv)
    args.out.write_text("\n".join(rows()) + "\n", encoding="utf-8", newline="\n")


if __name__ == "__main__":
    main()

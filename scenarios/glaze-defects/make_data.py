"""Generate data.csv for the glaze-defects scenario (seeded, so it is reproducible).

An invented tile works photographs each glazed tile through a small camera
under raking light and cuts the picture into 8x8 patches of brightness. A patch
is clean (smooth glaze: an even brightness with a little grain), cracked (a
thin dark line runs across it, straight, in one of four directions) or
blistered (a bubble under the glaze shows as a small bright spot with a dark
rim on one side). The three kinds differ in shape, not in overall brightness,
which varies from tile to tile: a convolution finds the shapes wherever they
sit in the patch.

Usage: ``python make_data.py [OUT]`` writes ``OUT`` (default: data.csv beside
this script). The same seed always gives the same bytes.
"""

import argparse
from pathlib import Path

import numpy as np

SIZE = 8
KINDS = ("clean", "crack", "blister")


def patch(rng: np.random.Generator, kind: int) -> np.ndarray:
    """One 8x8 patch of brightness in [0, 1]."""
    base = rng.uniform(0.45, 0.75)
    img = base + rng.normal(0.0, 0.04, (SIZE, SIZE))
    if kind == 1:  # crack: a dark line, horizontal, vertical or along a diagonal
        depth = rng.uniform(0.25, 0.4)
        where = int(rng.integers(1, SIZE - 1))
        direction = int(rng.integers(0, 4))
        for t in range(SIZE):
            r, c = {0: (where, t), 1: (t, where), 2: (t, t), 3: (t, SIZE - 1 - t)}[direction]
            img[r, c] -= depth
    elif kind == 2:  # blister: a bright 2x2 spot, a darker rim below it
        r, c = (int(v) for v in rng.integers(1, SIZE - 2, 2))
        lift = rng.uniform(0.25, 0.4)
        img[r : r + 2, c : c + 2] += lift
        img[r + 2, c : c + 2] -= 0.5 * lift
    return np.clip(img, 0.0, 1.0)


def rows() -> list[str]:
    """The CSV lines, header first: 64 pixel columns (row by row), then the kind as a class number."""
    rng = np.random.default_rng(8831)
    n = 320
    kinds = rng.integers(0, 3, n)
    names = [f"p{r}{c}" for r in range(SIZE) for c in range(SIZE)]
    lines = [",".join(names + ["defect"])]
    for kind in kinds:
        pixels = patch(rng, int(kind)).ravel()
        lines.append(",".join(f"{v:.3f}" for v in pixels) + f",{int(kind)}")
    return lines


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description="Write the glaze-defects data set.")
    parser.add_argument("out", nargs="?", type=Path, default=Path(__file__).with_name("data.csv"),
                        help="where to write the CSV file (default: data.csv beside this script)")
    args = parser.parse_args(argv)
    args.out.write_text("\n".join(rows()) + "\n", encoding="utf-8", newline="\n")


if __name__ == "__main__":
    main()

"""The published worked example both test files reproduce: its numbers and a model file of it.

Source for every number here: M. Mazur, "A Step by Step Backpropagation
Example" (2015), https://mattmazur.com/2015/03/17/a-step-by-step-backpropagation-example/

Network of the post: 2 inputs, 2 sigmoid hidden units, 2 sigmoid outputs, one
training sample, cost E_total = sum over outputs of 1/2 (target - out)^2, which
is our loss "half_squared_error" with n_samples = 1. Its weights w_k sit in our
(n_in, n_out) matrices as

    hidden W1 = [[w1, w3], [w2, w4]]   (w1: i1->h1, w2: i2->h1, w3: i1->h2, w4: i2->h2)
    output W2 = [[w5, w7], [w6, w8]]   (w5: h1->o1, w6: h2->o1, w7: h1->o2, w8: h2->o2)

and its one bias per layer (b1, b2) is given to both units of that layer.
"""

from __future__ import annotations

from pathlib import Path

INPUTS = (0.05, 0.10)
TARGETS = (0.01, 0.99)
W = {"w1": 0.15, "w2": 0.20, "w3": 0.25, "w4": 0.30, "w5": 0.40, "w6": 0.45, "w7": 0.50, "w8": 0.55}
B1, B2 = 0.35, 0.60

#: Where each of the post's weights sits in our parameter vector.
POST_NAMES = {
    "w1": "L1.W[0,0]", "w2": "L1.W[1,0]", "w3": "L1.W[0,1]", "w4": "L1.W[1,1]",
    "w5": "L2.W[0,0]", "w6": "L2.W[1,0]", "w7": "L2.W[0,1]", "w8": "L2.W[1,1]",
}

#: "The Backwards Pass": the weights after one step at learning rate 0.5, as
#: printed (the post does not update its biases).
PUBLISHED_AFTER_ONE_STEP = {
    "w5": "0.35891648", "w6": "0.408666186", "w7": "0.511301270", "w8": "0.561370121",
    "w1": "0.149780716", "w2": "0.19956143", "w3": "0.24975114", "w4": "0.29950229",
}


def write_example(folder: Path) -> Path:
    """The example as a model file with inline weights and a one-row CSV in ``folder``."""
    (folder / "one.csv").write_text(f"i1,i2,t1,t2\n{INPUTS[0]},{INPUTS[1]},{TARGETS[0]},{TARGETS[1]}\n",
                                    encoding="utf-8")
    w = W
    model = folder / "model.toml"
    model.write_text(
        f"""name = "published worked example"
loss = "half_squared_error"

[data]
file = "one.csv"
inputs = ["i1", "i2"]
targets = ["t1", "t2"]

[[layers]]
units = 2
activation = "sigmoid"
weights = [[{w['w1']}, {w['w3']}], [{w['w2']}, {w['w4']}]]
biases = [{B1}, {B1}]

[[layers]]
units = 2
activation = "sigmoid"
weights = [[{w['w5']}, {w['w7']}], [{w['w6']}, {w['w8']}]]
biases = [{B2}, {B2}]
""",
        encoding="utf-8",
    )
    return model


def same_as_published(value: float, published: str) -> bool:
    """True when ``value`` rounded to the published number of decimals prints as ``published``."""
    decimals = len(published.split(".")[1])
    return f"{value:.{decimals}f}" == published

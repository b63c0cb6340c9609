"""``stepper samples``: the loss of every data row, the worst ones first, with prediction, target and metrics."""

from __future__ import annotations

import argparse
import sys
from typing import Any

import numpy as np

from stepper.commands.common import load
from stepper.core.metrics import Metrics, metrics_document
from stepper.commands.json_output import document_head, write_json
from stepper.core.rows import worst_rows
from stepper.session import RowTable, Session
from stepper.training_report import confusion_lines, finite_or_none, metric_words, number, row_words







def handle(args: argparse.Namespace) -> int:
    session = Session(load(args))
    if args.resume is not None:
        session.load_checkpoint(args.resume)
    table = session.row_table(args.split)
    if args.all:
        chosen = np.arange(table.n)
        if args.sort == "loss":
            chosen = worst_rows(table.loss, table.n)
    else:
        chosen = worst_rows(table.loss, args.worst)
    if args.sort == "line":
        chosen = chosen[np.argsort(table.line[chosen], kind="stable")]
    found = session.metrics(args.threshold)
    if args.json:
        write_json(document(session, table, chosen, found.train, found.validation))
    else:
        sys.stdout.write(report(session, table, chosen, found.train, found.validation))
    return 0


def report(session: Session, table: RowTable, chosen: np.ndarray[Any, Any],
           train: Metrics, validation: Metrics | None) -> str:
    data = session.setup.data
    names = data.target_names
    n_rows = table.n
    lines = [f"{session.setup.name}: {data.n_train} training and {data.n_val} validation samples, "
             f"loss {session.net.loss} (per row; the mean of the training rows is the cost's data term)",
             f"outputs: {', '.join(names)}", ""]
    if chosen.size:
        lines.append(f"{chosen.size} of {n_rows} rows" + (", largest loss first" if chosen.size < n_rows else ""))
        lines.append(f"{'set':<6}{'line':>6}{'sample':>7}{'loss':>13}  {'prediction':<24}target")
        for i in chosen:
            pred, target = row_words(session.task, names, table.output[i], table.target[i])
            split = "val" if table.validation[i] else "train"
            lines.append(f"{split:<6}{int(table.line[i]):>6}{int(table.index[i]):>7}"
                         f"{number(float(table.loss[i]), 6):>13}  {pred:<24}{target}")
    else:
        lines.append("no rows in this set")
    lines += ["", f"metrics ({session.task})"]
    for label, m in (("train", train), ("validation", validation)):
        if m is None:
            continue
        lines.append(f"  {label:<11}{metric_words(m)}")
        for row in confusion_lines(m, names):
            lines.append("    " + row)
    if session.task == "binary":
        lines.append(f"  an output at or above {train.threshold:g} says yes (+), below says no (-)")
    lines.append("")
    return "\n".join(lines)


def document(session: Session, table: RowTable, chosen: np.ndarray[Any, Any],
             train: Metrics, validation: Metrics | None) -> dict[str, Any]:
    setup = session.setup
    rows = []
    for i in chosen:
        row: dict[str, Any] = {
            "set": "validation" if table.validation[i] else "train",
            "line": int(table.line[i]),
            "index": int(table.index[i]),
            "loss": finite_or_none(float(table.loss[i])),
            "prediction": [finite_or_none(float(v)) for v in table.output[i]],
            "target": [float(v) for v in table.target[i]],
        }
        if session.task == "classes":
            row["predicted_class"] = setup.data.target_names[int(np.argmax(table.output[i]))]
            row["true_class"] = setup.data.target_names[int(np.argmax(table.target[i]))]
        rows.append(row)
    return {
        **document_head(setup),
        "loss": setup.network.loss,
        "task": session.task,
        "outputs": list(setup.data.target_names),
        "rows_listed": len(rows),
        "rows_total": int(table.n),
        "rows": rows,
        "metrics": {"train": metrics_document(train),
                    "validation": None if validation is None else metrics_document(validation)},
    }

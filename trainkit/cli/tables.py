"""Printing what more than one command shows: epoch lines, the split table, the evaluation."""

from __future__ import annotations

from pathlib import Path

from rich.console import Console
from rich.table import Table

__all__ = ["f3", "epoch_line", "print_split", "print_evaluation", "confusion_note"]


def f3(v: float | None) -> str:
    """Three decimals, or ``n/a`` for an undefined value (metrics.json writes those as null)."""
    return "n/a" if v is None else f"{v:.3f}"


def epoch_line(row: dict, false_alarm_budget: float) -> str:
    """One line per epoch: loss, validation accuracy and recall, throughput."""
    return (
        f"epoch {row['epoch']:3d} {row['stage']:4s}  loss {row['train_loss']:.3f}  "
        f"val acc {row['val_accuracy']:.3f}  val crack recall {row['val_crack_recall']:.3f}  "
        f"at {false_alarm_budget:.0%} false alarms {row['val_recall_at_fa']:.3f}  "
        f"{row['train_images_per_s']:.0f} img/s"
    )


def print_split(console: Console, rep: dict) -> None:
    """Print patches per class and groups per subset of a split."""
    t = Table(title="Split (patches per class; groups never shared)")
    t.add_column("subset")
    t.add_column("groups", justify="right")
    names = list(next(iter(rep["class_counts"].values())).keys())
    for n in names:
        t.add_column(n, justify="right")
    for s, counts in rep["class_counts"].items():
        t.add_row(s, str(rep["groups"][s]), *[str(counts[n]) for n in names])
    console.print(t)


def confusion_note(threshold: float) -> str:
    """Why the confusion matrix and the screening figures can disagree, in one sentence."""
    return (
        "predicted = the likeliest class; screening instead flags a patch when its crack "
        f"probability 1 - P(none) reaches the threshold {threshold:.3f}, so a clean patch "
        "predicted as a crack class here may not be a false alarm below"
    )


def _class_tables(console: Console, res: dict) -> None:
    names = res["class_names"]
    t = Table(
        title=f"Confusion matrix ({res['split']}: rows true, columns predicted; count, row %)"
    )
    t.add_column("true \\ pred")
    for n in names:
        t.add_column(n[:10], justify="right")
    norm = res["confusion_matrix_row_normalised"]
    for n, row, nrow in zip(names, res["confusion_matrix"], norm, strict=True):
        t.add_row(n, *[f"{v} {p:4.0%}" for v, p in zip(row, nrow, strict=True)])
    console.print(t)
    console.print(confusion_note(res["screening"]["threshold"]))
    t2 = Table(
        title=f"Per class (recall interval: {res['interval_method']}, {res['confidence']:.0%})"
    )
    for col in ("class", "support", "precision", "recall", "interval", "F1"):
        t2.add_column(col, justify="right" if col != "class" else "left")
    for c in res["per_class"]:
        ci = c["recall_interval"]
        t2.add_row(
            c["name"],
            str(c["support"]),
            f3(c["precision"]),
            f3(c["recall"]),
            "n/a" if ci["n"] == 0 else f"{ci['low']:.3f}-{ci['high']:.3f} ({ci['k']}/{ci['n']})",
            f3(c["f1"]),
        )
    console.print(t2)


def _weak_slices(console: Console, res: dict) -> None:
    low = res["screening"]["recall_ci_low"]
    for key, label in (("by_group", "group"), ("by_scale", "scale band"), ("by_photo", "photo")):
        weak = [
            r
            for r in res.get(key) or []
            if r["recall"] is not None and low is not None and r["recall"] < low
        ]
        if weak:
            console.print(
                f"weak {label}s (recall below {low:.3f}): "
                + ", ".join(f"{r['key']} {r['cracks_found']}/{r['cracks']}" for r in weak[:8])
            )


def print_evaluation(console: Console, res: dict, out: Path) -> None:
    """Print the evaluation: confusion matrix, per-class table, screening, breakdown, verdict.

    Args:
        console: where to print.
        res: the evaluation result (the contents of metrics.json).
        out: the evaluation folder, for the paths printed.
    """
    _class_tables(console, res)
    s = res["screening"]
    ci = s["recall_interval"]
    d = s["at_default_threshold"]
    console.print(
        f"screening recall {f3(s['recall'])} [{f3(ci['low'])}, {f3(ci['high'])}] "
        f"({res['interval_method']} {res['confidence']:.0%}, {ci['k']}/{ci['n']}) at threshold "
        f"{s['threshold']:.3f} ({s['threshold_source']}); specificity {f3(s['specificity'])}; "
        f"false-alarm rate {f3(s['false_alarm_rate'])} ({s['fp']} of {s['fp'] + s['tn']} "
        f"clean patches; {d['fp']} at threshold 0.5)"
    )
    cal = res["calibration"]
    line = f"calibration: ECE {cal['ece']:.3f}"
    if cal.get("temperature"):
        tt = cal["temperature"]
        line += f" -> {tt['ece_after']:.3f} with temperature T = {tt['value']:.3f} (report only)"
    console.print(line)
    _weak_slices(console, res)
    comp = res.get("comparison")
    if comp:
        m = comp["mcnemar_recall"]
        console.print(
            f"against {comp['experiment_b']}: recall {f3(comp['a']['recall'])} vs "
            f"{f3(comp['b']['recall'])} (difference {f3(comp['recall_difference'])}); "
            f"McNemar {m['method']} p = {m['p_value']:.4f} ({m['b']} found only by this, "
            f"{m['c']} only by the other); {comp['disagreements']} disagreements in "
            f"{out / comp['disagreements_csv']}"
        )
    if res["gate"]:
        console.print(res["gate"]["verdict"])
    cas = res.get("cascade")
    if cas:
        if cas.get("cascade"):
            console.print(
                f"cascade: recall {cas['cascade']['recall']:.3f}, false-alarm rate "
                f"{cas['cascade']['false_alarm_rate']:.3f} (main network alone "
                f"{cas['main']['recall']:.3f}, {cas['main']['false_alarm_rate']:.3f}); "
                f"{cas['passed_share']:.1%} of patches reach the main network"
            )
        console.print(f"cascade {cas['gate']['verdict']}")
    console.print(f"report: {out / 'report.html'}")
    console.print(f"[dim]{res['caution']}[/dim]")

"""Read a sweep with ``periodscan.load_sweep`` and plot it with pandas and matplotlib.

    periodscan sweep experiment=tiny                     # a sweep to read (seconds)
    python docs/read_a_sweep.py results/tiny sweep.png   # or a sweep name: tiny

Left: held-out accuracy per epoch trained, the clean baseline beside every window of the
shortest deficit length (means over seeds). Right: the damage of each window against its start,
one line per deficit length, with its confidence interval as a band. The same lines work in a
notebook; ``tests/test_docs_example.py`` runs this file on a tiny sweep.
"""

from __future__ import annotations

import argparse

import matplotlib

matplotlib.use("Agg")  # files only; drop this line in a notebook
import matplotlib.pyplot as plt  # noqa: E402
import pandas as pd  # noqa: E402

import periodscan  # noqa: E402


def learning_curves(epochs: pd.DataFrame, length: int) -> pd.DataFrame:
    """Held-out accuracy in % by epochs trained (rows) and run kind (columns), mean over seeds.

    ``epochs`` is ``view.epochs``: one row per run and epoch along the run's path, with the
    0-based ``epoch``; a reading taken after epoch e is plotted at e + 1 epochs trained.
    """
    runs = epochs[(epochs.length == 0) | (epochs.length == length)]
    kind = ["baseline" if n == 0 else f"deficit from epoch {s}"
            for s, n in zip(runs.start_epoch, runs.length, strict=True)]
    return runs.assign(kind=kind, trained=runs.epoch + 1, accuracy=100 * runs.test_acc) \
        .pivot_table(index="trained", columns="kind", values="accuracy", aggfunc="mean")


def plot(view, path: str) -> None:
    table = view.table()  # one row per window: damage in accuracy points and its interval
    length = int(table.length.min())
    curves = learning_curves(view.epochs, length)
    fig, (left, right) = plt.subplots(1, 2, figsize=(11, 4), dpi=100, layout="constrained")
    for kind in curves:
        left.plot(curves.index, curves[kind], label=kind, color="black" if kind == "baseline"
                  else None, lw=2.2 if kind == "baseline" else 1.2)
    left.set(xlabel="epochs trained", ylabel="held-out accuracy, %",
             title=f"learning curves, {length}-epoch deficit")
    left.legend(fontsize=7)
    for n, rows in table.groupby("length"):
        rows = rows.sort_values("start")
        line, = right.plot(rows.start, rows.damage, marker="o", label=f"{n}-epoch deficit")
        right.fill_between(rows.start, rows.damage_low, rows.damage_high, alpha=0.2,
                           color=line.get_color(), lw=0)
    right.axhline(0, color="grey", lw=0.8)
    right.axhline(view.tolerance, color="grey", ls="--", lw=0.8, label="tolerance")
    level = int(round(100 * view.confidence))
    right.set(xlabel="window start (epoch)", ylabel=f"damage, points ({level}% interval)",
              title="damage by window start")
    right.legend(fontsize=7)
    fig.suptitle(f"sweep '{view.name}'")
    fig.savefig(path)
    plt.close(fig)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("sweep", help="sweep folder or sweep name under --results-dir")
    parser.add_argument("png", help="where to save the figure")
    parser.add_argument("--results-dir", default="results")
    args = parser.parse_args()
    with periodscan.load_sweep(args.sweep, args.results_dir) as view:
        plot(view, args.png)
        worst = view.table().sort_values("damage").iloc[-1]
    print(f"most damaging window: start {worst.start}, length {worst.length}: "
          f"{worst.damage:+.2f} points ({worst.damage_low:+.2f} to {worst.damage_high:+.2f})")
    print(f"figure: {args.png}")


if __name__ == "__main__":
    main()

"""Time reading trait tables cell by cell (cladewise.data.traits) against a plain
pandas.read_csv of the same file, for specimen tables of growing size.

The tables are invented (fixed seed): 2,000 species, three numeric traits with
some missing cells and a text column of specimen codes; one comma-separated with
decimal points, one semicolon-separated with decimal commas.

Run:  /work/venv/bin/python benchmarks/bench_read_table.py [max_rows]
"""

from __future__ import annotations

import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import pandas as pd

from cladewise.data.traits import read_traits


def write_table(path: Path, n: int, sep: str, decimal: str, seed: int = 1) -> None:
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(n, 3)).round(5)
    lines = [sep.join(["species", "a", "b", "c", "code"])]
    for i in range(n):
        cells = ["" if rng.random() < 0.05 else f"{v:.5f}".replace(".", decimal) for v in x[i]]
        lines.append(sep.join([f"sp{i % 2000}", *cells, f"s{i}"]))
    path.write_text("\n".join(lines) + "\n")


def timed(f, *args, **kw) -> float:
    t0 = time.perf_counter()
    f(*args, **kw)
    return time.perf_counter() - t0


def main() -> None:
    top = int(sys.argv[1]) if len(sys.argv) > 1 else 100_000
    sizes = [n for n in (1_000, 10_000, 100_000) if n <= top]
    print(f"{'rows':>8} {'dialect':<22} {'cladewise s':>12} {'pandas s':>9}")
    with tempfile.TemporaryDirectory() as d:
        for n in sizes:
            for sep, dec, label in ((",", ".", "comma, decimal point"), (";", ",", "semicolon, dec. comma")):
                path = Path(d) / f"t{n}.csv"
                write_table(path, n, sep, dec)
                t_cw = timed(read_traits, path, specimens=True, decimal=dec)
                t_pd = timed(pd.read_csv, path, sep=sep, decimal=dec)
                print(f"{n:>8} {label:<22} {t_cw:>12.3f} {t_pd:>9.3f}")


if __name__ == "__main__":
    main()

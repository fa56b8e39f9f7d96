"""Write the invented demo data set of cladewise (fixed seed, reproducible).

INVENTED DATA. The genus *Vadicola* and all its species, trees and measurements
are made up for demonstration; any likeness to a real taxon is accidental.

Scenario: a fictional radiation of stream-dwelling animals. Per specimen we have
head width (mm) and the mean prey size in its gut (mm); per species the stream
temperature (deg C) where it lives. Traits evolve as correlated Brownian motion on
the log scale for head width and prey size (evolutionary correlation 0.6), with
temperature weakly related; specimens scatter around their species mean.

Run from anywhere:  python demo_data/make_demo.py
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np

from cladewise.data.trees import FlatTree, covariance

from cladewise.data.treefiles import format_newick, format_nexus, parse_newick

SEED = 20240611
HERE = Path(__file__).resolve().parent
N_TREE = 82  # tips in the tree
N_DATA = 80  # species with data: two tips have no measurements
HEIGHT = 10.0
NOTE = "INVENTED demo data for cladewise (fictional genus Vadicola); not real measurements."

# generating parameters (the truth the demo analyses should recover)
ROOT = {"log_head_width": float(np.log(4.0)), "log_prey_size": float(np.log(2.5)), "stream_temp_c": 14.0}
SIGMA = {"log_head_width": 0.07, "log_prey_size": 0.10, "stream_temp_c": 0.6}  # per sqrt(time unit)
CORR = np.array([[1.0, 0.6, 0.15], [0.6, 1.0, 0.25], [0.15, 0.25, 1.0]])
WITHIN_SD = {"log_head_width": 0.06, "log_prey_size": 0.15}  # between specimens, log scale


def species_names(rng: np.random.Generator, n: int) -> list[str]:
    """Made-up Latin-looking epithets."""
    a = ["al", "ber", "cor", "dun", "el", "fer", "gal", "hes", "ir", "lum", "mar", "nor", "os", "pal", "rip", "sil", "tor", "ur", "ven", "xan"]
    b = ["ac", "ed", "in", "ol", "ur", "an", "es", "ot", "il", "ar"]
    c = ["us", "a", "is", "ensis", "icola", "ata", "ipes", "ops"]
    out: set[str] = set()
    while len(out) < n:
        out.add("".join([rng.choice(a), rng.choice(b), rng.choice(c)]))
    return [f"Vadicola_{e}" for e in sorted(out)]


def random_ages(rng: np.random.Generator, n: int) -> tuple[dict[int, list[int]], np.ndarray]:
    """A coalescent-like random ultrametric tree: children lists and node ages."""
    lineages = list(range(n))
    children: dict[int, list[int]] = {}
    ages = np.zeros(2 * n - 1)
    t, nxt = 0.0, n
    while len(lineages) > 1:
        k = len(lineages)
        t += rng.exponential(1.0 / (k * (k - 1) / 2))
        i, j = rng.choice(k, 2, replace=False)
        a, b = lineages[i], lineages[j]
        lineages = [x for x in lineages if x not in (a, b)] + [nxt]
        children[nxt] = [a, b]
        ages[nxt] = t
        nxt += 1
    ages *= HEIGHT / ages[nxt - 1]
    return children, ages


def collapse(children: dict[int, list[int]], n_tips: int, k: int, rng: np.random.Generator) -> None:
    """Make ``k`` polytomies by merging short internal branches into their parent."""
    parent = {c: v for v, cs in children.items() for c in cs}
    internal = [v for v in children if v in parent]
    for v in rng.choice(internal, k, replace=False):
        p = parent[v]
        children[p] = [c for c in children[p] if c != v] + children[v]
        for c in children[v]:
            parent[c] = p
        del children[v]


def to_newick(children: dict[int, list[int]], ages: np.ndarray, names: list[str]) -> str:
    root = max(children)
    out: list[str] = []
    parent = {c: v for v, cs in children.items() for c in cs}
    stack: list[tuple[int, int]] = [(root, 0)]
    while stack:
        v, st = stack.pop()
        if st == 2:
            out.append(",")
            continue
        if st == 0 and v in children:
            out.append("(")
            stack.append((v, 1))
            cs = children[v]
            for j, c in enumerate(reversed(cs)):
                stack.append((c, 0))
                if j < len(cs) - 1:
                    stack.append((-1, 2))
            continue
        out.append(")" if v in children else names[v])
        if v in parent:
            out.append(f":{ages[parent[v]] - ages[v]:.9f}")
    return "".join(out) + ";"


def perturb(children, ages, rng) -> tuple[dict[int, list[int]], np.ndarray]:
    """A tree 'from the posterior': jittered node ages and a few local swaps."""
    ch = {v: list(cs) for v, cs in children.items()}
    ag = ages.copy()
    parent = {c: v for v, cs in ch.items() for c in cs}
    # two nearest-neighbour interchanges: swap a child of v with v's sibling
    for _ in range(2):
        inner = [v for v in ch if v in parent]
        v = int(rng.choice(inner))
        p = parent[v]
        sibs = [s for s in ch[p] if s != v]
        s = int(rng.choice(sibs))
        c = int(rng.choice(ch[v]))
        if ag[s] < ag[v] and ag[c] < ag[p]:
            ch[v] = [x if x != c else s for x in ch[v]]
            ch[p] = [x if x != s else c for x in ch[p]]
            parent[s], parent[c] = v, p
    # jitter internal ages, then restore parent older than children (post-order)
    root = max(ch)
    for v in sorted(ch, key=lambda x: ages[x]):
        ag[v] = ages[v] * np.exp(rng.normal(0, 0.08)) if v != root else ages[v]
        ag[v] = max(ag[v], max(ag[c] for c in ch[v]) + 1e-3)
    ag *= HEIGHT / ag[root]
    return ch, ag


def main() -> None:
    rng = np.random.default_rng(SEED)
    names = species_names(rng, N_TREE)
    children, ages = random_ages(rng, N_TREE)
    collapse(children, N_TREE, 2, rng)
    newick = to_newick(children, ages, names)
    tree = parse_newick(newick)
    (HERE / "vadicola_tree.nwk").write_text(f"[{NOTE}]\n{format_newick(tree, digits=8)}\n")

    sample = [parse_newick(to_newick(*perturb(children, ages, rng), names)) for _ in range(100)]
    (HERE / "vadicola_trees.nex").write_text(
        format_nexus(sample, comment=NOTE + " A sample of 100 trees around vadicola_tree.nwk.")
    )

    # species-level values: correlated BM on the tree, dense covariance (small N)
    C = covariance(tree)
    keys = list(ROOT)
    sd = np.array([SIGMA[k] for k in keys])
    R = CORR * np.outer(sd, sd)
    L = np.linalg.cholesky(np.kron(R, C))
    z = L @ rng.standard_normal(3 * tree.n_tips)
    Y = z.reshape(3, tree.n_tips).T + np.array([ROOT[k] for k in keys])
    with_data = sorted(rng.choice(tree.n_tips, N_DATA, replace=False))
    sp_names = [tree.tip_names[i].replace("_", " ") for i in with_data]  # the table uses spaces
    Y = Y[with_data]

    # specimens: 1..25 per species, log-normal scatter around the species value
    rows = []
    n_spec = rng.integers(1, 26, size=N_DATA)
    for i, sp in enumerate(sp_names):
        for k in range(n_spec[i]):
            hw = np.exp(Y[i, 0] + rng.normal(0, WITHIN_SD["log_head_width"]))
            prey = np.exp(Y[i, 1] + rng.normal(0, WITHIN_SD["log_prey_size"]))
            rows.append([sp, f"V{len(rows) + 1:04d}", hw, prey, Y[i, 2]])
    rows_arr = rows
    # a few missing cells: some gut contents were empty; one species never had prey
    blank = rng.choice(len(rows_arr), 6, replace=False)
    for r in blank:
        rows_arr[r][3] = None
    no_prey = sp_names[int(rng.integers(N_DATA))]
    for r in rows_arr:
        if r[0] == no_prey:
            r[3] = None

    def cell(x, fmt):
        return "" if x is None else fmt.format(x)

    lines = [f"# {NOTE}", "species,specimen,head_width_mm,prey_size_mm,stream_temp_c"]
    for sp, code, hw, prey, temp in rows_arr:
        lines.append(f"{sp},{code},{hw:.3f},{cell(prey, '{:.3f}')},{temp:.2f}")
    (HERE / "vadicola_specimens.csv").write_text("\n".join(lines) + "\n")

    # species table derived from the specimens as written (rounded values)
    import pandas as pd

    spec = pd.read_csv(HERE / "vadicola_specimens.csv", comment="#")
    out = [f"# {NOTE} Means, standard errors (sd/sqrt(n), blank when n < 2) and n per trait.",
           "species,head_width_mm,head_width_mm_se,head_width_mm_n,prey_size_mm,prey_size_mm_se,prey_size_mm_n,stream_temp_c"]
    for sp, g in spec.groupby("species", sort=False):
        parts = [sp]
        for col in ("head_width_mm", "prey_size_mm"):
            v = g[col].dropna()
            n = len(v)
            parts += [
                f"{v.mean():.4f}" if n else "",
                f"{v.std(ddof=1) / np.sqrt(n):.4f}" if n >= 2 else "",
                str(n) if n else "",
            ]
        parts.append(f"{g['stream_temp_c'].iloc[0]:.2f}")
        out.append(",".join(parts))
    # one more gap: a temperature never recorded
    idx = 1 + 1 + int(rng.integers(N_DATA))
    fields = out[idx].split(",")
    fields[-1] = ""
    out[idx] = ",".join(fields)
    (HERE / "vadicola_species.csv").write_text("\n".join(out) + "\n")

    truth = {
        "note": NOTE,
        "seed": SEED,
        "n_tree_tips": N_TREE,
        "n_species_with_data": N_DATA,
        "tree_height": HEIGHT,
        "n_polytomies": 2,
        "traits": keys,
        "trait_columns": {"log_head_width": "log(head_width_mm)", "log_prey_size": "log(prey_size_mm)", "stream_temp_c": "stream_temp_c"},
        "root_values": ROOT,
        "rate_sd_per_sqrt_time": SIGMA,
        "evolutionary_correlation": CORR.tolist(),
        "rate_matrix": R.tolist(),
        "within_species_sd_log": WITHIN_SD,
        "specimens_per_species": [1, 25],
        "species_without_prey_data": no_prey,
        "tips_without_data": [tree.tip_names[i] for i in range(tree.n_tips) if i not in set(with_data)],
        "tree_sample": "100 trees: node ages jittered by exp(N(0, 0.08)) and up to two nearest-neighbour swaps each",
    }
    (HERE / "vadicola_truth.json").write_text(json.dumps(truth, indent=2) + "\n")


if __name__ == "__main__":
    main()

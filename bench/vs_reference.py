"""eigenstream full-graph mode vs scikit-learn's SpectralEmbedding on the same data, one run.

Usage: .venv/bin/python bench/vs_reference.py [--rows 50000 100000 200000] [--columns 50]
                                              [--processes] [--choose-from N]

For each size: the same synthetic manifold table (bench/manifold_data.py) is embedded in 2-D by
scikit-learn (eigen_solver "arpack" and "amg", k = 15) and by eigenstream (k = 15, default
settings, local cluster), each in a fresh process; wall time and peak RSS of the whole process
tree are measured by polling the OS (psutil); trustworthiness (k = 10) of each map is computed
on the same random 2,000-row subset. Ratios are eigenstream / the faster scikit-learn solver.
With ``--processes`` eigenstream also runs with its local workers as processes (``[cluster]
processes = true``; the full graph's default is threads of one process), and with
``--choose-from N`` it also keeps the 2 of its leading N eigenvectors that are not harmonics of
earlier ones (``[embedding] choose_from = N``; the sheet's width first appears at psi_5).
"""

from __future__ import annotations

import argparse
import sys
import tempfile
from pathlib import Path

import numpy as np
import zarr
from _measure import measure
from manifold_data import write_table
from sklearn.manifold import trustworthiness

SKLEARN = """
import sys, numpy as np
from sklearn.manifold import SpectralEmbedding
X = np.load(sys.argv[1])
Y = SpectralEmbedding(n_components=2, n_neighbors=15, eigen_solver=sys.argv[2],
                      random_state=0).fit_transform(X)
np.save(sys.argv[3], Y)
"""

CONFIG = """
[input]
path = "{data}"
[graph]
neighbors = 15
[embedding]
components = 2
[run]
workdir = "{work}"
seed = 0
"""


# The same run with local workers as processes (the full graph's default is threads).
PROCESSES = """
[cluster]
processes = true
"""


def trust(X, Y, rows):
    return trustworthiness(X[rows], Y[rows], n_neighbors=10)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--rows", type=int, nargs="+", default=[50_000, 100_000, 200_000])
    parser.add_argument("--columns", type=int, default=50)
    parser.add_argument("--processes", action="store_true",
                        help="also run eigenstream with worker processes ([cluster] processes = "
                             "true), shown as 'eigenstream proc'")
    parser.add_argument("--choose-from", type=int, default=0,
                        help="also run eigenstream with [embedding] choose_from = N, shown as "
                             "'eigenstream cfN'")
    args = parser.parse_args()
    exe = sys.executable
    lines = []
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        for n in args.rows:
            data = write_table(tmp / f"sheet-{n}.zarr", n, columns=args.columns)
            X = np.asarray(zarr.open_array(str(data), mode="r")[...])
            np.save(tmp / "x.npy", X)
            rows = np.random.default_rng(0).choice(n, size=min(n, 2000), replace=False)
            results = {}
            for solver in ("arpack", "amg"):
                out = tmp / f"sk-{solver}.npy"
                r = measure([exe, "-c", SKLEARN, str(tmp / "x.npy"), solver, str(out)])
                r["trust"] = trust(X, np.load(out), rows) if r["code"] == 0 else float("nan")
                results[f"sklearn {solver}"] = r
            variants = {"eigenstream": ""}
            if args.processes:
                variants["eigenstream proc"] = PROCESSES
            if args.choose_from:
                variants[f"eigenstream cf{args.choose_from}"] = ""
            for i, (name, extra) in enumerate(variants.items()):
                work = tmp / f"work-{n}-{i}"
                cfg = tmp / f"cfg-{n}.toml"
                text = CONFIG.format(data=data, work=work) + extra
                if " cf" in name:
                    text = text.replace("components = 2\n",
                                        f"components = 2\nchoose_from = {args.choose_from}\n")
                cfg.write_text(text)
                r = measure([exe, "-m", "eigenstream", "-q", "run", str(cfg)])
                if r["code"] == 0:
                    Y = np.asarray(zarr.open_group(str(work / "extend" / "data.zarr"),
                                                   mode="r")["coordinates"][...])
                    r["trust"] = trust(X, Y, rows)
                else:
                    r["trust"] = float("nan")
                results[name] = r
            ok = [k for k in results if k.startswith("sklearn") and results[k]["code"] == 0]
            best = min(ok, key=lambda k: results[k]["seconds"]) if ok else None
            for name, r in results.items():
                ratio_t = r["seconds"] / results[best]["seconds"] if best else float("nan")
                ratio_m = r["peak_rss"] / results[best]["peak_rss"] if best else float("nan")
                lines.append(f"{n:>8} {name:<16} {r['seconds']:>9.1f} {r['peak_rss'] / 2**30:>9.2f}"
                             f" {r['trust']:>7.4f} {ratio_t:>9.2f} {ratio_m:>9.2f}")
            print("\n".join(lines[-len(results):]), flush=True)
    print(f"\n{'rows':>8} {'method':<16} {'wall s':>9} {'peak GiB':>9} {'T(10)':>7}"
          f" {'time/best':>9} {'mem/best':>9}")
    print("\n".join(lines))


if __name__ == "__main__":
    main()

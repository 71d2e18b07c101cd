"""Method-by-case table of |method − exact| on the built-in exact references (examples/figures/methods_table.md).

Every method runs the cases of ``mapdyn validate`` (mapdyn.validation.table) with the same seed, so the
initial conditions are shared; the method-independent "stat/wp" rows are left out.

    OMP_NUM_THREADS=1 python tests/reference/make_methods_table.py --method fssh      # one column → JSON
    python tests/reference/make_methods_table.py --merge                                # JSON columns → table

Each ``--method`` run writes examples/figures/methods_table_<label>.json (the CaseResult rows), so the
columns can be produced in separate processes; ``--merge`` writes the Markdown table from them.
"""

from __future__ import annotations

import argparse
import dataclasses
import json
import math
import os
import time

from mapdyn.core.options import MethodOptions
from mapdyn.validation import table
from mapdyn.validation.table import run_validation

_all_cases = table.builtin_cases
# the "stat/wp" rows compare the two exact solvers and do not depend on the method: not run here
table.builtin_cases = lambda: [c for c in _all_cases() if "stat/wp" not in c.name]  # type: ignore[assignment]

HERE = os.path.dirname(os.path.abspath(__file__))
OUT = os.path.join(HERE, "..", "..", "examples", "figures")

#: column label → options (SQC as in `mapdyn validate`: triangle windows, symmetrized zero point)
METHODS = {
    "sqc": MethodOptions("sqc", "triangle"),
    "ehrenfest": MethodOptions("ehrenfest"),
    "spin": MethodOptions("spin"),
    "mash": MethodOptions("mash"),
    "fssh": MethodOptions("fssh"),
    "fssh-edc": MethodOptions("fssh", decoherence="energy"),
}


def run_column(label: str, ntraj: int, seed: int) -> None:
    t0 = time.perf_counter()
    rows = [r for r in run_validation(METHODS[label], quick=False, ntraj=ntraj, seed=seed,
                                      progress=lambda s: print(f"[{label}] {s}", flush=True))
            if "stat/wp" not in r.case]
    out = {"label": label, "method": METHODS[label].describe(), "ntraj": ntraj, "seed": seed,
           "seconds": time.perf_counter() - t0, "rows": [dataclasses.asdict(r) for r in rows]}
    with open(os.path.join(OUT, f"methods_table_{label}.json"), "w") as fh:
        json.dump(out, fh, indent=1)


def _cell(r: dict) -> str:
    if r.get("unavailable"):
        return "n/a"
    d, tol = abs(r["difference"]), r["tolerance"]  # abs: rows written before the closed-channel rows took |value|
    if not math.isfinite(d):
        return "n/a"
    return f"{d:.3f}" + ("" if d <= tol else " ✗")


def merge() -> str:
    cols = []
    for label in METHODS:
        path = os.path.join(OUT, f"methods_table_{label}.json")
        if os.path.exists(path):
            with open(path) as fh:
                cols.append(json.load(fh))
    cases = [r["case"] for r in cols[0]["rows"]]
    exact = {r["case"]: r["exact"] for r in cols[0]["rows"]}
    tol = {r["case"]: r["tolerance"] for r in cols[0]["rows"]}
    by = [{r["case"]: r for r in c["rows"]} for c in cols]
    lines = ["| case | exact | tol | " + " | ".join(c["method"] for c in cols) + " |",
             "|---|---:|---:|" + "---:|" * len(cols)]
    for case in cases:
        cells = [_cell(b[case]) if case in b else "—" for b in by]
        name = case.replace("|", "\\|")
        ex = "HEOM" if "max|" in case else f"{exact[case]:.3f}"
        lines.append(f"| {name} | {ex} | {tol[case]:.2f} | " + " | ".join(cells) + " |")
    passed = [sum(1 for r in c["rows"] if not r.get("unavailable") and abs(r["difference"]) <= r["tolerance"])
              for c in cols]
    ran = [sum(1 for r in c["rows"] if not r.get("unavailable")) for c in cols]
    lines.append("| **within tolerance** | | | " + " | ".join(f"**{p}/{n}**" for p, n in zip(passed, ran)) + " |")
    head = ("|method − exact| per case (✗: above the case tolerance; n/a: the method has no estimator for "
            "that observable here; spin-boson rows: the largest |Δ⟨σz⟩| over the HEOM time grid).  Same cases, seed and initial-condition streams for every method; "
            f"{cols[0]['ntraj']} trajectories per scattering case, ≥ 10000 for spin-boson, seed {cols[0]['seed']}.  "
            "Written by tests/reference/make_methods_table.py.\n\n")
    text = head + "\n".join(lines) + "\n"
    with open(os.path.join(OUT, "methods_table.md"), "w") as fh:
        fh.write(text)
    return text


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--method", choices=list(METHODS), action="append", default=[])
    ap.add_argument("--trajectories", type=int, default=2000)
    ap.add_argument("--seed", type=int, default=2024)
    ap.add_argument("--merge", action="store_true")
    args = ap.parse_args()
    for label in args.method:
        run_column(label, args.trajectories, args.seed)
    if args.merge:
        print(merge())


if __name__ == "__main__":
    main()

"""The demo's summary.json under other BLAS thread counts, BLAS kernels and Python setups.

Runs ``attractorfit demo`` once per setting in a fresh process and compares every number
of each summary.json with the first setting's (relative difference, keys named), and the
verdicts as text. A setting is an environment (``OPENBLAS_NUM_THREADS``, ``OMP_NUM_THREADS``,
``OPENBLAS_CORETYPE`` for another OpenBLAS kernel on the same CPU) and the Python of a
venv (``--python``: for example a venv with the oldest numpy/scipy the pyproject allows).

    python benchmarks/bench_same_everywhere.py --out /tmp/same
    python benchmarks/bench_same_everywhere.py --out /tmp/same --python .venv/bin/python \
        --python /tmp/oldest/bin/python --kernels Haswell SandyBridge

Exit status 1 when any number differs by more than ``--rtol`` (default 1e-6) relative
(numbers both under ``--atol``, 1e-10, are rounding residuals and count as equal).
Only ``versions`` (the package versions) may differ between Pythons.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import subprocess
import sys
import time

IGNORED = ("versions",)


def flatten(obj, prefix=""):
    """``(key path, value)`` of every leaf of a JSON tree."""
    if isinstance(obj, dict):
        for k, v in obj.items():
            yield from flatten(v, f"{prefix}/{k}")
    elif isinstance(obj, list):
        for i, v in enumerate(obj):
            yield from flatten(v, f"{prefix}[{i}]")
    else:
        yield prefix, obj


def differences(a: dict, b: dict, *, rtol: float, atol: float = 1e-10) -> tuple:
    """Largest relative difference of the numbers and the keys that differ.

    Numbers both smaller than ``atol`` in size count as equal: residuals of exact
    equations (``decoder_residual`` about 1e-15, fixed-point shifts about 1e-14) are
    rounding error by definition, and their digits differ with the BLAS kernel.

    Returns
    -------
    max_rel : float
    bad : list of (key, value a, value b)
        Numbers beyond ``rtol``, other leaves that are not equal, keys in one only.
    """
    fa = {k: v for k, v in flatten({k: v for k, v in a.items() if k not in IGNORED})}
    fb = {k: v for k, v in flatten({k: v for k, v in b.items() if k not in IGNORED})}
    worst, bad = 0.0, []
    for key in sorted(set(fa) | set(fb)):
        x, y = fa.get(key, "<missing>"), fb.get(key, "<missing>")
        numbers = all(isinstance(v, (int, float)) and not isinstance(v, bool) for v in (x, y))
        if numbers:
            if x == y or (isinstance(x, float) and isinstance(y, float)
                          and math.isnan(x) and math.isnan(y)):
                continue
            if abs(x) < atol and abs(y) < atol:
                continue
            rel = abs(x - y) / max(abs(x), abs(y), 1e-300)
            worst = max(worst, rel)
            if rel > rtol:
                bad.append((key, x, y))
        elif x != y:
            worst = math.inf
            bad.append((key, x, y))
    return worst, bad


def run_demo(python: str, out: str, env: dict) -> float:
    """One demo run in a fresh process; its wall time in seconds."""
    t0 = time.perf_counter()
    subprocess.run([python, "-c", "import sys; from attractorfit.cli import main; "
                    "sys.exit(main(sys.argv[1:]))", "demo", "--out", out, "--quiet"],
                   check=True, env={**os.environ, **env})
    return time.perf_counter() - t0


def settings(pythons, kernels, threads):
    out = []
    for p, python in enumerate(pythons):
        for n in threads:
            out.append((f"python{p}_threads{n}", python,
                        {"OPENBLAS_NUM_THREADS": str(n), "OMP_NUM_THREADS": str(n),
                         "MKL_NUM_THREADS": str(n)}))
        for k in kernels if p == 0 else ():
            out.append((f"python{p}_{k}", python, {"OPENBLAS_CORETYPE": k}))
    return out


def main(argv=None) -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--out", required=True, help="folder for the demo run folders")
    ap.add_argument("--python", action="append", default=None,
                    help="a Python with attractorfit installed (repeatable; default: this)")
    ap.add_argument("--kernels", nargs="*", default=["Haswell", "SandyBridge", "Prescott"],
                    help="OPENBLAS_CORETYPE values tried with the first Python")
    ap.add_argument("--threads", nargs="*", type=int, default=[1, 2])
    ap.add_argument("--rtol", type=float, default=1e-6)
    ap.add_argument("--atol", type=float, default=1e-10,
                    help="numbers both smaller than this count as equal (rounding residuals)")
    args = ap.parse_args(argv)
    pythons = args.python or [sys.executable]
    runs = []
    for name, python, env in settings(pythons, args.kernels, args.threads):
        folder = os.path.join(args.out, name)
        wall = run_demo(python, folder, env)
        with open(os.path.join(folder, "summary.json")) as fh:
            runs.append((name, json.load(fh), wall))
        print(f"{name}: demo {wall:.0f} s wall", flush=True)
    ref_name, ref, _ = runs[0]
    failed = False
    for name, summary, _ in runs[1:]:
        worst, bad = differences(ref, summary, rtol=args.rtol, atol=args.atol)
        print(f"{name} vs {ref_name}: max relative difference {worst:.3g}; "
              f"{len(bad)} value(s) beyond {args.rtol:g}")
        for key, x, y in bad[:10]:
            print(f"    {key}: {x!r} vs {y!r}")
        failed |= bool(bad)
    return 1 if failed else 0


if __name__ == "__main__":
    sys.exit(main())

"""Longer fuzz run of every loader and the configuration parser (hypothesis).

Targets: spike tables (text and raw bytes), NPZ archives, mutated NWB files, sorter
folders (params.py, .npy arrays, cluster labels), mutated NIX files (through neo),
recordings with arbitrary trials (assembly and binning: coverage, time-unit and silent-
unit checks), and configuration files.

Any input must either load or raise attractorfit's InputError; anything else is a crash.
Prints, per target, the number of inputs tried and the crashes found (with the first
failing input's exception), and exits 1 if any target crashed.

    python benchmarks/bench_fuzz.py [--examples 2000] [--file-examples 500]
"""

from __future__ import annotations

import argparse
import io
import os
import tempfile
import time
import traceback
import warnings

import numpy as np
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from attractorfit.config import load_config
from attractorfit.errors import InputError
from attractorfit.io import load, write_nwb
from attractorfit.binning import bin_spikes
from attractorfit.recording import Recording
from attractorfit.synthetic import switching_recording

COUNTS = {}
CRASHES = {}


def _attempt(target, fn):
    COUNTS[target] = COUNTS.get(target, 0) + 1
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            fn()
    except InputError:
        pass
    except Exception as exc:  # noqa: BLE001 - a crash is what we are looking for
        CRASHES.setdefault(target, []).append(
            f"{type(exc).__name__}: {exc}\n{traceback.format_exc(limit=3)}")


HEADERS = st.sampled_from(["unit,time", "time,unit", "unit\ttime", "unit,time,extra",
                           "u,t", "", "unit;time"])
CELLS = st.one_of(st.integers(-5, 10**12).map(str), st.floats(allow_nan=True,
                                                              allow_infinity=True).map(repr),
                  st.text(max_size=6), st.sampled_from(["", "nan", "inf", "-0", "1e308",
                                                        "0x10", "1,5", '"', "\x00"]))


@st.composite
def tables(draw):
    head = draw(HEADERS)
    rows = draw(st.lists(st.lists(CELLS, min_size=0, max_size=4), max_size=30))
    sep = "\t" if "\t" in head else ","
    return head + "\n" + "\n".join(sep.join(r) for r in rows)


def fuzz(n, n_files=None):
    tmp = tempfile.mkdtemp(prefix="af-fuzz-")
    cfg = settings(max_examples=n, deadline=None, database=None,
                   suppress_health_check=list(HealthCheck))
    # HDF5 targets cost more per input (each file is first walked in a child process)
    cfg_files = settings(max_examples=n_files or n, deadline=None, database=None,
                         suppress_health_check=list(HealthCheck))

    @cfg
    @given(text=tables(), suffix=st.sampled_from([".csv", ".tsv", ".txt"]))
    def table(text, suffix):
        p = os.path.join(tmp, "spikes" + suffix)
        with open(p, "w", encoding="utf-8", errors="surrogatepass") as fh:
            fh.write(text)
        _attempt("table", lambda: load(p))

    @cfg
    @given(data=st.binary(max_size=400))
    def table_bytes(data):
        p = os.path.join(tmp, "raw.csv")
        with open(p, "wb") as fh:
            fh.write(data)
        _attempt("table bytes", lambda: load(p))

    arrays = st.one_of(
        st.lists(st.floats(allow_nan=True, allow_infinity=True), max_size=20).map(np.array),
        st.lists(st.integers(-10, 10**9), max_size=20).map(np.array),
        st.lists(st.text(max_size=4), max_size=10).map(np.array),
        st.just(np.zeros((2, 2))), st.just(np.array(3.0)))

    @cfg
    @given(d=st.dictionaries(st.sampled_from(["spike_times", "spike_units", "trial_start",
                                              "trial_stop", "trial_item", "x"]), arrays))
    def npz(d):
        p = os.path.join(tmp, "rec.npz")
        np.savez(p, **d)
        _attempt("npz", lambda: load(p))

    rec, _ = switching_recording(n_units=4, n_states=2, n_trials=3, rng=0)
    good = os.path.join(tmp, "good.nwb")
    write_nwb(rec, good)
    with open(good, "rb") as fh:
        nwb_bytes = fh.read()

    def mutated_file_target(base: bytes, name: str, target: str):
        """A fuzz target loading ``base`` with bytes overwritten and an optional cut."""
        @cfg_files
        @given(pos=st.lists(st.integers(0, len(base) - 1), min_size=1, max_size=8),
               val=st.integers(0, 255), cut=st.one_of(st.none(), st.integers(0, len(base))))
        def run(pos, val, cut):
            b = bytearray(base)
            for i in pos:
                b[i] = val
            p = os.path.join(tmp, name)
            with open(p, "wb") as fh:
                fh.write(bytes(b if cut is None else b[:cut]))
            _attempt(target, lambda: load(p))
        run.__name__ = target.split()[0]
        return run

    nwb = mutated_file_target(nwb_bytes, "mut.nwb", "nwb (mutated)")

    keys = st.sampled_from(["analysis", "states", "network", "compare", "report", "run", "x"])
    names = st.sampled_from(["bin_size", "window", "n_states", "max_states", "rule", "dt",
                             "nulls", "dpi", "seed", "align", "y"])
    values = st.one_of(st.integers(-3, 10**20).map(str), st.floats().map(repr),
                       st.text(max_size=5).map(repr), st.sampled_from(
                           ["[]", "[1, 0]", "[0.0, 3.0]", "true", '"optimized"', "nan", "inf",
                            '["poisson"]', "{}", "1979-05-27"]))

    @cfg
    @given(body=st.lists(st.tuples(keys, names, values), max_size=6),
           junk=st.text(max_size=20))
    def config(body, junk):
        text = "\n".join(f"[{k}]\n{n} = {v}" for k, n, v in body) + "\n" + junk
        p = os.path.join(tmp, "c.toml")
        with open(p, "w", encoding="utf-8", errors="surrogatepass") as fh:
            fh.write(text)
        _attempt("config", lambda: load_config(p))

    params = st.one_of(
        st.sampled_from(["sample_rate = 30000.0", "sample_rate = 0", "sample_rate = 'x'",
                         "sample_rate = __import__('os').system('false')",
                         "sample_rate = float('nan')", "sample_rate = (", "\x00",
                         "sample_rate = 1e400", "import os\nsample_rate = 1e3"]),
        st.text(max_size=40))

    @cfg
    @given(par=params, times=arrays, clusters=arrays,
           group=st.one_of(st.none(), st.text(max_size=30)))
    def sorter(par, times, clusters, group):
        d = tempfile.mkdtemp(dir=tmp)
        with open(os.path.join(d, "params.py"), "w", encoding="utf-8",
                  errors="surrogatepass") as fh:
            fh.write(par)
        np.save(os.path.join(d, "spike_times.npy"), times)
        np.save(os.path.join(d, "spike_clusters.npy"), clusters)
        if group is not None:
            with open(os.path.join(d, "cluster_group.tsv"), "w", encoding="utf-8",
                      errors="surrogatepass") as fh:
                fh.write("cluster_id\tgroup\n" + group)
        _attempt("sorter folder", lambda: load(d, good_only=bool(group)))

    from neo.io import NixIO

    nix = os.path.join(tmp, "good.nix")
    with NixIO(nix, mode="ow") as io_:
        io_.write_block(rec.to_neo())
    with open(nix, "rb") as fh:
        nix_bytes = fh.read()

    nix_file = mutated_file_target(nix_bytes, "mut.nix", "nix (mutated)")

    @cfg
    @given(data=st.data())
    def recording(data):
        n = data.draw(st.integers(0, 60))
        scale = data.draw(st.sampled_from([1e-3, 1.0, 1e3]))
        times = np.array(data.draw(st.lists(st.floats(0, 100), min_size=n, max_size=n)))
        units = np.array(data.draw(st.lists(st.integers(0, 3), min_size=n, max_size=n)))
        k = data.draw(st.integers(1, 6))
        start = np.array(data.draw(st.lists(st.floats(0, 100), min_size=k, max_size=k)))
        dur = np.array(data.draw(st.lists(st.floats(0, 20), min_size=k, max_size=k)))
        bin_size = data.draw(st.sampled_from([0.01, 0.5, 5.0]))
        min_rate = data.draw(st.sampled_from([0.0, 0.5, 50.0]))

        def go():
            r = Recording.from_arrays(times * scale, units,
                                      trials={"start": start, "stop": start + dur})
            bin_spikes(r, bin_size=bin_size, min_rate_hz=min_rate)
        _attempt("recording+binning", go)

    for f in (table, table_bytes, npz, nwb, sorter, nix_file, recording, config):
        t, c = time.perf_counter(), time.process_time()
        f()
        name = f.__name__
        print(f"{name:<14} done in {time.perf_counter() - t:6.1f} s wall, "
              f"{time.process_time() - c:6.1f} s CPU", flush=True)


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--examples", type=int, default=2000, help="examples per target")
    ap.add_argument("--file-examples", type=int, default=None,
                    help="examples for the NWB and NIX targets (default: --examples)")
    args = ap.parse_args()
    fuzz(args.examples, args.file_examples)
    print()
    print(f"{'target':<16}{'inputs tried':>14}{'crashes':>10}")
    for k, n in COUNTS.items():
        print(f"{k:<16}{n:>14}{len(CRASHES.get(k, [])):>10}")
    for k, v in CRASHES.items():
        print(f"\nfirst crash in {k}:\n{v[0]}")
    raise SystemExit(1 if CRASHES else 0)


if __name__ == "__main__":
    main()

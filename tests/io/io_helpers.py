"""Helpers shared by the io tests: small invented recordings and file checks."""

from __future__ import annotations

import hashlib
import os

import numpy as np
from attractorfit.recording import Recording


def make_recording(*, n_units=5, n_trials=6, seed=0, labels=True) -> Recording:
    """An invented recording: Poisson spikes, disjoint trials with label columns."""
    rng = np.random.default_rng(seed)
    starts = np.arange(n_trials) * 3.0 + 0.5
    stops = starts + 2.5
    times, units = [], []
    for u in range(n_units):
        t = rng.uniform(0.0, stops[-1] + 0.5, size=40 + 10 * u)
        times.append(t)
        units.append(np.full(t.size, u))
    trials = {"start": starts, "stop": stops}
    if labels:
        trials["item"] = np.array(["left", "right", "near", "far", "left", "near"]
                                  * n_trials)[:n_trials]
        trials["correct"] = np.arange(n_trials) % 3 != 0
        trials["code"] = np.arange(n_trials, dtype=np.int64) * 7 - 3
        trials["delay"] = np.linspace(1.0, 2.0, n_trials)
    return Recording.from_arrays(np.concatenate(times), np.concatenate(units),
                                 trials=trials, source="invented")


def assert_same_recording(a: Recording, b: Recording, *, labels=True) -> None:
    """Unit ids, spike times (exactly) and trials (values and kinds) are equal."""
    assert a.unit_ids == b.unit_ids
    assert len(a.spike_times) == len(b.spike_times)
    for x, y in zip(a.spike_times, b.spike_times):
        assert x.dtype == np.float64 and y.dtype == np.float64
        np.testing.assert_array_equal(x, y)
    assert (a.trials is None) == (b.trials is None)
    if a.trials is None:
        return
    cols = list(a.trials) if labels else ["start", "stop"]
    assert sorted(cols) == sorted(b.trials if labels else ["start", "stop"])
    for c in cols:
        x, y = np.asarray(a.trials[c]), np.asarray(b.trials[c])
        assert x.dtype.kind == y.dtype.kind, c
        np.testing.assert_array_equal(x, y)


def sha256(path) -> str:
    with open(path, "rb") as fh:
        return hashlib.sha256(fh.read()).hexdigest()


def folder_state(folder) -> dict:
    """Every file under ``folder`` with its hash and modification time."""
    out = {}
    for d, _, files in os.walk(folder):
        for f in files:
            p = os.path.join(d, f)
            out[p] = (sha256(p), os.stat(p).st_mtime_ns)
    return out


def write_text(path, text: str):
    with open(path, "w", encoding="utf-8", newline="") as fh:
        fh.write(text)
    return path

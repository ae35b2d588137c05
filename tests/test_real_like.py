"""The whole run on recordings built to look like real ones, not like our generators.

Each recording is drawn here, in the test, with plain numpy (inhomogeneous Poisson
spikes from a per-trial rate profile that holds one of a few patterns for a random
stretch), and carries one feature real recordings have and our demo lacks: units that
drop out (silent, slower than ``min_rate_hz``), no trials at all, rates of 1-2 Hz, many
label columns of mixed types. Plumbing checks: every stage and the report finish, the
dropped units are said once, and a failure in the figures loses nothing.
"""

import json

import numpy as np
import pytest

from attractorfit import _figures
from attractorfit.cli import main
from attractorfit.io import write_csv, write_nwb
from attractorfit.recording import Recording

RUN = """
[analysis]
bin_size = 0.1
{extra}
[states]
max_states = 4
latent_dims = 2
[discreteness]
n_boot = 3
[network]
rule = "pseudoinverse"
[compare]
n_surrogates = 3
n_null = 2
nulls = ["poisson", "shuffle"]
refit = false
n_boot = 20
[report]
figure_formats = ["png"]
dpi = 50
"""


def _poisson(rate_hz, t0, length, rng, dead_s=0.002):
    """Poisson spikes in [t0, t0 + length) with a dead time (no interval under 2 ms)."""
    t = np.sort(rng.uniform(t0, t0 + length, rng.poisson(rate_hz * length)))
    keep = np.concatenate([[True], np.diff(t) >= dead_s]) if t.size else np.zeros(0, bool)
    return t[keep]


def _patterned_spikes(n_units, n_trials, *, duration, rate_hz, rng, gap=0.5):
    """Poisson spikes; in each trial the rates hold one of three patterns for 0.3-1.2 s.

    Between trials every unit fires at its base rate (the recording goes on).
    """
    patterns = rate_hz[None, :] * rng.choice([0.4, 1.0, 2.2], size=(3, n_units))
    spikes = [[_poisson(r, 0.0, gap, rng)] for r in rate_hz]
    start = gap + np.arange(n_trials) * (duration + gap)
    for t0 in start:
        t = 0.0
        while t < duration:
            dwell = min(rng.uniform(0.3, 1.2), duration - t)
            rates = patterns[rng.integers(3)]
            for u in range(n_units):
                spikes[u].append(_poisson(rates[u], t0 + t, dwell, rng))
            t += dwell
        for u in range(n_units):
            spikes[u].append(_poisson(rate_hz[u], t0 + duration, gap, rng))
    return [np.sort(np.concatenate(s)) for s in spikes], start, start + duration


def _recording(n_units=14, n_trials=24, *, rate=(4.0, 20.0), duration=2.0, seed=0,
               labels=None, trials=True, extra_units=()):
    rng = np.random.default_rng(seed)
    base = rng.uniform(*rate, size=n_units)
    spikes, start, stop = _patterned_spikes(n_units, n_trials, duration=duration,
                                            rate_hz=base, rng=rng)
    ids = [f"u{i}" for i in range(n_units)]
    for name, times in extra_units:  # first, so that kept units change position
        ids.insert(0, name)
        spikes.insert(0, np.asarray(times, dtype=float))
    table = None
    if trials:
        table = {"start": start, "stop": stop,
                 "item": np.array(list("ab") * (n_trials // 2))[:n_trials]}
        table.update(labels or {})
    times = np.concatenate(spikes)
    units = np.repeat(ids, [len(s) for s in spikes])
    return Recording.from_arrays(times, units, trials=table, unit_ids=ids, source="test")


def _run(tmp_path, rec, capsys, *, extra="", fmt="nwb", args=()):
    cfg = tmp_path / "run.toml"
    cfg.write_text(RUN.format(extra=extra))
    if fmt == "nwb":
        path = tmp_path / "rec.nwb"
        write_nwb(rec, path)
        inputs = [path]
    else:
        path = tmp_path / "spikes.csv"
        write_csv(rec, path, tmp_path / "trials.csv" if rec.trials is not None else None)
        inputs = [path] + (["--trials", tmp_path / "trials.csv"] if rec.trials is not None
                           else [])
    out = tmp_path / "out"
    code = main(["run", *map(str, inputs), "--out", str(out), "--config", str(cfg),
                 "--seed", "2", "--quiet", *args])
    return code, out, capsys.readouterr().err


def _finished(out):
    summary = json.loads((out / "summary.json").read_text())
    assert {"states", "model", "comparison"} <= set(summary)
    html = (out / "report.html").read_text()
    assert "Traceback" not in html
    return summary, html


def test_units_dropped_before_the_state_model(tmp_path, capsys):
    # two silent units and two far below min_rate_hz (the real session dropped 27 of 68)
    slow = [("slow1", np.linspace(3.0, 60.0, 4)), ("slow2", [5.0, 40.0]),
            ("silent1", []), ("silent2", [1e-3])]
    rec = _recording(extra_units=slow)
    code, out, err = _run(tmp_path, rec, capsys, extra='condition = "item"')
    assert code == 0, err
    summary, _ = _finished(out)
    kept = summary["analysis"]["unit_ids"]
    assert not {"slow1", "slow2", "silent1", "silent2"} & set(kept)
    assert len(kept) == 14
    # the binning's remark on slow units is said once, though the data are binned again
    # for the robustness panel at other bin sizes
    assert err.count("min_rate_hz") == 1, err
    assert "fitted-network" not in err  # remarks on our surrogates are not the data's
    assert (out / "run_log.txt").exists()


def test_recording_without_trials(tmp_path, capsys):
    rec = _recording(n_trials=30, trials=False, duration=2.0)
    code, out, err = _run(tmp_path, rec, capsys, fmt="csv",
                          extra="continuous_window_s = 4.0")
    assert code == 0, err
    summary, _ = _finished(out)
    assert summary["recording"]["pseudo_trials"] is True


def test_very_low_rates(tmp_path, capsys):
    # 1-2 Hz, as the units of the shared human session: few spikes per bin
    rec = _recording(n_units=20, n_trials=40, rate=(1.0, 2.0), duration=2.5, seed=3)
    code, out, err = _run(tmp_path, rec, capsys, extra='condition = "item"')
    assert code == 0, err
    _finished(out)


def test_many_label_columns_of_mixed_types(tmp_path, capsys):
    n = 24
    rng = np.random.default_rng(5)
    labels = {"probe": rng.choice(["x", "y", "z"], n),
              "correct": rng.random(n) < 0.8,
              "reaction_time": rng.uniform(0.4, 1.9, n),
              "load": rng.choice([1.0, 2.0, 3.0], n),
              "response": np.where(rng.random(n) < 0.1, np.nan, rng.choice([0.0, 1.0], n)),
              "trial_id": np.array([f"t{i:03d}" for i in range(n)]),
              "blank": np.array([""] * n)}
    rec = _recording(n_trials=n, labels=labels, seed=4)
    code, out, err = _run(tmp_path, rec, capsys, fmt="csv", extra='condition = "probe"')
    assert code == 0, err
    _finished(out)


def test_a_failure_in_the_figures_keeps_the_run_and_resumes_only_the_report(
        tmp_path, capsys, monkeypatch):
    rec = _recording(seed=6)

    def broken(*args, **kwargs):
        raise IndexError("list index out of range")

    monkeypatch.setattr(_figures, "write_figures_and_report", broken)
    code, out, err = _run(tmp_path, rec, capsys, extra='condition = "item"')
    assert code == 1
    assert "Traceback" not in err
    lines = [ln for ln in err.splitlines() if "figures and report failed" in ln]
    assert len(lines) == 1 and "IndexError" in lines[0] and "--resume" in lines[0]
    for name in ("summary.json", "state_model.npz", "model.npz", "comparison.npz",
                 "surrogate.nwb"):
        assert (out / name).exists(), name
    assert not (out / "report.html").exists()
    assert "Traceback" in (out / "run_log.txt").read_text()  # the details are kept

    before = {p.name: p.stat().st_mtime_ns for p in out.iterdir() if p.suffix == ".npz"}
    monkeypatch.undo()
    code = main(["run", str(tmp_path / "rec.nwb"), "--out", str(out), "--config",
                 str(tmp_path / "run.toml"), "--seed", "2", "--resume"])
    captured = capsys.readouterr()
    assert code == 0, captured.err
    assert "doing report" in captured.out
    after = {p.name: p.stat().st_mtime_ns for p in out.iterdir() if p.suffix == ".npz"}
    assert after == before  # no stage was redone
    _finished(out)


@pytest.mark.parametrize("kind", ["value", "input"])
def test_a_bug_in_the_figures_is_never_blamed_on_the_input(tmp_path, capsys, monkeypatch,
                                                          kind):
    from attractorfit.errors import InputError

    def broken(*args, **kwargs):
        raise (ValueError("bad shape") if kind == "value"
               else InputError("n_dims: expected a whole number >= 2, got 1"))

    monkeypatch.setattr(_figures, "write_figures_and_report", broken)
    rec = _recording(seed=7)
    cfg = tmp_path / "run.toml"
    cfg.write_text(RUN.format(extra=""))
    write_nwb(rec, tmp_path / "rec.nwb")
    code = main(["states", str(tmp_path / "rec.nwb"), "--out", str(tmp_path / "s"),
                 "--config", str(cfg), "--quiet", "--no-test"])
    err = capsys.readouterr().err
    assert code == 1 and "please report" in err and "Traceback" not in err
    assert (tmp_path / "s" / "state_model.npz").exists()

"""The command line: exit statuses, one-line errors, run-folder safety, determinism,
interruption. Our own plumbing; the numbers themselves are checked stage by stage."""

import os
import signal
import subprocess
import sys
import time

import numpy as np
import pytest

from attractorfit.cli import main
from attractorfit.io import write_csv, write_nwb
from attractorfit.synthetic import switching_recording

FAST = """
[analysis]
bin_size = 0.05
[states]
max_states = 4
latent_dims = 2
[discreteness]
n_boot = 3
[report]
figure_formats = ["png"]
dpi = 60
"""


@pytest.fixture(scope="module")
def small(tmp_path_factory):
    d = tmp_path_factory.mktemp("inputs")
    rec, _ = switching_recording(n_units=12, n_states=3, n_trials=16, trial_duration=2.0,
                                 mean_dwell_s=0.4, modulation=0.8, rng=11,
                                 labels={"item": np.array(list("abcd") * 4)})
    write_csv(rec, d / "spikes.csv", d / "trials.csv")
    write_nwb(rec, d / "rec.nwb")
    cfg = d / "fast.toml"
    cfg.write_text(FAST)
    return d


def _run(args, capsys):
    code = main([str(a) for a in args])
    out = capsys.readouterr()
    return code, out.out, out.err


def test_inspect_and_defaults(small, capsys):
    code, out, err = _run(["inspect", small / "rec.nwb"], capsys)
    assert code == 0 and "units       12" in out
    code, out, _ = _run(["inspect", small / "spikes.csv", "--trials", small / "trials.csv",
                         "--json"], capsys)
    assert code == 0 and '"n_units": 12' in out
    assert '"isi_under_1p5ms": ' in out and "1.5ms" not in out  # plain JSON keys
    code, out, _ = _run(["defaults"], capsys)
    assert code == 0 and "[analysis]" in out and "bin_size" in out


@pytest.mark.parametrize("args, match", [
    (["inspect", "nope.nwb"], "no such file"),
    (["inspect"], "the following arguments are required"),
    (["bogus"], "invalid choice"),
    (["states", "{rec}", "--seed", "-3", "--out", "{tmp}/o"], "--seed"),
    (["states", "{rec}", "--jobs", "0", "--out", "{tmp}/o"], "--jobs"),
    (["states", "{rec}", "--config", "{tmp}/absent.toml", "--out", "{tmp}/o"], "not found"),
])
def test_bad_usage_exits_2_with_one_line(small, tmp_path, capsys, args, match):
    args = [a.format(rec=small / "rec.nwb", tmp=tmp_path) for a in args]
    code, out, err = _run(args, capsys)
    assert code == 2
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert len(lines) == 1 and match in lines[0] and "Traceback" not in err


def test_renamed_config_key_exits_2_naming_the_new_key(small, tmp_path, capsys):
    (tmp_path / "old.toml").write_text("[network]\ncue_drive = false\n")
    code, out, err = _run(["states", small / "rec.nwb", "--config", tmp_path / "old.toml",
                           "--out", tmp_path / "o"], capsys)
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert code == 2 and len(lines) == 1 and "Traceback" not in err
    assert "old.toml: network.cue_drive was renamed; write network.cue_field" in lines[0]
    assert not (tmp_path / "o").exists()


def test_refuses_input_folder_and_non_empty_folder(small, tmp_path, capsys):
    code, _, err = _run(["states", small / "rec.nwb", "--out", small, "--no-test"], capsys)
    assert code == 2 and "input's folder" in err
    (tmp_path / "mine.txt").write_text("precious")
    code, _, err = _run(["states", small / "rec.nwb", "--out", tmp_path, "--no-test"], capsys)
    assert code == 2 and "not empty" in err
    code, _, err = _run(["states", small / "rec.nwb", "--out", tmp_path, "--no-test",
                         "--force"], capsys)
    assert code == 2 and "not a run output" in err
    assert (tmp_path / "mine.txt").read_text() == "precious"


def test_same_seed_same_bytes_serial_and_parallel(small, tmp_path, capsys):
    outs = []
    for k, jobs in enumerate(["1", "1", "2"]):
        out = tmp_path / f"r{k}"
        code, _, err = _run(["states", small / "rec.nwb", "--out", out, "--config",
                             small / "fast.toml", "--seed", "5", "--jobs", jobs, "--quiet"],
                            capsys)
        assert code == 0, err
        outs.append(out)
    for name in ("summary.json", "states.csv"):
        first = (outs[0] / name).read_bytes()
        assert first == (outs[1] / name).read_bytes() == (outs[2] / name).read_bytes()
    text = (outs[0] / "summary.json").read_text()
    assert str(tmp_path) not in text  # no absolute paths
    # a different seed may change results but must still run
    header = (outs[0] / "states.csv").read_text().splitlines()[0]
    assert header == "trial,start,stop,state,vertex"


def test_input_files_unchanged(small, tmp_path, capsys):
    before = {p: (p.stat().st_mtime_ns, p.read_bytes()) for p in small.iterdir()}
    code, _, _ = _run(["states", small / "spikes.csv", "--trials", small / "trials.csv",
                       "--out", tmp_path / "o", "--config", small / "fast.toml", "--no-test",
                       "--quiet"], capsys)
    assert code == 0
    after = {p: (p.stat().st_mtime_ns, p.read_bytes()) for p in small.iterdir()}
    assert before == after


@pytest.mark.parametrize("delay", [0.2, 1.0])
@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGTERM])
def test_interrupted_run_leaves_no_partial_file(small, tmp_path, sig, delay):
    out = tmp_path / "o"
    cfg = tmp_path / "slow.toml"
    cfg.write_text("[discreteness]\nn_boot = 500\n")
    proc = subprocess.Popen([sys.executable, "-m", "attractorfit.cli", "states",
                             str(small / "rec.nwb"), "--out", str(out), "--config", str(cfg),
                             "--quiet"], stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    deadline = time.time() + 120
    while time.time() < deadline and not out.exists():
        time.sleep(0.1)
    time.sleep(delay)  # early: mid-import; later: inside compiled code
    proc.send_signal(sig)
    _, err = proc.communicate(timeout=120)
    assert proc.returncode in (130, 0), err  # 0 only if it finished first
    leftovers = [p.name for p in out.rglob("*") if p.name.endswith(".part")]
    assert leftovers == []
    if proc.returncode == 130:
        assert b"interrupted" in err and b"Traceback" not in err
        assert not (out / "summary.json").exists()


_INTERRUPT_SCRIPT = """
import sys
from attractorfit import _commands, cli

def boom(args):
    body = "import os, signal\\nos.kill(os.getpid(), signal.SIGINT)\\nfor _ in range(10**8): pass"
    if args.wrap:
        try:
            exec(body)
        except KeyboardInterrupt as exc:  # what a numba callback does to it
            raise SystemError("callback returned a result with an exception set") from exc
    exec(body)  # a string exec, as dataclasses do while a module is imported

def register(sub):
    p = sub.add_parser("boom")
    p.add_argument("--wrap", action="store_true")
    p.set_defaults(func=boom)

_commands.register = register
sys.argv = ["attractorfit", "boom"] + sys.argv[1:]
cli.run()
"""


@pytest.mark.parametrize("wrap", [False, True])
def test_interrupt_surfacing_as_another_exception_exits_130(tmp_path, wrap):
    # Regression (seen in CI): a Ctrl-C landing inside a numba callback surfaced as
    # SystemError with a traceback and exit status 1. The other failure seen, exit -2
    # after main() had caught the interrupt during an import, depends on signal timing;
    # run() now leaves through os._exit(130) and the real-signal test above covers it.
    script = tmp_path / "boom.py"
    script.write_text(_INTERRUPT_SCRIPT)
    args = [sys.executable, str(script)] + (["--wrap"] if wrap else [])
    proc = subprocess.run(args, capture_output=True, timeout=120)
    assert proc.returncode == 130, proc.stderr
    assert b"interrupted" in proc.stderr and b"Traceback" not in proc.stderr

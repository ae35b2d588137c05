"""The stages chained with one configuration, and the run folder.

This module, :mod:`attractorfit._stages` (the stages on a run folder, ``--resume``)
and ``io/`` are the only places that touch disk. Each stage takes the
result dataclass of the stage before; :class:`RunFolder` writes every file
atomically and never into the input's folder unless the user names it.
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import platform
import warnings
from contextlib import contextmanager
from dataclasses import dataclass, field

import numpy as np

from attractorfit._notices import SurrogateWarning, fold_surrogate_warnings
from attractorfit._output import atomic_writer, write_csv, write_json
from attractorfit._threads import one_thread
from attractorfit._validation import collect_input_warnings
from attractorfit.config import check_config_for_data, dumps_config, resolve_config
from attractorfit.errors import InputError, InputWarning

log = logging.getLogger("attractorfit")

__all__ = ["RunFolder", "RunResult", "run_states", "input_record", "versions",
           "categorical_labels", "bin_for_analysis"]

#: Files a run folder may hold; a folder holding anything else is not ours to overwrite.
RUN_FILES = ("summary.json", "states.csv", "posteriors.npz", "config.toml", "model.npz",
             "surrogate.nwb", "report.html", "figures", "tables", "input.json",
             "state_model.npz", "discreteness.npz", "extra_checks.npz", "comparison.npz",
             "run_log.txt", "lab_checks.npz")  # the last: extra_checks.npz of earlier versions


def versions() -> dict:
    """Versions of attractorfit, Python and the numerical libraries (no timestamps)."""
    import importlib.metadata as md

    out = {"python": platform.python_version()}
    for name in ("attractorfit", "numpy", "scipy", "scikit-learn", "numba", "neo", "pynwb",
                 "matplotlib"):
        try:
            out[name] = md.version(name)
        except md.PackageNotFoundError:
            out[name] = None
    return out


def input_record(recording) -> dict:
    """Files read (name, size, SHA-256) and one hash over all of them.

    Only base names are kept (no absolute paths in summary.json); the combined hash
    covers every file read, in the order read.
    """
    files = [{"name": os.path.basename(p["path"]), "size": int(p["size"]),
              "sha256": p["sha256"]} for p in recording.provenance]
    h = hashlib.sha256()
    for f in files:
        h.update(f["sha256"].encode())
    return {"files": files, "sha256": h.hexdigest() if files else None}


def categorical_labels(labels: dict, *, max_levels: int = 12) -> dict:
    """Trial label columns that look like conditions: text, or 2..max_levels values.

    Numeric columns with a distinct value in (almost) every trial, such as event
    times, are not conditions and are left out of condition tables.
    """
    out = {}
    for name, col in labels.items():
        col = np.asarray(col)
        n = np.unique(col.astype(str)).size
        if 2 <= n <= max_levels:
            out[name] = col
    return out


class RunFolder:
    """The output folder of a run.

    Parameters
    ----------
    path : str
        Folder to write into (created if absent).
    inputs : list of str
        Paths of the input files; the folder must not be one of their folders
        unless ``allow_input_folder``.
    force : bool
        Overwrite a folder that already holds a run.
    resume : bool
        Accept a folder that already holds a run, to continue it (``run --resume``).
    """

    def __init__(self, path, *, inputs=(), force=False, allow_input_folder=False,
                 resume=False):
        force = force or resume
        self.path = os.path.abspath(os.fspath(path))
        for p in inputs:
            folder = os.path.abspath(p if os.path.isdir(p) else os.path.dirname(p) or ".")
            if self.path == folder and not allow_input_folder:
                raise InputError(f"--out {path}: that is the input's folder; choose another "
                                 "folder for the results (inputs are never written beside)")
        if os.path.isfile(self.path):
            raise InputError(f"--out {path}: is a file; expected a folder")
        if os.path.isdir(self.path) and os.listdir(self.path) and not force:
            raise InputError(f"--out {path}: folder is not empty; use --force to overwrite "
                             "a previous run there, or choose a new folder")
        if force and os.path.isdir(self.path):
            foreign = [n for n in os.listdir(self.path)
                       if n not in RUN_FILES and not n.startswith(".")]
            if foreign:
                raise InputError(f"--out {path}: holds {foreign[0]!r}, which is not a run "
                                 "output; refusing to overwrite a folder that is not a run")
        os.makedirs(self.path, exist_ok=True)

    def file(self, *parts) -> str:
        p = os.path.join(self.path, *parts)
        os.makedirs(os.path.dirname(p), exist_ok=True)
        return p

    def write_json(self, name, obj):
        write_json(self.file(name), obj)

    def write_csv(self, name, header, rows):
        write_csv(self.file(name), header, rows)

    def write_text(self, name, text):
        with atomic_writer(self.file(name), "w") as fh:
            fh.write(text)

    def write_npz(self, name, **arrays):
        with atomic_writer(self.file(name), "wb") as fh:
            np.savez_compressed(fh, **arrays)


@dataclass
class RunResult:
    """Everything a run produced (the report and the CLI are built from it)."""

    config: dict
    recording: object
    binned: object
    state_fit: object = None
    discreteness: object = None
    network_fit: object = None
    comparison: object = None
    summary: dict = field(default_factory=dict)
    folder: RunFolder | None = None
    surrogates: list = field(default_factory=list)
    surrogate_example: tuple | None = None
    held_out: np.ndarray | None = None
    end_state: dict | None = None
    robustness: object = None
    state_drift: object = None
    unit_drift: object = None


def bin_for_analysis(recording, cfg: dict):
    """Bin ``recording`` as the configuration's [analysis] section says.

    The one place where ``[units] keep`` selects units (before binning).
    """
    from attractorfit.binning import bin_spikes

    a = cfg["analysis"]
    window = tuple(a["window"]) if a["window"] else (None, None)
    recording.multi_units(cfg.get("units", {}).get("multi_unit_column", ""))  # named: exists
    return bin_spikes(recording, bin_size=a["bin_size"], window=window,
                      align=a["align"] or None, min_rate_hz=a["min_rate_hz"],
                      continuous_window_s=a["continuous_window_s"],
                      units=cfg.get("units", {}).get("keep") or None)


def _condition_column(binned, cfg) -> str | None:
    name = cfg["analysis"].get("condition", "")
    labels = categorical_labels(binned.labels)
    if name:
        if name not in binned.labels:
            raise InputError(f"analysis.condition: column {name!r} is not in the trials "
                             f"table; available: {sorted(binned.labels)}")
        return name
    return next(iter(labels), None)


def analysed_counts(binned):
    """``binned`` with only its categorical label columns (those get condition tables)."""
    from attractorfit.binning import BinnedCounts

    return BinnedCounts(**{**binned.__dict__, "labels": categorical_labels(binned.labels)})


def run_states(recording, cfg: dict | None = None, *, seed: int = 0, n_jobs: int = 1,
               progress: bool = False, discreteness: bool = True) -> RunResult:
    """Binning, discrete states and the discreteness test of one recording."""
    from attractorfit.states import analyse_states, discreteness_test

    cfg = resolve_config(cfg) if cfg is None or "run" not in cfg else cfg
    state_seed, disc_seed = np.random.SeedSequence(seed).spawn(2)
    with one_thread():
        binned = bin_for_analysis(recording, cfg)
        check_config_for_data(cfg, n_units=binned.n_units)
        cond = _condition_column(binned, cfg)
        analysed = analysed_counts(binned)
        st = cfg["states"]
        n_states = st["n_states"] or None
        candidates = range(st["min_states"], st["max_states"] + 1)
        state_fit = analyse_states(analysed, n_states=n_states, candidates=candidates,
                                   posterior_threshold=st["posterior_threshold"],
                                   min_segment_s=st["min_segment_s"],
                                   latent_dims=st.get("latent_dims") or None,
                                   rng=np.random.default_rng(state_seed), n_jobs=n_jobs)
        disc = None
        if discreteness:
            d = cfg["discreteness"]
            disc = discreteness_test(analysed, n_boot=d["n_boot"], alpha=d["alpha"],
                                     condition=cond, max_states=st["max_states"],
                                     rng=np.random.default_rng(disc_seed), n_jobs=n_jobs,
                                     progress=progress)
    result = RunResult(config=cfg, recording=recording, binned=analysed, state_fit=state_fit,
                       discreteness=disc)
    with one_thread():
        run_lab_checks(result, seed=seed)
    return result


def base_summary(result: RunResult, *, seed: int) -> dict:
    """The parts of summary.json every command writes."""
    rec, b, cfg = result.recording, result.binned, result.config
    return {
        "versions": versions(),
        "seed": int(seed),
        "input": input_record(rec),
        "recording": {"n_units": rec.n_units, "n_trials": rec.n_trials,
                      "duration_s": rec.duration, "n_units_analysed": b.n_units,
                      "n_trials_analysed": b.n_trials,
                      "pseudo_trials": bool(b.pseudo_trials),
                      "units_left_out": units_left_out(b, cfg),
                      "warnings": list(rec.warnings)},
        "analysis": {"bin_size_s": b.bin_size, "align": cfg["analysis"]["align"] or None,
                     "window": list(cfg["analysis"]["window"]) or None,
                     "unit_ids": list(b.unit_ids)},
        **lab_summary(result),
    }


def units_left_out(binned, cfg: dict) -> dict:
    """summary.json ``recording.units_left_out``: per reason, how many units and which."""
    why = {"selection": "not matched by units.keep = "
                        + json.dumps(cfg.get("units", {}).get("keep", {}), sort_keys=True),
           "silent": "no spike inside the analysis windows",
           "below_min_rate": f"below analysis.min_rate_hz = {cfg['analysis']['min_rate_hz']:g} Hz"}
    return {k: {"n_units": len(ids), "reason": why[k], "units": list(ids)}
            for k, ids in binned.left_out.items()}


def write_state_outputs(folder: RunFolder, result: RunResult) -> None:
    """states.csv and posteriors.npz of a state fit."""
    sf = result.state_fit
    folder.write_csv("states.csv", ["trial", "start", "stop", "state", "vertex"],
                     sf.segment_rows())
    b = result.binned
    post = np.full((b.n_trials, b.n_bins, sf.n_states), np.nan)
    for i, p in enumerate(sf.posteriors):
        post[i, : len(p)] = p
    folder.write_npz("posteriors.npz", posteriors=post, n_valid=b.n_valid,
                     trial=b.trial_index, bin_size=np.float64(b.bin_size),
                     window_start=b.window_start,
                     vertices=sf.vertices.astype(np.int8))



def split_trials(binned, condition, fraction: float, rng) -> tuple:
    """Training and held-out trial positions, stratified by ``condition``.

    Within each level of the condition (or over all trials without one) a random
    ``fraction`` of the trials (at least one when the level has two or more) is held
    out. Returns ``(train, held_out)`` as sorted integer arrays; ``held_out`` is empty
    when ``fraction`` is 0.
    """
    n = binned.n_trials
    if fraction <= 0:
        return np.arange(n), np.zeros(0, dtype=int)
    groups = (np.asarray(binned.labels[condition]).astype(str) if condition
              else np.zeros(n, dtype="<U1"))
    held = []
    for lv in np.unique(groups):
        idx = np.flatnonzero(groups == lv)
        k = int(round(fraction * idx.size))
        if idx.size >= 2:
            k = min(max(k, 1), idx.size - 1)
        else:
            k = 0
        held.extend(rng.permutation(idx)[:k].tolist())
    held = np.sort(np.asarray(held, dtype=int))
    train = np.setdiff1d(np.arange(n), held)
    if train.size < 2 or held.size < 2:
        raise InputError(f"compare.held_out_fraction = {fraction:g} leaves {train.size} "
                         f"training and {held.size} held-out trials of {n}; expected at least "
                         "2 of each (lower the fraction, or set it to 0)")
    return train, held


def _surrogate_task(seed, network_fit):
    """One fitted-network surrogate (module level: it is sent to workers)."""
    return network_fit.simulate_recording(rng=np.random.default_rng(seed))


def model_streams(seed: int) -> dict:
    """The random streams of the model stages, children 2..6 of ``SeedSequence(seed)``.

    Children 0 and 1 belong to :func:`run_states`; the trial split, the fit, the
    surrogates, the nulls and the comparison each take their own child, so running a
    stage alone (``fit``, ``simulate``, ``compare`` on a run folder) draws the same
    numbers as :func:`run_model`.
    """
    names = ("split", "fit", "surrogates", "nulls", "compare")
    return dict(zip(names, np.random.SeedSequence(seed).spawn(7)[2:]))


def run_model(result: RunResult, *, seed: int = 0, n_jobs: int = 1,
              progress: bool = False, scheduler: str | None = None,
              local_cluster: int | None = None) -> RunResult:
    """Fit the network, simulate surrogates and nulls, compare model and data.

    With ``scheduler`` (a Dask scheduler address) or ``local_cluster`` (workers of a
    local Dask cluster) the fitted-network surrogates are simulated there through
    :func:`attractorfit.sweep.run_parallel`, with the same per-surrogate streams as
    :func:`~attractorfit.surrogates.network_surrogates`, so the results are identical.

    Streams: the fit, the surrogates, the nulls and the comparison each take their
    own child of ``SeedSequence(seed)`` (after the two used by :func:`run_states`), so
    adding a stage never changes the random numbers of another (:func:`model_streams`).
    The three steps are also available alone: :func:`fit_model`,
    :func:`simulate_model`, :func:`compare_model`.
    """
    fit_model(result, seed=seed, n_jobs=n_jobs, progress=progress)
    simulate_model(result, seed=seed, n_jobs=n_jobs, progress=progress, scheduler=scheduler,
                   local_cluster=local_cluster)
    return compare_model(result, seed=seed, n_jobs=n_jobs, progress=progress)


def held_out_trials(result: RunResult, *, seed: int = 0) -> tuple:
    """``(train, held_out)`` trial positions of the comparison (stream ``split``)."""
    cfg = result.config
    cond = _condition_column(result.binned, cfg)
    return split_trials(result.binned, cond, cfg["compare"]["held_out_fraction"],
                        np.random.default_rng(model_streams(seed)["split"]))


def fit_model(result: RunResult, *, seed: int = 0, n_jobs: int = 1,
              progress: bool = False) -> RunResult:
    """Fit the network on the training trials (sets ``network_fit`` and ``held_out``)."""
    from attractorfit.fit import FitOptions, fit_network

    cfg = result.config
    b, sf, rec = result.binned, result.state_fit, result.recording
    cond = _condition_column(b, cfg)
    with one_thread():
        train, held = held_out_trials(result, seed=seed)
        _note(progress, "fitting the network")
        nf = fit_network(b, sf, **FitOptions.from_config(cfg).keywords(), recording=rec,
                         condition=cond if cond else False, train_trials=train,
                         rng=np.random.default_rng(model_streams(seed)["fit"]),
                         progress=False)
    result.network_fit = nf
    result.held_out = held
    return result


def simulate_model(result: RunResult, *, seed: int = 0, n_jobs: int = 1,
                   progress: bool = False, scheduler: str | None = None,
                   local_cluster: int | None = None, n: int | None = None) -> RunResult:
    """Simulate the fitted network's surrogate recordings (sets ``surrogates``).

    ``n`` (default: ``compare.n_surrogates``) simulates only the first ``n`` of them;
    surrogate i does not depend on how many are simulated.
    """
    from attractorfit.surrogates import network_surrogates, spawn_streams

    cp = result.config["compare"]
    n = cp["n_surrogates"] if n is None else int(n)
    nf = result.network_fit
    rng = np.random.default_rng(model_streams(seed)["surrogates"])
    with one_thread():
        _note(progress, f"simulating {n} surrogate recordings")
        if scheduler or local_cluster:
            from attractorfit.sweep import run_parallel

            seeds = spawn_streams(rng, n)
            sur = run_parallel(_surrogate_task, seeds, shared=nf, scheduler=scheduler,
                               local_cluster=local_cluster)
        else:
            sur = network_surrogates(nf, n, rng=rng, n_jobs=n_jobs)
    result.surrogates = sur
    for line in fold_surrogate_warnings(sur):
        warnings.warn(line, SurrogateWarning, stacklevel=2)
    return result


def compare_model(result: RunResult, *, seed: int = 0, n_jobs: int = 1,
                  progress: bool = False) -> RunResult:
    """Null surrogates and the model-vs-data comparison (sets ``comparison``).

    Needs ``network_fit`` and all ``compare.n_surrogates`` surrogates (see
    :func:`simulate_model`).
    """
    from attractorfit.compare import compare
    from attractorfit.surrogates import bin_like, null_surrogates

    cfg = result.config
    cp = cfg["compare"]
    b, sf, rec = result.binned, result.state_fit, result.recording
    cond = _condition_column(b, cfg)
    sur = result.surrogates
    streams = model_streams(seed)
    with one_thread():
        held = result.held_out
        if held is None:
            held = held_out_trials(result, seed=seed)[1]
        nulls = {}
        if cp["nulls"]:
            _note(progress, f"simulating null surrogates ({', '.join(cp['nulls'])})")
            nulls = null_surrogates(rec, b, cp["nulls"], cp["n_null"], condition=cond,
                                    rng=np.random.default_rng(streams["nulls"]),
                                    n_jobs=n_jobs)
        _note(progress, "comparing model and data")
        cmp_ = compare(b, sur, sf, recording=rec, nulls=nulls,
                       trials=held if held.size else None, refit=cp["refit"],
                       condition=cond, n_boot=cp["n_boot"],
                       rng=np.random.default_rng(streams["compare"]), n_jobs=n_jobs,
                       multi_unit_column=cfg.get("units", {}).get("multi_unit_column", "auto"))
    result.comparison = cmp_
    first = bin_like(sur[0], b)
    result.surrogate_example = (sur[0], first, sf.decode(first))
    result.held_out = held
    return result


def _note(progress: bool, text: str) -> None:
    """Log a stage (shown with --verbose)."""
    log.info(text)


def run_lab_checks(result: RunResult, *, seed: int = 0) -> RunResult:
    """End-of-window decoding, the robustness panel and drift (DESIGN Amendment 7).

    Each part runs when its configuration section says ``enabled = true`` and fills
    ``result.end_state`` (``{label: EndStateDecoding}``), ``result.robustness``
    (``RobustnessPanel``), ``result.state_drift`` (``StateDrift``) and
    ``result.unit_drift`` (``UnitDrift``). Streams: children 7, 8 and 9 of
    ``SeedSequence(seed)`` (run_states uses 0-1, run_model 2-6), so these checks never
    change the random numbers of another stage.

    These checks are secondary: a part the data cannot support (too few trials of a
    label, a bin size that leaves too few bins) is skipped with an InputWarning naming
    the reason, instead of stopping the run.
    """
    from attractorfit.states import decode_end_state, state_drift, state_robustness
    from attractorfit.stats import unit_drift

    cfg, b, sf = result.config, result.binned, result.state_fit
    dec_seed, rob_seed, drift_seed = np.random.SeedSequence(seed).spawn(10)[7:]
    dc = cfg.get("decoding", {})
    with _skipped_on_bad_data("end-of-window decoding"):
        if dc.get("enabled") and b.n_trials >= 4:
            result.end_state = decode_end_state(
                sf.decoding, categorical_labels(b.labels), end_fraction=dc["end_fraction"],
                feature=dc["feature"], score=dc["score"], n_folds=dc["n_folds"],
                n_permutations=dc["n_permutations"], rng=np.random.default_rng(dec_seed))
    rc = cfg.get("robustness", {})
    with _skipped_on_bad_data("robustness panel"):
        if rc.get("enabled"):
            a = cfg["analysis"]
            rebinned = {}
            for f in rc["bin_factors"]:
                name = {0.5: "bin_halved", 2.0: "bin_doubled"}.get(
                    float(f), f"bin_times_{float(f):g}".replace(".", "p"))
                sub = {**cfg, "analysis": {**a, "bin_size": a["bin_size"] * float(f)}}
                try:  # the main binning has already said what these would repeat
                    with collect_input_warnings([], reemit_input=False):
                        rb = bin_for_analysis(result.recording, sub)
                except InputError as exc:
                    log.info("robustness: bin size x%g left out: %s", f, exc)
                    continue
                if np.array_equal(rb.trial_index, b.trial_index) and rb.n_bins >= 2:
                    rebinned[name] = rb
                else:
                    log.info("robustness: bin size x%g changes the analysed trials; "
                             "left out", f)
            result.robustness = state_robustness(
                b, sf, state_steps=[int(x) for x in rc["state_steps"]], rebinned=rebinned,
                thresholds=rc["thresholds"], rng=np.random.default_rng(rob_seed))
    de = cfg.get("drift", {})
    with _skipped_on_bad_data("drift diagnostics"):
        if de.get("enabled") and b.n_trials >= max(3, de["n_blocks"]):
            order = np.argsort(b.trial_index, kind="stable")
            rate = np.stack([x.sum(axis=0, dtype=np.float64) / (max(len(x), 1) * b.bin_size)
                             for x in b.sequences()])[order]
            result.unit_drift = unit_drift(rate, unit_ids=b.unit_ids, alpha=de["alpha"])
            cond = _condition_column(b, cfg)
            result.state_drift = state_drift(sf.decoding, n_blocks=de["n_blocks"],
                                             n_permutations=de["n_permutations"],
                                             trial_order=b.trial_index,
                                             condition=b.labels[cond] if cond else None,
                                             rng=np.random.default_rng(drift_seed))
            result.state_drift.stratified_by = cond
    return result


@contextmanager
def _skipped_on_bad_data(what: str):
    """Turn an InputError inside a secondary check into a warning (the run goes on)."""
    try:
        yield
    except InputError as exc:
        warnings.warn(f"{what} skipped: {exc}", InputWarning, stacklevel=3)


def lab_summary(result: RunResult) -> dict:
    """summary.json blocks of :func:`run_lab_checks` (empty for parts not run)."""
    out = {}
    es, rob = getattr(result, "end_state", None), getattr(result, "robustness", None)
    ud, sd = getattr(result, "unit_drift", None), getattr(result, "state_drift", None)
    if es is not None:
        out["end_state_decoding"] = {k: v.to_dict() for k, v in es.items()}
    if rob is not None:
        out["robustness"] = rob.summary_block()
    if ud is not None or sd is not None:
        out["drift"] = {}
        if ud is not None:
            out["drift"]["units"] = ud.summary_block()
        if sd is not None:
            out["drift"]["states"] = sd.summary_block()
    return out

"""The stages of a run as separate steps on a run folder, and ``run --resume``.

Part of the orchestration (with :mod:`attractorfit.pipeline`): this module reads and
writes the run folder so that every stage can restart from the folder alone plus the
original input.

Stages, what each one leaves in the folder, and the file that marks it complete
(written last, atomically, so "complete" means "the marker exists"):

========  =====================================================  =================
stage     files                                                  marker
========  =====================================================  =================
states    states.csv, posteriors.npz, summary.json (``states``,  state_model.npz
          ``discreteness``, lab checks), discreteness.npz,
          extra_checks.npz, state_model.npz
fit       summary.json (``model``), model.npz                    model.npz
simulate  surrogate.nwb (the first fitted-network surrogate)     surrogate.nwb
compare   summary.json (``comparison``), comparison.npz,         comparison.npz
          report.html
report    report.html, figures/, tables/                         (always redone)
========  =====================================================  =================

``config.toml`` and ``input.json`` are written before any work; ``input.json`` keeps
the absolute paths of the input files, their SHA-256 and the load options, so later
stages re-read the recording and refuse an input that changed.

The recording is re-read and re-binned (binning is deterministic); the state model is
restored from ``state_model.npz`` (:meth:`~attractorfit.states.StateFit.from_arrays`,
which recomputes the data's decoding from the stored model); the network from
``model.npz``. ``compare`` regenerates the fitted-network surrogates from
``model.npz`` with the recorded seed and the same streams as ``run`` (surrogates are
not stored: one NWB file each would be large), so its numbers equal those of ``run``.
``discreteness.npz``, ``extra_checks.npz`` (end-state decoding, robustness panel, drift;
``lab_checks.npz`` in folders of earlier versions, still read)
and ``comparison.npz`` hold the result objects as plain arrays
plus a JSON layout (``__layout__``) of their fields: no pickles.
"""

from __future__ import annotations

import dataclasses
import importlib
import json
import logging
import os

import numpy as np

from attractorfit import pipeline
from attractorfit._notices import fold_surrogate_warnings
from attractorfit._threads import one_thread
from attractorfit.errors import InputError

log = logging.getLogger("attractorfit")

__all__ = ["STAGES", "MARKERS", "pack_result", "unpack_result", "open_run_folder",
           "write_input_record", "reload_recording", "check_resume", "completed_stages",
           "remove_stage_files", "restore_states", "restore_fit", "restore_comparison",
           "save_states", "save_fit", "save_surrogate",
           "save_comparison", "first_surrogate"]

STAGES = ("states", "fit", "simulate", "compare")
#: File that marks each stage complete (written last).
MARKERS = {"states": "state_model.npz", "fit": "model.npz", "simulate": "surrogate.nwb",
           "compare": "comparison.npz"}
#: The summary.json block each stage adds.
BLOCKS = {"states": "states", "fit": "model", "compare": "comparison"}
#: Stage files removed when a run starts afresh (--force), so none is taken for current.
#: The checks beside the state model (end-state decoding, robustness panel, drift).
EXTRA_CHECKS_FILE = "extra_checks.npz"
#: Its name in run folders of earlier versions (read if the new one is absent).
OLD_EXTRA_CHECKS_FILE = "lab_checks.npz"
STAGE_FILES = ("state_model.npz", "discreteness.npz", EXTRA_CHECKS_FILE,
               OLD_EXTRA_CHECKS_FILE, "model.npz", "surrogate.nwb", "comparison.npz")
#: RunResult attributes filled by pipeline.run_lab_checks, kept in EXTRA_CHECKS_FILE.
LAB_FIELDS = ("end_state", "robustness", "unit_drift", "state_drift")
INPUT_FILE = "input.json"


# =========================================================================== packing
def pack_result(obj) -> dict:
    """Arrays for ``np.savez`` holding a result dataclass tree; see :func:`unpack_result`.

    Dataclasses of this package, dicts, lists, tuples, numpy arrays and scalars, and
    plain Python values are supported; arrays are stored as they are (exact), the
    layout of the tree as JSON text under ``__layout__``. Object arrays are stored
    element by element.
    """
    arrays = {}

    def enc(x):
        if isinstance(x, np.generic):  # before float: np.float64 is a float subclass
            key = f"a{len(arrays)}"
            arrays[key] = np.asarray(x)
            return {"s": key}
        if x is None or isinstance(x, (bool, str, int, float)):
            return x
        if isinstance(x, np.ndarray):
            if x.dtype.kind == "O":
                return {"O": [enc(v) for v in x.ravel().tolist()], "shape": list(x.shape)}
            key = f"a{len(arrays)}"
            arrays[key] = x
            return {"a": key}
        if isinstance(x, list):
            return {"list": [enc(v) for v in x]}
        if isinstance(x, tuple):
            return {"tuple": [enc(v) for v in x]}
        if isinstance(x, dict):
            return {"dict": [[enc(k), enc(v)] for k, v in x.items()]}
        if isinstance(x, np.random.Generator):
            return None  # a generator left on a result is not part of the result
        cls = type(x)
        if dataclasses.is_dataclass(x) and cls.__module__.startswith("attractorfit."):
            return {"dc": f"{cls.__module__}:{cls.__qualname__}",
                    "fields": {f.name: enc(getattr(x, f.name))
                               for f in dataclasses.fields(x)}}
        raise TypeError(f"pack_result: cannot store a {cls.__name__}")

    layout = enc(obj)
    arrays["__layout__"] = np.asarray(json.dumps(layout))
    return arrays


def unpack_result(d):
    """Rebuild what :func:`pack_result` stored (``d``: a loaded npz or a dict)."""
    if "__layout__" not in d:
        raise InputError("result arrays: missing '__layout__'; expected the output of "
                         "pack_result")
    arrays = d

    def dec(x):
        if not isinstance(x, dict):
            return x
        if "a" in x:
            return np.asarray(arrays[x["a"]])
        if "s" in x:
            return np.asarray(arrays[x["s"]])[()]
        if "O" in x:
            out = np.empty(len(x["O"]), dtype=object)
            out[:] = [dec(v) for v in x["O"]]
            return out.reshape(x["shape"])
        if "list" in x:
            return [dec(v) for v in x["list"]]
        if "tuple" in x:
            return tuple(dec(v) for v in x["tuple"])
        if "dict" in x:
            return {_hashable(dec(k)): dec(v) for k, v in x["dict"]}
        if "dc" in x:
            module, name = x["dc"].split(":")
            if not module.startswith("attractorfit."):
                raise InputError(f"result arrays: class {x['dc']!r} is not ours")
            cls = importlib.import_module(module)
            for part in name.split("."):
                cls = getattr(cls, part)
            obj = cls.__new__(cls)
            for k, v in x["fields"].items():
                object.__setattr__(obj, k, dec(v))
            return obj
        raise InputError(f"result arrays: unknown layout entry {sorted(x)}")

    return dec(json.loads(str(np.asarray(d["__layout__"]))))


def _hashable(k):
    return k.item() if isinstance(k, np.generic) else k


def _load_npz(folder, name) -> dict:
    with np.load(folder.file(name), allow_pickle=False) as z:
        return {k: z[k] for k in z.files}


# =========================================================================== folder
class _ExistingFolder(pipeline.RunFolder):
    """A run folder opened by a stage command (it must exist; nothing is checked away)."""

    def __init__(self, path):  # noqa: D107 - no emptiness checks: the run is continued
        self.path = os.path.abspath(os.fspath(path))


def open_run_folder(path, *, command: str):
    """The run folder named on a stage command line, its configuration and seed.

    Raises
    ------
    InputError
        Not a folder, or no config.toml / summary.json in it.
    """
    from attractorfit.config import load_config

    if not os.path.isdir(path):
        raise InputError(f"{path}: not a folder; expected a run folder made by "
                         "'attractorfit states' or 'attractorfit run'")
    folder = _ExistingFolder(path)
    need(folder, "config.toml", "states", command)
    cfg = load_config(folder.file("config.toml"), old_names=True)
    return folder, cfg, int(cfg["run"]["seed"])


def need(folder, name: str, maker: str, command: str) -> None:
    """InputError naming the missing file and the command that makes it."""
    if not os.path.exists(os.path.join(folder.path, name)):
        raise InputError(f"{os.path.join(folder.path, name)}: not found; '{command}' needs "
                         f"it; make it with 'attractorfit {maker}'")


def read_summary(folder) -> dict:
    p = os.path.join(folder.path, "summary.json")
    if not os.path.exists(p):
        return {}
    with open(p, encoding="utf-8") as fh:
        return json.load(fh)


def completed_stages(folder, *, discreteness: bool = True) -> set:
    """Stages whose marker file exists and whose summary.json block is present."""
    summary = read_summary(folder)
    done = set()
    for stage in STAGES:
        if not os.path.exists(os.path.join(folder.path, MARKERS[stage])):
            continue
        block = BLOCKS.get(stage)
        if block and block not in summary:
            continue
        if stage == "states" and discreteness and not (
                "discreteness" in summary
                and os.path.exists(os.path.join(folder.path, "discreteness.npz"))):
            continue
        done.add(stage)
    return done


def remove_stage_files(folder) -> None:
    """Delete the stage files of an earlier run (a fresh start must not reuse them)."""
    for name in STAGE_FILES:
        try:
            os.unlink(os.path.join(folder.path, name))
        except FileNotFoundError:
            pass


# =========================================================================== input
def write_input_record(folder, path, options: dict, recording) -> None:
    """``input.json``: where the input is, how it was loaded, and its SHA-256."""
    opts = {k: (os.path.abspath(os.fspath(v)) if k == "trials" else v)
            for k, v in options.items()}
    rec = pipeline.input_record(recording)
    files = [{"path": os.path.abspath(p["path"]), **f}
             for p, f in zip(recording.provenance, rec["files"])]
    folder.write_json(INPUT_FILE, {"path": os.path.abspath(os.fspath(path)), "options": opts,
                                   "files": files, "sha256": rec["sha256"]})


def _read_input(folder, command) -> dict:
    need(folder, INPUT_FILE, "states", command)
    with open(folder.file(INPUT_FILE), encoding="utf-8") as fh:
        return json.load(fh)


def reload_recording(folder, *, path=None, trials=None, command: str = "run"):
    """The run's recording, re-read from the recorded input with its load options.

    Parameters
    ----------
    folder : RunFolder
    path, trials : str, optional
        New locations of an input (or trials table) that moved; the files must still
        have the recorded SHA-256.
    command : str
        The command asking (named in the error when input.json is missing).

    Raises
    ------
    InputError
        An input file is missing, or its SHA-256 differs from the recorded one.
    """
    from attractorfit.io import load
    from attractorfit.recording import file_provenance

    info = _read_input(folder, command)
    opts = dict(info.get("options", {}))
    if trials is not None:
        opts["trials"] = trials
    where = os.path.join(folder.path, INPUT_FILE)
    if path is None and trials is None:
        for f in info["files"]:
            if not os.path.exists(f["path"]):
                raise InputError(f"{f['path']}: input file recorded in {where} is missing; "
                                 "if it moved, give its new place with --input (or "
                                 "--trials)")
            if file_provenance(f["path"])["sha256"] != f["sha256"]:
                raise InputError(f"{f['path']}: SHA-256 differs from the one recorded in "
                                 f"{where}; the input changed since the run (expected the "
                                 "same file)")
    src = info["path"] if path is None else path
    if not os.path.exists(src):
        raise InputError(f"{src}: input recorded in {where} is missing; if it moved, give "
                         "its new place with --input")
    rec = load(src, **opts)
    _check_same_input(rec, info, where)
    return rec


def _check_same_input(recording, info, where) -> None:
    now = pipeline.input_record(recording)
    if now["sha256"] == info["sha256"]:
        return
    before = info["files"]
    for i, f in enumerate(now["files"]):
        if i >= len(before) or f["sha256"] != before[i]["sha256"]:
            path = recording.provenance[i]["path"]
            was = before[i]["name"] if i < len(before) else "no file"
            raise InputError(f"{path}: SHA-256 differs from the one recorded in {where} "
                             f"(recorded: {was}); expected the input of the run")
    raise InputError(f"{where}: the input files read now ({len(now['files'])}) are not the "
                     f"ones recorded ({len(before)}); expected the input of the run")


# =========================================================================== resume
def check_resume(folder, cfg: dict, seed: int, recording) -> bool:
    """Is there an earlier run of the same input, configuration and seed to continue?

    Returns False when the folder records no earlier run (nothing to continue).

    Raises
    ------
    InputError
        The seed, a setting or the input differs from what the folder records.
        Settings of ``[report]`` may differ: the report is always redone.
    """
    from attractorfit.config import load_config

    cfg_path = os.path.join(folder.path, "config.toml")
    if not os.path.exists(cfg_path):
        return False
    old = load_config(cfg_path, old_names=True)
    old_seed = int(old["run"]["seed"])
    if old_seed != int(seed):
        raise InputError(f"--resume: seed {seed} differs from seed {old_seed} of the run in "
                         f"{folder.path}; use the same seed, or --force to start over")
    for section, values in cfg.items():
        if section == "report":  # figures and report are always redone: free to change
            continue
        for key, value in values.items():
            was = old.get(section, {}).get(key)
            if was != value:
                raise InputError(f"--resume: {section}.{key} = {value!r} differs from "
                                 f"{was!r} in the run in {folder.path}; use the same "
                                 "configuration, or --force to start over")
    info_path = os.path.join(folder.path, INPUT_FILE)
    if os.path.exists(info_path):
        with open(info_path, encoding="utf-8") as fh:
            _check_same_input(recording, json.load(fh), info_path)
    recorded = read_summary(folder).get("input")
    if recorded:
        _check_same_input(recording, recorded, os.path.join(folder.path, "summary.json"))
    return True


# =========================================================================== restore
def restore_states(folder, recording, cfg: dict, *, need_discreteness: bool = False,
                   command: str = "run"):
    """A :class:`~attractorfit.pipeline.RunResult` with the states stage rebuilt.

    The recording is binned as the configuration says (deterministic), the state model
    restored from state_model.npz (the data's decoding recomputed from it) and the
    discreteness result from discreteness.npz when the folder has it.
    """
    from attractorfit.states import StateFit

    need(folder, MARKERS["states"], "states", command)
    need(folder, "summary.json", "states", command)
    if need_discreteness:
        need(folder, "discreteness.npz", "states", command)
    binned = pipeline.analysed_counts(pipeline.bin_for_analysis(recording, cfg))
    res = pipeline.RunResult(config=cfg, recording=recording, binned=binned, folder=folder)
    with one_thread():
        res.state_fit = StateFit.from_arrays(_load_npz(folder, MARKERS["states"]), binned)
    if os.path.exists(folder.file("discreteness.npz")):
        res.discreteness = unpack_result(_load_npz(folder, "discreteness.npz"))
    for checks in (EXTRA_CHECKS_FILE, OLD_EXTRA_CHECKS_FILE):
        if os.path.exists(folder.file(checks)):
            for name, value in unpack_result(_load_npz(folder, checks)).items():
                setattr(res, name, value)
            break
    return res


def restore_fit(folder, result, *, command: str = "run"):
    """Set ``result.network_fit`` from model.npz."""
    from attractorfit.fit import NetworkFit

    need(folder, MARKERS["fit"], "fit", command)
    result.network_fit = NetworkFit.from_arrays(_load_npz(folder, MARKERS["fit"]))
    return result


def restore_comparison(folder, result, *, command: str = "run"):
    """Set ``result.comparison`` (and ``held_out``) from comparison.npz."""
    need(folder, MARKERS["compare"], "compare", command)
    result.comparison = unpack_result(_load_npz(folder, MARKERS["compare"]))
    result.held_out = np.asarray(result.comparison.trials)
    return result


def first_surrogate(folder, result, *, command: str = "report") -> None:
    """Set ``result.surrogate_example`` from surrogate.nwb (for the report's figures)."""
    from attractorfit.io import load
    from attractorfit.surrogates import bin_like

    need(folder, MARKERS["simulate"], "simulate", command)
    sur = load(folder.file(MARKERS["simulate"]))
    first = bin_like(sur, result.binned)
    result.surrogate_example = (sur, first, result.state_fit.decode(first))


# =========================================================================== save
def _update_summary(folder, blocks: dict, *, base=None) -> None:
    summary = read_summary(folder) if base is None else dict(base)
    summary.update(blocks)
    folder.write_json("summary.json", summary)


def save_states(folder, result, *, seed: int, fresh: bool) -> None:
    """Summary blocks, discreteness.npz, then the marker state_model.npz.

    ``fresh`` starts summary.json anew (otherwise blocks of later stages are kept).
    states.csv and posteriors.npz are written by
    :func:`~attractorfit.pipeline.write_state_outputs` before.
    """
    blocks = pipeline.base_summary(result, seed=seed)
    blocks["states"] = result.state_fit.summary_block()
    base = {} if fresh else read_summary(folder)
    base.pop("discreteness", None)
    if result.discreteness is not None:
        blocks["discreteness"] = result.discreteness.summary_block()
    _update_summary(folder, blocks, base=base)
    if result.discreteness is not None:
        folder.write_npz("discreteness.npz", **pack_result(result.discreteness))
    lab = {k: getattr(result, k, None) for k in LAB_FIELDS}
    if any(v is not None for v in lab.values()):
        folder.write_npz(EXTRA_CHECKS_FILE, **pack_result(lab))
    folder.write_npz(MARKERS["states"], **result.state_fit.to_arrays())


def save_fit(folder, result) -> None:
    """summary.json ``model`` block, then model.npz."""
    _update_summary(folder, {"model": result.network_fit.summary_block()})
    folder.write_npz(MARKERS["fit"], **result.network_fit.to_arrays())


def save_surrogate(folder, result, *, if_missing: bool = False) -> None:
    """surrogate.nwb: the first fitted-network surrogate (``if_missing``: keep one)."""
    if if_missing and os.path.exists(folder.file(MARKERS["simulate"])):
        return
    from attractorfit.io import write_nwb

    write_nwb(result.surrogates[0], folder.file(MARKERS["simulate"]))


def save_comparison(folder, result) -> None:
    """summary.json ``comparison`` block, then comparison.npz."""
    block = result.comparison.summary_block()
    if result.surrogates:  # remarks about our surrogates, not about the data
        block["surrogate_warnings"] = fold_surrogate_warnings(result.surrogates)
    _update_summary(folder, {"comparison": block})
    folder.write_npz(MARKERS["compare"], **pack_result(result.comparison))

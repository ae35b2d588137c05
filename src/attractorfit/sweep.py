"""Many fits: grids of state numbers, latent dimensions and decoder rules over many
recordings, with bootstrap replicates, on joblib processes or a Dask cluster.

``attractorfit sweep PATH... --states A:B --out DIR`` fits one task per combination of
input x number of states x (latent dimension) x (decoder rule) x (bootstrap replicate)
and writes

- ``DIR/tasks/<task>.json``: each finished task, written atomically (temporary name,
  then rename) as soon as it finishes;
- ``DIR/sweep.csv``: one row per task, sorted by task key (input base name, number of
  states, dimension, rule, replicate), floats with 10 significant digits, no
  timestamps or absolute paths;
- ``DIR/config.toml``: the resolved configuration.

What a task computes
--------------------
For input ``I``, replicate ``b``, ``S`` states, code dimension ``K`` and rule ``R``:

1. Data: the input binned as the configuration's ``[analysis]`` section says. Replicate
   0 (and a sweep without ``--bootstrap``) is the data as recorded; replicate ``b >= 1``
   resamples the trials with replacement (case resampling of whole trials [1]_) from
   its own random stream.
2. The latent (factor-analysis) space in which vertex codes are fitted has its
   dimension chosen once per input and replicate by cross-validation (the same
   :class:`~attractorfit.latent.LatentModel` settings as
   :func:`~attractorfit.states.analyse_states`), then it is fixed for every ``S``, so the
   codes of all state counts live in the same space and the costly choice runs once.
3. States: :func:`~attractorfit.states.analyse_states` with ``n_states=S`` (sticky prior
   and restarts as :func:`~attractorfit.states.choose_n_states` uses them); the
   log-likelihood and BIC of all trials [2]_; the held-out log-likelihood per bin from
   k-fold cross-validation over whole trials (resampled copies of one trial always fall
   in the same fold, so no trial is ever scored by a model that saw it).
4. ``--dims K``: vertex codes of length ``K`` (combinations with ``2^K < S`` cannot give
   every state its own vertex and are left out of the grid).
5. ``--rules R``: the network fit (:func:`attractorfit.fit.fit_network`) on training
   trials (``[compare] held_out_fraction`` of the trials, stratified by condition, are
   kept out), network surrogates, and the comparison with the held-out trials
   (:func:`attractorfit.compare.compare`) with the data's state model (no refit, no
   null surrogates: those are for ``run`` on a chosen configuration): fit loss,
   ``occupancy_tvd`` and ``rate_r2`` with their references.

Chosen flags: within each input, dimension, rule and replicate, ``chosen_bic`` marks the
``S`` with the smallest BIC and ``chosen_heldout`` the ``S`` with the largest held-out
log-likelihood (ties: the smaller ``S``).

Determinism
-----------
Every random stream of a task is ``SeedSequence(entropy=seed, spawn_key=k)`` where ``k``
is four 32-bit words of the SHA-256 of a text naming the task's parameters (see
:func:`key_stream`), never the task's position in a list. Each part is keyed by the
parameters it depends on: the resampling, the folds and the latent dimension by
(input, replicate); the state fit and its held-out fits by (input, replicate, S); the
codes by (input, replicate, S, K); the network by the full task key. So tasks that
differ only in K or the rule share the same state fit, and replicate 0 of a bootstrap
sweep repeats a sweep without ``--bootstrap``. Inside every task BLAS/OpenMP pools are pinned
to one thread. So ``sweep.csv`` is byte-identical with one process, many, or a Dask
cluster (with one thread per Dask worker process, ``dask worker --nthreads 1``).

Resuming
--------
Rerunning the same command skips every task whose JSON file exists, has no error and
was made with the same parameters (input content hash, seed, settings); a finished
task made with other parameters stops the sweep with an error unless ``--force``
(recompute it). Tasks that ended in an error are always run again.

Exit status: 0 when every task ran, including tasks that ended in an error (each is
recorded in the ``error`` column and its JSON, with one note per failed task on
stderr); 2 bad usage; 1 a bug.

References
----------
.. [1] Efron B, Tibshirani RJ (1993) An Introduction to the Bootstrap. Chapman & Hall,
   New York (resampling cases, ch. 6).
.. [2] Schwarz G (1978) Estimating the dimension of a model. Annals of Statistics
   6:461-464.
"""

from __future__ import annotations

import dataclasses
import hashlib
import itertools
import json
import logging
import math
import os
import re
import sys
import warnings
from contextlib import contextmanager
from dataclasses import dataclass, field

import numpy as np

from attractorfit._output import atomic_write, dumps_json, write_csv
from attractorfit._validation import check_int
from attractorfit.errors import InputError

__all__ = ["SweepTask", "SweepResult", "parse_states", "parse_dims", "key_stream",
           "plan_tasks", "run_sweep", "run_parallel", "parallel_runner", "add_sweep_command",
           "TABLE_COLUMNS", "NETWORK_COLUMNS"]

#: Version of the task-file layout; part of every task's parameters.
TASK_FORMAT = 1
#: Folds over trials for the held-out log-likelihood (capped at the number of trials).
N_FOLDS = 5
#: EM restarts of every state fit.
N_RESTARTS = 3
#: Seconds to wait for a Dask scheduler given by address.
CONNECT_TIMEOUT_S = 20
#: Largest number of states and code dimension a sweep accepts.
MAX_STATES = 64
MAX_DIMS = 8

#: Columns of sweep.csv (network columns are empty without --rules).
NETWORK_COLUMNS = ["fit_loss", "tau_s", "noise", "min_margin", "n_unstable", "occupancy_tvd",
                   "occupancy_tvd_ref95", "rate_r2", "rate_r2_ref05"]
TABLE_COLUMNS = (["input", "n_states", "dims", "rule", "replicate", "n_trials", "n_units",
                  "n_bins", "latent_dims", "code_dims", "loglik", "bic", "heldout_per_bin",
                  "chosen_bic", "chosen_heldout", "cube_r2", "unassigned_fraction"]
                 + NETWORK_COLUMNS + ["error"])

#: Entries a sweep folder may hold (anything else: not ours to write into).
_SWEEP_FILES = ("sweep.csv", "tasks", "config.toml", "bootstrap_intervals.csv")

#: Quantities summarised over bootstrap replicates in ``bootstrap_intervals.csv``.
INTERVAL_QUANTITIES = ["heldout_per_bin", "cube_r2", "unassigned_fraction", "fit_loss",
                       "tau_s", "noise", "min_margin", "n_unstable", "occupancy_tvd",
                       "rate_r2"]
INTERVAL_COLUMNS = ["input", "n_states", "dims", "rule", "quantity", "recorded", "low",
                    "median", "high", "n_replicates"]


# --------------------------------------------------------------------------- options
def parse_states(text) -> list:
    """The state counts of ``--states A:B`` (inclusive), or ``A`` alone.

    Raises
    ------
    InputError
        Not ``A:B`` with whole numbers 1 <= A <= B <= 64.
    """
    text = str(text).strip()
    m = re.fullmatch(r"\s*(\d+)\s*(?::\s*(\d+)\s*)?", text)
    if not m:
        raise InputError(f"--states: expected A:B with whole numbers (e.g. 1:6), got "
                         f"{text!r}")
    a = int(m.group(1))
    b = int(m.group(2)) if m.group(2) is not None else a
    if a < 1:
        raise InputError(f"--states {text}: the smallest number of states must be >= 1, "
                         f"got {a}")
    if b < a:
        raise InputError(f"--states {text}: expected A <= B (the range is inclusive), got "
                         f"{a} > {b}")
    if b > MAX_STATES:
        raise InputError(f"--states {text}: at most {MAX_STATES} states, got {b}")
    return list(range(a, b + 1))


def parse_dims(values) -> list:
    """Code dimensions from ``--dims`` (whole numbers 1..8, space- or comma-separated).

    Raises
    ------
    InputError
        A value that is not a whole number in 1..8, or a repeated value.
    """
    out = []
    for v in values:
        for part in str(v).split(","):
            part = part.strip()
            if not part:
                continue
            if not re.fullmatch(r"\d+", part) or not 1 <= int(part) <= MAX_DIMS:
                raise InputError(f"--dims: expected whole numbers from 1 to {MAX_DIMS}, got "
                                 f"{part!r}")
            if int(part) in out:
                raise InputError(f"--dims: {part} is given twice")
            out.append(int(part))
    if not out:
        raise InputError("--dims: expected at least one whole number")
    return sorted(out)


def _parse_rules(values) -> list:
    try:
        from attractorfit.fit import RULES
    except ImportError as exc:  # pragma: no cover - fit.py ships with the package
        raise InputError(f"--rules: the network fit is not available ({exc})") from None
    out = []
    for v in values:
        for part in str(v).split(","):
            part = part.strip()
            if not part:
                continue
            if part not in RULES:
                raise InputError(f"--rules: unknown decoder rule {part!r}; expected one of "
                                 f"{', '.join(RULES)}")
            if part in out:
                raise InputError(f"--rules: {part} is given twice")
            out.append(part)
    if not out:
        raise InputError("--rules: expected at least one decoder rule")
    return sorted(out)


# --------------------------------------------------------------------------- tasks
def key_stream(seed: int, key: str) -> np.random.SeedSequence:
    """The random stream of a task: ``SeedSequence(entropy=seed, spawn_key=k)``.

    ``k`` is the SHA-256 digest of ``key`` (UTF-8) read as four little-endian 32-bit
    words, so the stream depends only on the seed and the text, not on the task's
    position in a list or the machine that runs it.

    Examples
    --------
    >>> a = key_stream(0, "input=x.nwb;states=3").generate_state(2)
    >>> b = key_stream(0, "input=x.nwb;states=3").generate_state(2)
    >>> bool((a == b).all())
    True
    """
    seed = check_int("seed", seed, low=0)
    digest = hashlib.sha256(str(key).encode("utf-8")).digest()
    words = tuple(int.from_bytes(digest[i:i + 4], "little") for i in range(0, 16, 4))
    return np.random.SeedSequence(entropy=seed, spawn_key=words)


@dataclass(frozen=True)
class SweepTask:
    """One fit of a sweep.

    Attributes
    ----------
    input : str
        Base name of the input file or folder.
    n_states : int
    dims : int or None
        Code dimension K (None: the smallest that separates the states).
    rule : str or None
        Decoder rule of the network fit (None: states only).
    replicate : int or None
        Bootstrap replicate (0: the data as recorded; None: no bootstrap).
    """

    input: str
    n_states: int
    dims: int | None = None
    rule: str | None = None
    replicate: int | None = None

    @property
    def key(self) -> str:
        """Canonical text of the task's parameters (seeds its random streams).

        Absent parameters and replicate 0 are left out, so adding ``--dims``,
        ``--rules`` or ``--bootstrap`` to a sweep does not change the random numbers of
        the parts that do not depend on them (replicate 0 is the data as recorded).
        """
        text = f"{self.group_key};states={self.n_states}"
        if self.dims is not None:
            text += f";dims={self.dims}"
        if self.rule is not None:
            text += f";rule={self.rule}"
        return text

    @property
    def group_key(self) -> str:
        """Text of (input, replicate): the data every task of the group sees."""
        text = f"input={self.input}"
        return text + (f";replicate={self.replicate}" if self.replicate else "")

    @property
    def sort_key(self) -> tuple:
        return (self.input, self.n_states, -1 if self.dims is None else self.dims,
                self.rule or "", -1 if self.replicate is None else self.replicate)

    @property
    def file_name(self) -> str:
        """Name of the task's JSON file under ``tasks/``."""
        name = re.sub(r"[^A-Za-z0-9._-]", "_", self.input)
        name += f"_s{self.n_states}"
        if self.dims is not None:
            name += f"_d{self.dims}"
        if self.rule is not None:
            name += f"_{self.rule}"
        if self.replicate is not None:
            name += f"_b{self.replicate}"
        return name + ".json"


def plan_tasks(inputs, states, *, dims=None, rules=None, bootstrap: int = 0) -> tuple:
    """Every task of a sweep, sorted by task key.

    Parameters
    ----------
    inputs : list of str
        Input base names (distinct).
    states : list of int
    dims : list of int, optional
    rules : list of str, optional
    bootstrap : int
        Replicates 1..bootstrap besides replicate 0 (the data); 0: no bootstrap.

    Returns
    -------
    tasks : list of SweepTask
    left_out : list of (int, int)
        (states, dims) combinations left out because 2^dims < states.
    """
    bootstrap = check_int("bootstrap", bootstrap, low=0)
    reps = list(range(bootstrap + 1)) if bootstrap else [None]
    dim_list = list(dims) if dims else [None]
    left_out = sorted({(s, d) for s in states for d in dim_list
                       if d is not None and 2 ** d < s})
    tasks = [SweepTask(i, s, d, r, b)
             for i, s, d, r, b in itertools.product(inputs, states, dim_list,
                                                     list(rules) if rules else [None], reps)
             if (s, d) not in left_out]
    tasks.sort(key=lambda t: t.sort_key)
    names = {}
    for t in tasks:
        other = names.setdefault(t.file_name, t)
        if other is not t:
            raise InputError(f"inputs {other.input!r} and {t.input!r} give the same task file "
                             f"name {t.file_name!r}; rename one of them")
    return tasks, left_out


# --------------------------------------------------------------------------- parallel
class _SerialRunner:
    def imap_unordered(self, func, items, data):
        for i, (item, d) in enumerate(zip(items, data)):
            yield i, (func(item) if d is _NONE else func(item, d))

    def put(self, obj):
        return obj


class _NoneType:
    def __repr__(self):
        return "<no shared data>"


_NONE = _NoneType()


def _indexed(func, i, item, d):
    return i, (func(item) if isinstance(d, _NoneType) else func(item, d))


class _JoblibRunner:
    def __init__(self, jobs):
        self.jobs = jobs

    def put(self, obj):
        return obj

    def imap_unordered(self, func, items, data):
        from joblib import Parallel, delayed

        par = Parallel(n_jobs=self.jobs, backend="loky", return_as="generator_unordered",
                       batch_size=1)
        yield from par(delayed(_indexed)(func, i, item, d)
                       for i, (item, d) in enumerate(zip(items, data)))


class _DaskRunner:
    def __init__(self, client):
        self.client = client

    def put(self, obj):
        # one copy on every worker, sent once (not with every task)
        return self.client.scatter([obj], broadcast=True)[0]

    def imap_unordered(self, func, items, data):
        from dask.distributed import as_completed

        futures = {}
        for i, (item, d) in enumerate(zip(items, data)):
            fut = (self.client.submit(func, item, pure=False) if d is _NONE
                   else self.client.submit(func, item, d, pure=False))
            futures[fut] = i
        try:
            for fut, res in as_completed(list(futures), with_results=True):
                yield futures[fut], res
        finally:
            for fut in futures:
                fut.release()


def _import_distributed():
    try:
        import dask.distributed as distributed
    except ImportError as exc:
        raise InputError("--scheduler/--local-cluster: Dask distributed is not installed "
                         f"({exc}); install the optional extra: pip install "
                         "'attractorfit[cluster]'") from None
    return distributed


def _check_parallel(jobs, scheduler, local_cluster) -> tuple:
    jobs = check_int("--jobs", jobs, low=1)
    given = [n for n, v in (("--jobs", jobs if jobs > 1 else None), ("--scheduler", scheduler),
                            ("--local-cluster", local_cluster)) if v is not None]
    if len(given) > 1:
        raise InputError(f"{given[0]} and {given[1]}: choose one way to run in parallel")
    if scheduler is not None and not re.fullmatch(r"[a-z0-9+]+://\S+", str(scheduler)):
        raise InputError(f"--scheduler: expected an address like tcp://host:8786, got "
                         f"{scheduler!r}")
    if local_cluster is not None:
        local_cluster = check_int("--local-cluster", local_cluster, low=1)
    return jobs, scheduler, local_cluster


@contextmanager
def parallel_runner(*, jobs: int = 1, scheduler: str | None = None,
                    local_cluster: int | None = None):
    """Context giving a runner on one process, joblib processes or a Dask cluster.

    Parameters
    ----------
    jobs : int
        Worker processes (joblib, loky backend); 1 runs in this process.
    scheduler : str, optional
        Address of a running Dask scheduler (``tcp://host:port``).
    local_cluster : int, optional
        Start a Dask ``LocalCluster`` of this many one-thread worker processes bound
        to 127.0.0.1 (closed on exit).

    Yields
    ------
    runner
        ``runner.put(obj)`` returns a handle to pass as shared data (scattered to
        every Dask worker once); ``runner.imap_unordered(func, items, data)`` yields
        ``(index, result)`` as tasks finish.

    Raises
    ------
    InputError
        More than one of the three, bad values, Dask missing or the scheduler
        unreachable.
    """
    jobs, scheduler, local_cluster = _check_parallel(jobs, scheduler, local_cluster)
    if scheduler is None and local_cluster is None:
        yield _JoblibRunner(jobs) if jobs > 1 else _SerialRunner()
        return
    distributed = _import_distributed()
    cluster = client = None
    try:
        if local_cluster is not None:
            import dask

            # no statistical profiler sampling the workers every 10 ms (its CPU time
            # is taken from the tasks; nobody looks at a dashboard here)
            with dask.config.set({"distributed.worker.profile.enabled": False}):
                cluster = distributed.LocalCluster(
                    n_workers=local_cluster, threads_per_worker=1, processes=True,
                    host="127.0.0.1", dashboard_address=None,
                    silence_logs=logging.CRITICAL)
            client = distributed.Client(cluster)
        else:
            try:
                client = distributed.Client(scheduler, timeout=f"{CONNECT_TIMEOUT_S}s")
            except (OSError, TimeoutError) as exc:
                raise InputError(f"--scheduler {scheduler}: cannot connect ({exc})") from None
        yield _DaskRunner(client)
    finally:
        if client is not None:
            client.close()
        if cluster is not None:
            cluster.close()


def _shared_handles(runner, shared, select, items):
    """Per-item data handles: each distinct shared object is put once."""
    if shared is None:
        return [_NONE] * len(items)
    if select is None:
        h = runner.put(shared)
        return [h] * len(items)
    handles = {}
    out = []
    for item in items:
        k = select(item)
        if k not in handles:
            handles[k] = runner.put(shared[k])
        out.append(handles[k])
    return out


def _pinned(func_item, data=_NONE):
    """Call ``func(item[, data])`` with BLAS/OpenMP pools pinned to one thread."""
    from attractorfit._threads import one_thread

    func, item = func_item
    with one_thread():
        return func(item) if isinstance(data, _NoneType) else func(item, data)


def run_parallel(func, items, *, shared=None, select=None, jobs: int = 1,
                 scheduler: str | None = None, local_cluster: int | None = None,
                 single_thread: bool = True, progress: bool = False,
                 desc: str = "tasks") -> list:
    """Run ``func`` on every item, in this process, on joblib processes or on Dask.

    Deterministic by construction when each item carries its own seed (e.g. a
    :func:`key_stream` or a child of ``SeedSequence.spawn``): results come back in
    item order whatever the order they finish in.

    Parameters
    ----------
    func : callable
        A module-level function (it is pickled to the workers): ``func(item)``, or
        ``func(item, data)`` when ``shared`` is given.
    items : sequence
        Small picklable task descriptions.
    shared : object or dict, optional
        Large data sent to each worker once (Dask: scattered with
        ``broadcast=True``) instead of with every task. Without ``select`` every call
        gets ``shared``; with it, ``shared`` is a dict and the call for ``item`` gets
        ``shared[select(item)]``.
    select : callable, optional
        ``item -> key`` into ``shared`` (evaluated here, not on the workers).
    jobs, scheduler, local_cluster :
        See :func:`parallel_runner`.
    single_thread : bool
        Pin BLAS/OpenMP pools to one thread in every call (threadpoolctl), so float
        reductions do not depend on the worker's thread count.
    progress : bool
        One tqdm bar over the items.
    desc : str
        Label of the bar.

    Returns
    -------
    list
        ``func``'s results in the order of ``items``.

    Examples
    --------
    >>> run_parallel(abs, [-2, 3, -1])
    [2, 3, 1]
    """
    from tqdm.auto import tqdm

    items = list(items)
    out = [None] * len(items)
    with parallel_runner(jobs=jobs, scheduler=scheduler, local_cluster=local_cluster) as run, \
            tqdm(total=len(items), desc=desc, disable=not progress, leave=False) as bar:
        data = _shared_handles(run, shared, select, items)
        if single_thread:
            func, items = _pinned, [(func, item) for item in items]
        for i, res in run.imap_unordered(func, items, data):
            out[i] = res
            bar.update(1)
    return out


# --------------------------------------------------------------------------- task work
def _one_line(exc: BaseException) -> str:
    text = " ".join(str(exc).split())
    return f"{type(exc).__name__}: {text}" if text else type(exc).__name__


@contextmanager
def _task_context():
    """BLAS/OpenMP pinned to one thread; warnings collected, library chatter dropped."""
    from attractorfit._threads import one_thread

    with one_thread(), warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        warnings.simplefilter("ignore", DeprecationWarning)
        warnings.simplefilter("ignore", FutureWarning)
        warnings.simplefilter("ignore", PendingDeprecationWarning)
        yield caught


def _warning_texts(caught) -> list:
    return sorted({" ".join(str(w.message).split()) for w in caught})


def _replicate_data(binned, group_key, replicate, seed):
    """The binned data of a replicate and the original trial of each of its trials."""
    n = binned.n_trials
    if not replicate:
        return binned, np.arange(n)
    rng = np.random.default_rng(key_stream(seed, "resample;" + group_key))
    idx = np.sort(rng.integers(n, size=n))
    sub = binned.subset_trials(idx)
    return dataclasses.replace(sub, trial_index=np.arange(n)), idx


def _latent_space(binned, group_key, seed):
    from attractorfit.latent import LatentModel

    if binned.n_units < 2:
        raise InputError(f"{binned.n_units} unit(s) left after binning; a sweep needs at "
                         "least 2")
    rng = np.random.default_rng(key_stream(seed, "latent;" + group_key))
    return LatentModel("fa", n_dims=None, max_dims=min(10, binned.n_units - 1),
                       rng=rng).fit(binned).result_.n_dims


def _group_worker(item, data):
    """Stage 1 (per input and replicate): the latent dimension, or the error."""
    group_key, replicate, seed = item
    binned = data[0]
    with _task_context() as caught:
        try:
            b, _ = _replicate_data(binned, group_key, replicate, seed)
            out = {"latent_dims": int(_latent_space(b, group_key, seed)), "error": None}
        except Exception as exc:  # recorded, not fatal (see module docstring)
            out = {"latent_dims": None, "error": _one_line(exc)}
    out["warnings"] = _warning_texts(caught)
    return out


def _heldout(seqs, orig, S, group_key, state_key, seed, settings):
    """Held-out log-likelihood of every trial, k-fold over original trials.

    Fold f's model is fitted on the other folds with the f-th child of the state
    stream's held-out seed and scores each of its trials (public PoissonHMM API).
    """
    from attractorfit.states import PoissonHMM
    from attractorfit.states._select import _trial_folds

    uniq = np.unique(orig)
    if uniq.size < 2:
        raise InputError(f"{uniq.size} distinct trial(s); held-out likelihood needs at "
                         "least 2")
    fold_rng = np.random.default_rng(key_stream(seed, "folds;" + group_key))
    folds = _trial_folds(uniq.size, min(settings["n_folds"], uniq.size), fold_rng)
    out = np.empty(len(seqs))
    children = key_stream(seed, "heldout;" + state_key).spawn(len(folds))
    for fold, child in zip(folds, children):
        test = np.isin(orig, uniq[fold])
        model = PoissonHMM(S, sticky=settings["sticky"], n_restarts=settings["n_restarts"],
                           rng=np.random.default_rng(child))
        model.fit([x for x, t in zip(seqs, test) if not t])
        for i in np.flatnonzero(test):
            out[i] = model.score(seqs[i])
    return out


def _state_part(task, binned, orig, latent_dims, seed, settings):
    from attractorfit.binning import BinnedCounts
    from attractorfit.pipeline import categorical_labels
    from attractorfit.states import analyse_states, assign_vertex_codes

    S = task.n_states
    state_key = f"{task.group_key};states={S}"
    analysed = BinnedCounts(**{**binned.__dict__,
                               "labels": categorical_labels(binned.labels)})
    sf = analyse_states(analysed, n_states=S, sticky=settings["sticky"],
                        n_restarts=settings["n_restarts"],
                        posterior_threshold=settings["posterior_threshold"],
                        min_segment_s=settings["min_segment_s"], latent_dims=latent_dims,
                        rng=np.random.default_rng(key_stream(seed, "states;" + state_key)))
    if task.dims is not None:
        codes = assign_vertex_codes(
            np.asarray(sf.model.rates_), latent=sf.latent, n_dims=task.dims,
            rng=np.random.default_rng(key_stream(seed, f"codes;{state_key};dims={task.dims}")))
        sf = dataclasses.replace(sf, codes=codes)
    seqs = analysed.sequences(dtype=np.float64)
    loglik = float(sf.model.score(seqs))
    n_bins = int(sum(len(x) for x in seqs))
    bic = -2.0 * loglik + sf.model.n_parameters() * math.log(n_bins)
    per_trial = _heldout(seqs, orig, S, task.group_key, state_key, seed, settings)
    row = {"n_trials": int(analysed.n_trials), "n_units": int(analysed.n_units),
           "n_bins": n_bins, "latent_dims": int(latent_dims), "code_dims": int(sf.n_dims),
           "loglik": loglik, "bic": float(bic),
           "heldout_per_bin": float(per_trial.sum() / n_bins),
           "cube_r2": float(sf.cube_r2), "unassigned_fraction": float(sf.unassigned_fraction)}
    detail = {"states": sf.summary_block(), "heldout_per_trial": per_trial.tolist()}
    return analysed, sf, row, detail


def sweep_fit_options(settings: dict, task) -> "FitOptions":
    """The fit of a sweep task: the run's mapping of ``[network]``, with the task's rule."""
    from attractorfit.fit import FitOptions

    return FitOptions.from_config({"network": {**settings["network"], "rule": task.rule}})


def _network_part(task, binned, original, orig, recording, sf, seed, settings):
    """Network fit on training trials; comparison with the held-out trials.

    As the ``run`` command's model stage (same [network] and [compare] settings, the
    trial split stratified by condition), except that the comparison uses the data's
    state model only (no refit of the states on every surrogate, no null surrogates):
    those multiply the cost and are for the ``run`` of a chosen configuration.
    """
    from attractorfit.compare import compare
    from attractorfit.fit import fit_network
    from attractorfit.pipeline import _condition_column, split_trials
    from attractorfit.surrogates import network_surrogates

    if task.n_states < 2:
        return {}, {"network": "not fitted: a network needs at least 2 states"}
    cp = settings["compare"]
    split_seed, fit_seed, sur_seed, cmp_seed = key_stream(seed, "network;" + task.key).spawn(4)
    cond = _condition_column(binned, {"analysis": settings["analysis"]})
    # split the original trials, so copies of one trial never sit on both sides
    train_o, held_o = split_trials(original, cond, cp["held_out_fraction"],
                                   np.random.default_rng(split_seed))
    train = np.flatnonzero(np.isin(orig, train_o))
    held = np.flatnonzero(np.isin(orig, held_o))
    net = fit_network(binned, sf, **sweep_fit_options(settings, task).keywords(),
                      recording=recording, condition=cond if cond else False,
                      train_trials=train, rng=np.random.default_rng(fit_seed))
    surrogates = network_surrogates(net, cp["n_surrogates"],
                                    rng=np.random.default_rng(sur_seed))
    cmp = compare(binned, surrogates, sf, recording=recording,
                  trials=held if held.size else None, refit=False, condition=cond,
                  n_boot=cp["n_boot"], rng=np.random.default_rng(cmp_seed))
    block = cmp.summary_block()
    margins = np.asarray(net.margins, dtype=float)
    row = {"fit_loss": float(net.loss), "tau_s": float(net.tau_s), "noise": float(net.noise),
           "min_margin": float(np.min(margins)) if margins.size else None,
           "n_unstable": len(net.unstable_vertices),
           "occupancy_tvd": block.get("occupancy_tvd"),
           "occupancy_tvd_ref95": block.get("occupancy_tvd_ref95"),
           "rate_r2": block.get("rate_r2"), "rate_r2_ref05": block.get("rate_r2_ref05")}
    return row, {"model": net.summary_block(), "comparison": block}


def _task_worker(item, data):
    """Stage 2: one task. Never raises for bad data: the error is returned."""
    task, group, seed, settings = item
    binned, recording = data
    with _task_context() as caught:
        try:
            if group["error"] is not None:
                raise _GroupError(group["error"])
            b, orig = _replicate_data(binned, task.group_key, task.replicate, seed)
            analysed, sf, row, detail = _state_part(task, b, orig, group["latent_dims"],
                                                    seed, settings)
            if task.rule is not None:
                net_row, net_detail = _network_part(task, analysed, binned, orig, recording,
                                                    sf, seed, settings)
                row.update(net_row)
                detail.update(net_detail)
            out = {"row": row, "detail": detail, "error": None}
        except _GroupError as exc:
            out = {"row": {}, "detail": {}, "error": str(exc)}
        except Exception as exc:  # recorded, not fatal (see module docstring)
            out = {"row": {}, "detail": {}, "error": _one_line(exc)}
    out["warnings"] = sorted(set(_warning_texts(caught)) | set(group["warnings"]))
    return out


class _GroupError(Exception):
    """An error of the task's input or replicate, already one line."""


# --------------------------------------------------------------------------- the sweep
@dataclass
class SweepResult:
    """What a sweep wrote.

    Attributes
    ----------
    folder : str
        The output folder.
    tasks : list of SweepTask
        Every task, in table order.
    rows : list of dict
        The rows of ``sweep.csv`` (keys: :data:`TABLE_COLUMNS`), values as written.
    n_run : int
        Tasks computed by this call.
    n_skipped : int
        Tasks found finished (with the same parameters) and not recomputed.
    failed : list of (str, str)
        (task key, error) of every task that ended in an error.
    left_out : list of (int, int)
        (states, dims) combinations left out (2^dims < states).
    """

    folder: str
    tasks: list
    rows: list
    n_run: int
    n_skipped: int
    failed: list = field(default_factory=list)
    left_out: list = field(default_factory=list)


def _input_name(path) -> str:
    return os.path.basename(os.path.normpath(os.fspath(path)))


def _check_out(out, paths) -> str:
    out = os.path.abspath(os.fspath(out))
    for p in paths:
        p = os.path.abspath(os.fspath(p))
        folder = p if os.path.isdir(p) else os.path.dirname(p)
        if out == folder or (os.path.isdir(p) and out.startswith(folder + os.sep)):
            raise InputError(f"--out {out}: that is the folder of input {_input_name(p)!r}; "
                             "choose another folder for the results (inputs are never "
                             "written beside)")
    if os.path.isfile(out):
        raise InputError(f"--out {out}: is a file; expected a folder")
    if os.path.isdir(out):
        foreign = sorted(n for n in os.listdir(out)
                         if n not in _SWEEP_FILES and not n.startswith("."))
        if foreign:
            raise InputError(f"--out {out}: holds {foreign[0]!r}, which is not a sweep "
                             "output; choose a new folder or the folder of an earlier sweep")
    return out


def _settings(cfg: dict) -> dict:
    from attractorfit.states._select import DEFAULT_STICKY

    st = cfg["states"]
    return {"format": TASK_FORMAT, "analysis": dict(cfg["analysis"]),
            "posterior_threshold": st["posterior_threshold"],
            "min_segment_s": st["min_segment_s"], "sticky": DEFAULT_STICKY,
            "n_restarts": N_RESTARTS, "n_folds": N_FOLDS,
            "network": {k: v for k, v in cfg["network"].items() if k != "rule"},
            "compare": {k: cfg["compare"][k]
                        for k in ("n_surrogates", "held_out_fraction", "n_boot")}}


def _params(task, input_hash, seed, settings_hash) -> dict:
    return {"input": task.input, "input_sha256": input_hash, "n_states": task.n_states,
            "dims": task.dims, "rule": task.rule, "replicate": task.replicate,
            "seed": int(seed), "settings_sha256": settings_hash, "format": TASK_FORMAT}


def _read_task(path):
    try:
        with open(path, encoding="utf-8") as fh:
            return json.load(fh)
    except FileNotFoundError:
        return None
    except (OSError, ValueError):
        return {}


def _load_inputs(paths, cfg, *, need_recording):
    """Load and bin every input; errors are kept per input, not raised."""
    from attractorfit.io import load
    from attractorfit.pipeline import bin_for_analysis, input_record

    data, hashes, errors, notes = {}, {}, {}, {}
    for p in paths:
        name = _input_name(p)
        with _task_context() as caught:
            try:
                rec = load(p)
                binned = bin_for_analysis(rec, cfg)
            except Exception as exc:  # recorded per task, not fatal
                errors[name] = _one_line(exc)
                rec = None
        notes[name] = _warning_texts(caught)
        if rec is None:
            hashes[name] = None
            continue
        notes[name] = sorted(set(notes[name]) | {" ".join(w.split()) for w in rec.warnings})
        hashes[name] = input_record(rec)["sha256"]
        data[name] = (binned, rec if need_recording else None)
    return data, hashes, errors, notes


def _note(message, stream):
    if stream is not None:
        print(f"attractorfit: {message}", file=stream)


def run_sweep(paths, *, states, out, dims=None, rules=None, bootstrap: int = 0,
              seed: int = 0, config=None, jobs: int = 1, scheduler: str | None = None,
              local_cluster: int | None = None, force: bool = False,
              progress: bool = False, notes=None) -> SweepResult:
    """Run (or resume) a sweep and write ``sweep.csv`` and ``tasks/*.json``.

    Parameters
    ----------
    paths : list of str
        Input recordings (anything :func:`attractorfit.load` reads); their base names
        must be distinct.
    states : str or list of int
        ``"A:B"`` (inclusive) or the list of state counts.
    out : str
        Output folder (created; may hold an earlier sweep, which is resumed).
    dims : list of int, optional
        Code dimensions K.
    rules : list of str, optional
        Decoder rules; each adds the network fit and comparison to the task.
    bootstrap : int
        Replicates that resample trials with replacement (besides replicate 0).
    seed : int
        Seed of every stream (see :func:`key_stream`).
    config : dict, optional
        Resolved configuration (:func:`attractorfit.config.resolve_config`); its
        ``[analysis]`` section bins the inputs, ``[states]`` gives the posterior
        threshold and minimum segment (its state counts are replaced by ``states``).
    jobs, scheduler, local_cluster :
        Where the tasks run (see :func:`parallel_runner`); results do not depend on it.
    force : bool
        Recompute finished tasks whose stored parameters differ from this call's.
    progress : bool
        One tqdm bar over the tasks.
    notes : file-like, optional
        Where one-line notes go (failed tasks, resumed tasks); None: nowhere.

    Returns
    -------
    SweepResult

    Raises
    ------
    InputError
        Bad options, repeated input names, an output folder that is an input's folder
        or holds other files, a finished task made with other parameters (without
        ``force``), an unreachable scheduler.
    """
    from tqdm.auto import tqdm

    from attractorfit.config import dumps_config, resolve_config

    if isinstance(states, str):
        states = parse_states(states)
    states = sorted({check_int("states", s, low=1, high=MAX_STATES) for s in states})
    if not states:
        raise InputError("--states: expected at least one number of states")
    dims = parse_dims(dims) if dims else None
    rules = _parse_rules(rules) if rules else None
    bootstrap = check_int("--bootstrap", bootstrap, low=0)
    seed = check_int("--seed", seed, low=0)
    paths = [os.fspath(p) for p in paths]
    if not paths:
        raise InputError("sweep: expected at least one input path")
    seen = {}
    for p in paths:
        name = _input_name(p)
        if name in seen:
            raise InputError(f"inputs {seen[name]!r} and {p!r} have the same base name "
                             f"{name!r}; the table names inputs by base name, so rename or "
                             "link one of them")
        seen[name] = p
    cfg = resolve_config(None) if config is None else config
    cfg = resolve_config({s: dict(v) for s, v in cfg.items()}, source="configuration")
    settings = _settings(cfg)
    settings_hash = hashlib.sha256(dumps_json(settings).encode()).hexdigest()
    out = _check_out(out, paths)
    jobs, scheduler, local_cluster = _check_parallel(jobs, scheduler, local_cluster)
    tasks, left_out = plan_tasks(list(seen), states, dims=dims, rules=rules,
                                 bootstrap=bootstrap)
    if not tasks:
        raise InputError(f"--dims {dims}: no combination with --states gives every state "
                         "its own vertex (need 2^dims >= states)")
    if left_out:
        _note(f"note: left out {len(left_out)} (states, dims) combination(s) where "
              "2^dims < states", notes)

    data, hashes, input_errors, input_notes = _load_inputs(paths, cfg,
                                                           need_recording=bool(rules))
    task_dir = os.path.join(out, "tasks")
    docs, todo = {}, []
    for t in tasks:
        expected = _params(t, hashes[t.input], seed, settings_hash)
        doc = _read_task(os.path.join(task_dir, t.file_name))
        if doc is None or doc == {} or doc.get("error") is not None:
            todo.append(t)
            continue
        stored = doc.get("task", {})
        if stored != expected:
            diff = next((k for k in expected if stored.get(k) != expected[k]), "task")
            if not force:
                raise InputError(
                    f"{os.path.join('tasks', t.file_name)}: finished task was made with "
                    f"{diff} = {stored.get(diff)!r}, this sweep has {expected.get(diff)!r}; "
                    "use --force to recompute it, or another --out")
            todo.append(t)
            continue
        docs[t] = doc
    n_skipped = len(docs)
    if n_skipped:
        _note(f"resuming: {n_skipped} of {len(tasks)} task(s) already finished", notes)
    os.makedirs(task_dir, exist_ok=True)

    def finish(t, res):
        doc = {"key": t.key, "task": _params(t, hashes[t.input], seed, settings_hash),
               "row": res["row"], "error": res["error"],
               "warnings": sorted(set(res["warnings"]) | set(input_notes[t.input])),
               **res.get("detail", {})}
        text = dumps_json(doc)
        atomic_write(os.path.join(task_dir, t.file_name), text)
        docs[t] = json.loads(text)

    runnable = []
    for t in todo:
        if t.input in input_errors:
            finish(t, {"row": {}, "error": input_errors[t.input], "warnings": []})
        else:
            runnable.append(t)
    # costliest first (more states, then networks), so workers finish together; the
    # order changes nothing in the results
    runnable.sort(key=lambda t: (-t.n_states, t.rule is None, t.sort_key))
    if runnable:
        with parallel_runner(jobs=jobs, scheduler=scheduler,
                             local_cluster=local_cluster) as runner, \
                tqdm(total=len(tasks), initial=len(tasks) - len(runnable), desc="sweep",
                     unit="task", disable=not progress) as bar:
            handles = {name: runner.put(d) for name, d in data.items()
                       if any(t.input == name for t in runnable)}
            group_keys = sorted({(t.input, t.group_key, t.replicate) for t in runnable})
            items = [(g, r, seed) for _, g, r in group_keys]
            groups = {}
            for i, res in runner.imap_unordered(_group_worker, items,
                                                [handles[n] for n, _, _ in group_keys]):
                groups[group_keys[i][1]] = res
            items = [(t, groups[t.group_key], seed, settings) for t in runnable]
            for i, res in runner.imap_unordered(_task_worker, items,
                                                [handles[t.input] for t in runnable]):
                finish(runnable[i], res)
                bar.update(1)
    rows = _table_rows(tasks, docs)
    write_csv(os.path.join(out, "sweep.csv"), TABLE_COLUMNS,
              [[r[c] for c in TABLE_COLUMNS] for r in rows])
    if bootstrap:
        write_csv(os.path.join(out, "bootstrap_intervals.csv"), INTERVAL_COLUMNS,
                  [[r[c] for c in INTERVAL_COLUMNS] for r in bootstrap_intervals(rows)])
    atomic_write(os.path.join(out, "config.toml"), dumps_config(cfg))
    failed = [(t.key, docs[t]["error"]) for t in tasks if docs[t].get("error")]
    for key, err in failed:
        _note(f"note: task {key} failed: {err}", notes)
    return SweepResult(folder=out, tasks=tasks, rows=rows, n_run=len(todo),
                       n_skipped=n_skipped, failed=failed, left_out=left_out)


def bootstrap_intervals(rows, *, level: float = 0.95) -> list:
    """Percentile bootstrap intervals over the replicates of each fit.

    For every (input, states, dims, rule) and every quantity of
    :data:`INTERVAL_QUANTITIES`: the value on the data as recorded (replicate 0), and
    the ``(1 - level) / 2``, 0.5 and ``(1 + level) / 2`` quantiles of the same quantity
    over the replicates that resample trials (replicates >= 1, failed or missing
    values left out) -- the percentile interval [1]_. It describes how much the fit
    would move with another set of trials of the same session, not a confidence
    interval for a brain.

    Parameters
    ----------
    rows : list of dict
        Rows of ``sweep.csv`` (:attr:`SweepResult.rows`).
    level : float
        Coverage of the interval.

    Returns
    -------
    list of dict
        Keys :data:`INTERVAL_COLUMNS`; groups without replicates are left out.

    References
    ----------
    .. [1] Efron B, Tibshirani RJ (1993). An Introduction to the Bootstrap. Chapman &
       Hall, ch. 13.
    """
    groups = {}
    for r in rows:
        if r.get("replicate") is None:
            continue
        key = (r["input"], r["n_states"], r["dims"], r["rule"])
        groups.setdefault(key, []).append(r)
    lo_q, hi_q = (1.0 - level) / 2.0, (1.0 + level) / 2.0
    out = []
    for key in sorted(groups, key=lambda k: tuple("" if v is None else f"{v!s:>12}"
                                                   for v in k)):
        members = groups[key]
        recorded = next((m for m in members if m["replicate"] == 0), {})
        for q in INTERVAL_QUANTITIES:
            vals = np.array([float(m[q]) for m in members
                             if m["replicate"] >= 1 and m.get(q) is not None
                             and not m.get("error")], dtype=float)
            vals = vals[np.isfinite(vals)]
            if vals.size == 0:
                continue
            low, med, high = np.quantile(vals, [lo_q, 0.5, hi_q])
            out.append(dict(zip(INTERVAL_COLUMNS, [*key, q, recorded.get(q), float(low),
                                                   float(med), float(high), int(vals.size)])))
    return out


def _table_rows(tasks, docs) -> list:
    """Rows of sweep.csv from the task documents, with the chosen flags."""
    rows = []
    for t in tasks:
        doc = docs[t]
        r = {c: None for c in TABLE_COLUMNS}
        r.update({"input": t.input, "n_states": t.n_states, "dims": t.dims, "rule": t.rule,
                  "replicate": t.replicate})
        if not doc.get("error"):
            r.update({k: v for k, v in doc.get("row", {}).items() if k in r})
        r["error"] = doc.get("error") or None
        rows.append(r)
    groups = {}
    for r in rows:
        groups.setdefault((r["input"], r["dims"], r["rule"], r["replicate"]), []).append(r)
    for members in groups.values():
        ok = [r for r in members if r["error"] is None]
        for col, flag, sign in (("bic", "chosen_bic", 1.0), ("heldout_per_bin",
                                                              "chosen_heldout", -1.0)):
            vals = [(sign * r[col], r["n_states"]) for r in ok
                    if r[col] is not None and math.isfinite(r[col])]
            best = min(vals)[1] if vals else None
            for r in members:
                r[flag] = None if r["error"] is not None else int(r["n_states"] == best)
    return rows


# --------------------------------------------------------------------------- command line
def add_sweep_command(sub) -> None:
    """Add the ``sweep`` sub-command to an argparse sub-parser collection ``sub``.

    The parsed arguments carry ``func``: a function taking them and returning the
    exit status.
    """
    p = sub.add_parser(
        "sweep", help="many fits: state numbers, dimensions, decoder rules, bootstrap "
                      "replicates over many recordings, in parallel, resumable",
        description="Fit every combination of input, number of states (--states A:B, "
                    "inclusive), code dimension (--dims), decoder rule (--rules) and "
                    "bootstrap replicate (--bootstrap N). Writes DIR/sweep.csv (one row "
                    "per task: held-out log-likelihood per bin, BIC, chosen flags and, "
                    "with --rules, the network fit and its comparison with held-out "
                    "trials) and DIR/tasks/*.json. The table does not depend on where it "
                    "ran (one process, --jobs, or a Dask cluster). Rerunning the same "
                    "command resumes an interrupted sweep. Tasks that fail are recorded "
                    "in the error column and do not stop the others (exit status 0).")
    p.add_argument("paths", nargs="+", metavar="PATH",
                   help="recordings (NWB, NIX, CSV/TSV, NPZ, sorter folders); base names "
                        "must differ")
    p.add_argument("--states", required=True, metavar="A:B",
                   help="numbers of states to fit, A to B inclusive (e.g. 1:6)")
    p.add_argument("--dims", nargs="+", metavar="K",
                   help="code (latent) dimensions of the vertex codes and the network; "
                        "combinations with 2^K below the number of states are left out")
    p.add_argument("--rules", nargs="+", metavar="RULE",
                   help="decoder rules (pseudoinverse, optimized, hebbian): adds the "
                        "network fit on training trials and its comparison with the "
                        "held-out ones (compare.held_out_fraction, default half)")
    p.add_argument("--bootstrap", type=int, default=0, metavar="N",
                   help="also N replicates that resample trials with replacement "
                        "(replicate 0 is the data as recorded); writes "
                        "DIR/bootstrap_intervals.csv: 95%% percentile intervals of the "
                        "state and network quantities over the replicates")
    p.add_argument("--out", required=True, metavar="DIR",
                   help="output folder (an earlier sweep there is resumed)")
    where = p.add_mutually_exclusive_group()
    where.add_argument("--jobs", type=int, default=1, metavar="N",
                       help="worker processes on this machine (joblib)")
    where.add_argument("--scheduler", metavar="ADDRESS",
                       help="address of a running Dask scheduler, e.g. tcp://host:8786 "
                            "(workers need attractorfit installed; use one thread per "
                            "worker process for byte-identical tables)")
    where.add_argument("--local-cluster", type=int, metavar="N",
                       help="start a Dask cluster of N worker processes on 127.0.0.1")
    p.add_argument("--seed", type=int, default=None, metavar="N",
                   help="seed of every random stream (default: run.seed of the "
                        "configuration, 0)")
    p.add_argument("--config", metavar="FILE",
                   help="TOML settings ([analysis] binning, [states] thresholds)")
    p.add_argument("--force", action="store_true",
                   help="recompute finished tasks made with other parameters")
    p.add_argument("--quiet", action="store_true", help="no progress bar or notes "
                                                        "(failed tasks are still noted)")
    p.set_defaults(func=sweep_command)


def sweep_command(args) -> int:
    """The ``sweep`` command: run :func:`run_sweep` from parsed arguments."""
    from attractorfit.config import load_config, resolve_config

    cfg = load_config(args.config) if args.config else resolve_config(None)
    seed = args.seed if args.seed is not None else int(cfg["run"]["seed"])
    if seed < 0:
        raise InputError(f"--seed: expected a whole number >= 0, got {seed}")
    quiet = bool(args.quiet)
    progress = not quiet and sys.stderr.isatty()
    try:
        res = run_sweep(args.paths, states=args.states, out=args.out, dims=args.dims,
                        rules=args.rules, bootstrap=args.bootstrap, seed=seed, config=cfg,
                        jobs=args.jobs, scheduler=args.scheduler,
                        local_cluster=args.local_cluster, force=args.force,
                        progress=progress, notes=None if quiet else sys.stderr)
    finally:
        if args.jobs > 1:
            _shutdown_loky()
    if quiet:
        for key, err in res.failed:
            _note(f"note: task {key} failed: {err}", sys.stderr)
    else:
        print(f"{len(res.tasks)} task(s), {res.n_run} run, {res.n_skipped} already "
              f"finished, {len(res.failed)} failed; table in "
              f"{os.path.join(res.folder, 'sweep.csv')}")
    return 0


def _shutdown_loky():
    """Stop joblib's reusable worker processes (they would idle for minutes)."""
    try:
        from joblib.externals.loky import reusable_executor

        executor = reusable_executor._executor
        if executor is not None:
            executor.shutdown(wait=True, kill_workers=True)
    except Exception:  # pragma: no cover - best effort at exit
        pass

"""The :class:`Recording`: spike trains, trials and provenance, as every stage sees them.

Inside attractorfit times are float64 seconds; neo/quantities objects appear only in
:meth:`Recording.to_neo` and :meth:`Recording.from_neo`.
"""

from __future__ import annotations

import hashlib
import os
from dataclasses import dataclass, field, replace

import numpy as np

from attractorfit._validation import (check_spike_times, check_trials,
                                      collect_input_warnings, warn_input)
from attractorfit.errors import InputError

__all__ = ["Recording", "file_provenance"]

#: Inter-spike intervals shorter than this count as refractory violations
#: (common practice for single-unit contamination estimates).
REFRACTORY_S = 0.0015
#: Unit metadata values (any case, spaces/hyphens/underscores ignored) that mark a
#: multi-unit: see :meth:`Recording.multi_units`.
MULTI_UNIT_VALUES = ("mu", "mua", "multi", "multiunit", "multiunitactivity")
#: Unit metadata columns searched first, in order, by ``multi_units(column="auto")``.
MULTI_UNIT_COLUMNS = ("unit_type", "type", "quality", "group", "label", "KSLabel",
                      "classification")


def file_provenance(path) -> dict:
    """Path, size in bytes and SHA-256 of one input file (read in chunks, read-only)."""
    path = os.fspath(path)
    digest = hashlib.sha256()
    with open(path, "rb") as fh:
        for chunk in iter(lambda: fh.read(1 << 20), b""):
            digest.update(chunk)
    return {"path": path, "size": os.path.getsize(path), "sha256": digest.hexdigest()}


@dataclass
class Recording:
    """Spike trains of simultaneously recorded units, with an optional trials table.

    Parameters
    ----------
    unit_ids : list of str
        One id per unit, unique.
    spike_times : list of ndarray
        Spike times of each unit in seconds (float64, sorted, finite, >= 0).
    trials : dict of str to ndarray, optional
        Trials table as columns of equal length, sorted by ``start``. ``start`` and
        ``stop`` (seconds) are required; every other column is a label (e.g. the
        remembered item, the outcome). ``None`` for a recording without trials.
    metadata : dict
        Free-form description (session, subject, sampling rate...).
    provenance : list of dict
        One record per file read: ``path``, ``size``, ``sha256``.
    warnings : list of str
        Warnings about the input, collected by the loaders and by :meth:`validate`.
    unit_info : dict of str to ndarray
        Per-unit metadata columns, one value per unit in the order of ``unit_ids``
        (text as ``str`` arrays, numbers as numeric arrays): e.g. the single/multi-unit
        type, the recording site or a sorter's quality label. Read from the NWB units
        table (every one-value-per-unit column) and from a sorter folder's cluster
        labels (column ``group``); empty when the input has none. Used to select units
        (:meth:`match_units`) and to flag multi-units (:meth:`multi_units`).

    Notes
    -----
    Build instances with :meth:`from_arrays` (or a loader), which validates; the
    constructor itself trusts its arguments.
    """

    unit_ids: list
    spike_times: list
    trials: dict | None = None
    metadata: dict = field(default_factory=dict)
    provenance: list = field(default_factory=list)
    warnings: list = field(default_factory=list)
    unit_info: dict = field(default_factory=dict)

    # ------------------------------------------------------------------ shape
    @property
    def n_units(self) -> int:
        return len(self.unit_ids)

    @property
    def n_trials(self) -> int:
        return 0 if self.trials is None else int(len(self.trials["start"]))

    @property
    def n_spikes(self) -> int:
        return int(sum(len(t) for t in self.spike_times))

    @property
    def label_columns(self) -> list:
        """Names of the trial label columns (everything but start and stop)."""
        if self.trials is None:
            return []
        return [c for c in self.trials if c not in ("start", "stop")]

    @property
    def t_start(self) -> float:
        """Start of the recording: metadata ``t_start``, else 0."""
        return float(self.metadata.get("t_start", 0.0))

    @property
    def t_stop(self) -> float:
        """End of the recording: the last spike or trial stop (or metadata ``t_stop``)."""
        ends = [float(t[-1]) for t in self.spike_times if len(t)]
        if self.trials is not None and self.n_trials:
            ends.append(float(np.max(self.trials["stop"])))
        if "t_stop" in self.metadata:
            ends.append(float(self.metadata["t_stop"]))
        return max(ends) if ends else 0.0

    @property
    def duration(self) -> float:
        return self.t_stop - self.t_start

    @property
    def source(self) -> str:
        """Name of the first input file, for messages."""
        if self.provenance:
            return os.path.basename(self.provenance[0]["path"])
        return self.metadata.get("source", "<recording>")

    # ----------------------------------------------------------- construction
    @classmethod
    def from_arrays(cls, spike_times, spike_units, *, trials=None, unit_ids=None,
                    metadata=None, provenance=None, source="<arrays>", min_units=2,
                    unit_info=None):
        """Build and validate a Recording from flat arrays.

        Parameters
        ----------
        spike_times : array_like of float
            All spike times in seconds.
        spike_units : array_like
            The unit of each spike (any hashable labels; converted to str).
        trials : dict, optional
            Columns of a trials table; ``start`` and ``stop`` required.
        unit_ids : sequence, optional
            Units to include, in this order (units without spikes allowed). Default:
            the sorted distinct labels of ``spike_units``.
        metadata, provenance : optional
            Stored as given.
        source : str
            File name used in error messages.
        min_units : int
            Fewest units accepted.
        unit_info : dict of str to array_like, optional
            Per-unit metadata columns, one value per unit in the order of the
            result's ``unit_ids`` (see the class docstring).

        Returns
        -------
        Recording

        Raises
        ------
        InputError
            Mismatched lengths, non-finite or negative times, bad trials, too few
            units or no spikes at all.
        """
        times = np.asarray(spike_times, dtype=np.float64).ravel()
        labels = np.asarray(spike_units).ravel()
        if times.shape != labels.shape:
            raise InputError(f"{source}: {times.size} spike times but {labels.size} unit "
                             "labels; expected one unit label per spike")
        labels = labels.astype(str)
        if unit_ids is None:
            unit_ids = _natural_sort(np.unique(labels).tolist())
        unit_ids = [str(u) for u in unit_ids]
        if len(set(unit_ids)) != len(unit_ids):
            dup = next(u for u in unit_ids if unit_ids.count(u) > 1)
            raise InputError(f"{source}: unit id {dup!r} appears more than once; expected "
                             "unique unit ids")
        index = {u: i for i, u in enumerate(unit_ids)}
        distinct, inverse = np.unique(labels, return_inverse=True)
        lookup = np.array([index.get(u, -1) for u in distinct.tolist()], dtype=np.int64)
        codes = lookup[inverse.ravel()] if labels.size else np.zeros(0, dtype=np.int64)
        order = np.lexsort((times, codes))  # by unit, then time: flat tables need not be sorted
        bounds = np.searchsorted(codes[order], np.arange(len(unit_ids) + 1))
        trains = [times[order[bounds[k]:bounds[k + 1]]] for k in range(len(unit_ids))]
        rec = cls(unit_ids=unit_ids, spike_times=trains, trials=trials,
                  metadata=dict(metadata or {}), provenance=list(provenance or []),
                  unit_info=dict(unit_info or {}))
        rec.metadata.setdefault("source", source)
        return rec.validate(min_units=min_units)

    def validate(self, *, min_units: int = 2) -> "Recording":
        """Check the recording in place and collect warnings; return ``self``.

        Raises
        ------
        InputError
            Fewer than ``min_units`` units, no spikes, duplicate unit ids, bad spike
            times (non-finite, negative), bad trials (stop <= start, overlap), spike
            times and trial times in different units (about 1000x apart: milliseconds
            mixed with seconds), or no spike inside any trial.

        Warns
        -----
        InputWarning
            Each new quality warning (also kept in :attr:`warnings`): spike times out
            of order (sorted), duplicated spike times (kept), trials out of order
            (sorted), times that look like milliseconds, units with few spikes,
            refractory violations, spikes outside every trial (with the fraction; they
            are left out of the analysis), trials with no spike from any unit (kept).
        """
        src = self.source
        if len(set(self.unit_ids)) != len(self.unit_ids):
            seen = set()
            dup = next(u for u in self.unit_ids if u in seen or seen.add(u))
            raise InputError(f"{src}: unit id {dup!r} appears more than once; expected "
                             "unique unit ids")
        if self.n_units < min_units:
            raise InputError(f"{src}: found {self.n_units} unit(s); expected at least "
                             f"{min_units} simultaneously recorded units")
        self.unit_info = _check_unit_info(self.unit_info, self.n_units, src)
        sorted_notes: list = []  # "not in order; sorted" warnings, kept for the summary
        with collect_input_warnings(sorted_notes):
            self.spike_times = [check_spike_times(t, source=src, unit=u)
                                for u, t in zip(self.unit_ids, self.spike_times)]
            if self.trials is not None:
                self.trials = _check_trial_table(self.trials, src)
        if self.n_spikes == 0:
            raise InputError(f"{src}: the recording contains no spikes; expected spike "
                             "times for at least one unit")
        if self.trials is not None:
            _check_trials_cover_spikes(self.spike_times, self.trials, src)
        new = [w for w in self._quality_warnings() if w not in self.warnings]
        for w in new:
            warn_input(w)
        self.warnings = list(dict.fromkeys(self.warnings + sorted_notes + new))
        return self

    def _quality_warnings(self, *, min_spikes: int = 20) -> list:
        src = self.source
        out = []
        tmax = max((float(t[-1]) for t in self.spike_times if len(t)), default=0.0)
        isis = [np.diff(t) for t in self.spike_times if len(t) > 1]
        med_isi = float(np.median(np.concatenate(isis))) if isis else np.inf
        if tmax > 1e4 and med_isi > 1.0:
            out.append(f"{src}: spike times reach {tmax:g} with a median inter-spike "
                       f"interval of {med_isi:g}; they look like milliseconds, expected "
                       "seconds (load with time_unit='ms', command line --time-unit ms)")
        few = [u for u, t in zip(self.unit_ids, self.spike_times) if len(t) < min_spikes]
        if few:
            out.append(f"{src}: {len(few)} unit(s) have fewer than {min_spikes} spikes "
                       f"(first: {few[0]!r})")
        n_dup = [int(np.sum(np.diff(t) == 0)) if len(t) > 1 else 0 for t in self.spike_times]
        dup_units = [u for u, n in zip(self.unit_ids, n_dup) if n]
        if dup_units:
            out.append(f"{src}: {len(dup_units)} unit(s) have duplicated spike times "
                       f"({sum(n_dup)} repeats; first: unit {dup_units[0]!r}); kept, so each "
                       "copy counts as a spike (check the sorting if this is unexpected)")
        contaminated = [u for u, t in zip(self.unit_ids, self.spike_times)
                        if len(t) > 1 and np.mean(np.diff(t) < REFRACTORY_S) > 0.01]
        if contaminated:
            out.append(f"{src}: {len(contaminated)} unit(s) have more than 1% of "
                       f"inter-spike intervals under {REFRACTORY_S * 1e3:g} ms, a sign of "
                       f"multi-unit activity or contamination (first: {contaminated[0]!r})")
        if self.trials is not None and self.n_trials:
            start, stop = self.trials["start"], self.trials["stop"]
            per_trial = spikes_per_trial(self.spike_times, start, stop)
            outside = self.n_spikes - int(per_trial.sum())
            if outside:
                out.append(f"{src}: {outside} of {self.n_spikes} spikes "
                           f"({outside / self.n_spikes:.1%}) fall outside all trials; they "
                           "are left out of the analysis")
            empty = np.flatnonzero(per_trial == 0)
            if empty.size:
                i = int(empty[0])
                out.append(f"{src}: {empty.size} of {self.n_trials} trial(s) hold no spike "
                           f"from any unit (first: trial {i} in start order, "
                           f"{start[i]:g}-{stop[i]:g} s); kept, as silent bins")
        return out

    # -------------------------------------------------------------- selection
    def select_units(self, keep) -> "Recording":
        """A new Recording with only the units at indices (or boolean mask) ``keep``."""
        idx = np.arange(self.n_units)[np.asarray(keep)]
        return replace(self, unit_ids=[self.unit_ids[i] for i in idx],
                       spike_times=[self.spike_times[i] for i in idx],
                       metadata=dict(self.metadata), warnings=list(self.warnings),
                       unit_info={c: np.asarray(v)[idx] for c, v in self.unit_info.items()})

    def unit_metadata(self, k: int) -> dict:
        """Unit ``k``'s metadata as text, ``{column: value}`` (whole numbers as such)."""
        return {c: _value_text(np.asarray(v)[k]) for c, v in self.unit_info.items()}

    def unit_info_counts(self, *, max_levels: int = 20) -> dict:
        """Each unit metadata column's values and how many units have each.

        Returns
        -------
        dict of str to dict
            Per column, ``{value: count}`` (values as text, sorted naturally) when
            it has at most ``max_levels`` distinct values; otherwise
            ``{"distinct": n, "min": ..., "max": ...}`` (min/max for numbers only).
        """
        out = {}
        for col, values in self.unit_info.items():
            text = [_value_text(v) for v in np.asarray(values).tolist()]
            levels = _natural_sort(sorted(set(text)))
            if len(levels) <= max_levels:
                out[col] = {lv: text.count(lv) for lv in levels}
                continue
            out[col] = {"distinct": len(levels)}
            if np.asarray(values).dtype.kind in "biuf":
                out[col].update(min=float(np.min(values)), max=float(np.max(values)))
        return out

    def match_units(self, keep: dict, *, option: str = "units.keep (--units)") -> np.ndarray:
        """Boolean mask of the units whose metadata matches ``keep``.

        Parameters
        ----------
        keep : dict of str to list
            Unit metadata column -> accepted values. A unit is kept when, in every
            column named, its value is one of the accepted ones. Values compare as
            text, ignoring case and surrounding spaces (``1`` matches ``1.0``).
            Empty: every unit.
        option : str
            Name of the setting, for messages.

        Raises
        ------
        InputError
            A column the recording does not have, or a value that no unit has.
        """
        mask = np.ones(self.n_units, dtype=bool)
        for col, wanted in (keep or {}).items():
            if col not in self.unit_info:
                have = sorted(self.unit_info) or "none"
                raise InputError(f"{option}: {self.source} has no unit column {col!r}; "
                                 f"unit columns there: {have}")
            wanted = wanted if isinstance(wanted, (list, tuple)) else [wanted]
            text = np.array([_value_key(v) for v in np.asarray(self.unit_info[col]).tolist()])
            for w in wanted:
                if _value_key(w) not in text:
                    levels = ", ".join(f"{k} ({n})" for k, n in
                                       self.unit_info_counts()[col].items())
                    raise InputError(f"{option}: {col} = {w!r} matches no unit of "
                                     f"{self.source}; values of {col} there: {levels}")
            mask &= np.isin(text, [_value_key(w) for w in wanted])
        return mask

    def multi_units(self, column: str = "auto") -> tuple:
        """Units that the metadata marks as multi-units.

        Parameters
        ----------
        column : str
            Unit metadata column telling multi-units from single units. A unit is a
            multi-unit when its value there is one of :data:`MULTI_UNIT_VALUES`
            (``mu``, ``mua``, ``multi``, ``multiunit``, ``multi-unit``, ``multi unit``...;
            any case, spaces, hyphens and underscores ignored). ``"auto"``: the first
            column of :data:`MULTI_UNIT_COLUMNS`, then any other text column, holding
            such a value. ``""``: none.

        Returns
        -------
        (str or None, list of str)
            The column used (None if none) and the ids of the multi-units.

        Raises
        ------
        InputError
            A named column the recording does not have.
        """
        if not column:
            return None, []
        if column == "auto":
            order = [c for c in MULTI_UNIT_COLUMNS if c in self.unit_info]
            order += [c for c in self.unit_info if c not in order]
            found = [c for c in order if _multi_mask(self.unit_info[c]).any()]
            if not found:
                return None, []
            column = found[0]
        elif column not in self.unit_info:
            raise InputError(f"units.multi_unit_column: {self.source} has no unit column "
                             f"{column!r}; unit columns there: "
                             f"{sorted(self.unit_info) or 'none'}")
        mask = _multi_mask(self.unit_info[column])
        return column, [u for u, m in zip(self.unit_ids, mask) if m]

    def trial_spikes(self, trial: int) -> list:
        """Spike times of each unit in ``trial``, relative to the trial start."""
        if self.trials is None:
            raise InputError(f"{self.source}: the recording has no trials table")
        t0, t1 = float(self.trials["start"][trial]), float(self.trials["stop"][trial])
        out = []
        for t in self.spike_times:
            a, b = np.searchsorted(t, [t0, t1])
            out.append(t[a:b] - t0)
        return out

    # -------------------------------------------------------------------- neo
    def to_neo(self):
        """Convert to a ``neo.Block`` with one Segment holding every SpikeTrain.

        Trials become an ``Epoch`` named ``trials`` whose array annotations carry the
        label columns; unit ids are SpikeTrain names.
        """
        import neo
        import quantities as pq

        t_stop = self.t_stop + 1e-9
        block = neo.Block(name=self.metadata.get("session", "recording"))
        seg = neo.Segment(name="recording")
        block.segments.append(seg)
        for uid, t in zip(self.unit_ids, self.spike_times):
            seg.spiketrains.append(neo.SpikeTrain(np.asarray(t) * pq.s, t_stop=t_stop * pq.s,
                                                  t_start=min(self.t_start, 0.0) * pq.s,
                                                  name=str(uid)))
        if self.trials is not None and self.n_trials:
            start, stop = self.trials["start"], self.trials["stop"]
            ann = {c: np.asarray(self.trials[c]) for c in self.label_columns}
            seg.epochs.append(neo.Epoch(times=start * pq.s, durations=(stop - start) * pq.s,
                                        labels=np.array([f"trial {i}" for i in
                                                         range(self.n_trials)]),
                                        name="trials", array_annotations=ann))
        return block

    @classmethod
    def from_neo(cls, block, *, source="<neo>", provenance=None, metadata=None,
                 validate=True):
        """Build a Recording from a ``neo.Block``.

        SpikeTrains with the same name (or ``unit_id``/``cluster_id`` annotation) across
        segments are one unit. Trials come from an Epoch named ``trials`` (label columns
        from its array annotations); without one, each Segment of a multi-segment block
        becomes a trial. With ``validate=False`` the result is returned unchecked, for a
        caller that changes it (e.g. replaces the trials) and then calls :meth:`validate`.
        """
        import quantities as pq

        per_unit: dict = {}
        trials = None
        seg_bounds = []
        for seg_i, seg in enumerate(block.segments):
            for k, st in enumerate(seg.spiketrains):
                uid = _neo_unit_id(st, k)
                per_unit.setdefault(uid, []).append(
                    np.asarray(st.times.rescale(pq.s).magnitude, dtype=np.float64))
            if len(seg.spiketrains):
                t0 = float(seg.spiketrains[0].t_start.rescale(pq.s).magnitude)
                t1 = float(seg.spiketrains[0].t_stop.rescale(pq.s).magnitude)
            else:
                t0 = t1 = np.nan
            seg_bounds.append((t0, t1))
            for ep in seg.epochs:
                if (ep.name or "").lower() == "trials" and trials is None:
                    start = np.asarray(ep.times.rescale(pq.s).magnitude, dtype=np.float64)
                    dur = np.asarray(ep.durations.rescale(pq.s).magnitude, dtype=np.float64)
                    trials = {"start": start, "stop": start + dur}
                    for name, vals in (ep.array_annotations or {}).items():
                        trials[str(name)] = np.asarray(vals)
        if trials is None and len(block.segments) > 1:
            b = np.array(seg_bounds, dtype=np.float64)
            if np.all(np.isfinite(b)):
                trials = {"start": b[:, 0], "stop": b[:, 1],
                          "segment": np.arange(len(b))}
        unit_ids = _natural_sort(list(per_unit))
        times = [np.concatenate(per_unit[u]) if per_unit[u] else np.zeros(0)
                 for u in unit_ids]
        rec = cls(unit_ids=unit_ids, spike_times=[np.sort(t) for t in times], trials=trials,
                  metadata=dict(metadata or {}), provenance=list(provenance or []))
        rec.metadata.setdefault("source", source)
        return rec.validate() if validate else rec

    def __repr__(self) -> str:  # short: never dump arrays
        return (f"Recording({self.n_units} units, {self.n_spikes} spikes, "
                f"{self.n_trials} trials, {self.duration:.1f} s, source={self.source!r})")


def _value_text(v) -> str:
    """A metadata value as text: whole numbers without a decimal point."""
    if isinstance(v, (bool, np.bool_)):
        return str(bool(v)).lower()
    if isinstance(v, (int, float, np.integer, np.floating)):
        f = float(v)
        return str(int(f)) if f.is_integer() else repr(f)
    return str(v).strip()


def _value_key(v) -> str:
    """A metadata value as compared by :meth:`Recording.match_units`."""
    return _value_text(v).lower()


def _multi_mask(values) -> np.ndarray:
    values = np.asarray(values)
    if values.dtype.kind not in "US":
        return np.zeros(values.size, dtype=bool)
    marks = {v.replace("-", "").replace("_", "").replace(" ", "") for v in MULTI_UNIT_VALUES}
    return np.array([_value_key(v).replace("-", "").replace("_", "").replace(" ", "")
                     in marks for v in values.tolist()], dtype=bool)


def _check_unit_info(info, n_units: int, src: str) -> dict:
    """Unit metadata as 1-D arrays of one number or text per unit."""
    if not isinstance(info, dict):
        raise InputError(f"{src}: unit_info must be a dict of columns, got "
                         f"{type(info).__name__}")
    out = {}
    for col, values in info.items():
        arr = np.asarray(values)
        if arr.ndim != 1 or arr.size != n_units:
            raise InputError(f"{src}: unit column {col!r} has shape {arr.shape}; expected "
                             f"one value per unit ({n_units})")
        if arr.dtype.kind == "O" or arr.dtype.kind == "S":
            arr = arr.astype(str)
        if arr.dtype.kind not in "biufU":
            raise InputError(f"{src}: unit column {col!r} has dtype {arr.dtype}; expected "
                             "numbers or text")
        out[str(col)] = arr
    return out


def _neo_unit_id(st, k) -> str:
    ann = getattr(st, "annotations", {}) or {}
    for key in ("unit_id", "cluster_id", "unit_name"):
        if key in ann:
            return str(ann[key])
    return str(st.name) if st.name not in (None, "") else str(k)


def _natural_sort(labels: list) -> list:
    """Sort unit labels numerically when they all look like integers."""
    try:
        return sorted(labels, key=lambda s: (int(s), s))
    except (TypeError, ValueError):
        return sorted(labels)


#: Span ratios (last spike / last trial stop, or its inverse) read as the tell-tale of
#: milliseconds mixed with seconds (a factor 1000, give or take the gaps at the ends).
MIXED_UNIT_RATIO = (200.0, 5000.0)


def spikes_per_trial(spike_times, start, stop) -> np.ndarray:
    """Number of spikes (all units) in each trial ``[start, stop)``; trials disjoint."""
    start = np.asarray(start, dtype=np.float64)
    stop = np.asarray(stop, dtype=np.float64)
    n = np.zeros(start.size, dtype=np.int64)
    for t in spike_times:
        if len(t):
            n += np.searchsorted(t, stop, side="left") - np.searchsorted(t, start, side="left")
    return n


def _check_trials_cover_spikes(spike_times, trials: dict, src: str) -> None:
    """Refuse trials that share no time with the spikes; name a time-unit mix-up.

    A spike-time span about 1000 times the trial span (or a thousandth of it) with
    few spikes inside the trials, that would mostly fall inside them once converted,
    is milliseconds mixed with seconds: an InputError pointing at ``time_unit``.
    Otherwise, no spike inside any trial is an InputError too (nothing to analyse).
    """
    start, stop = trials["start"], trials["stop"]
    n_total = int(sum(len(t) for t in spike_times))
    if n_total == 0 or start.size == 0:
        return
    n_in = int(spikes_per_trial(spike_times, start, stop).sum())
    spike_end = max(float(t[-1]) for t in spike_times if len(t))
    trial_end = float(np.max(stop))
    ratio = spike_end / trial_end
    lo, hi = MIXED_UNIT_RATIO
    if n_in < 0.5 * n_total:
        isis = [np.diff(t) for t in spike_times if len(t) > 1]
        med_isi = float(np.median(np.concatenate(isis))) if isis else 0.0
        med_trial = float(np.median(stop - start))
        cases = []
        if lo <= ratio <= hi and med_isi > 1.0:
            cases.append((1e-3, "milliseconds", "seconds", "divided by 1000"))
        if 1 / hi <= ratio <= 1 / lo and med_trial > 100.0:
            cases.append((1e3, "seconds", "milliseconds", "multiplied by 1000"))
        for factor, spike_word, trial_word, how in cases:
            n_scaled = int(spikes_per_trial([t * factor for t in spike_times], start,
                                            stop).sum())
            if n_scaled >= 0.5 * n_total and n_scaled > 2 * n_in:
                raise InputError(
                    f"{src}: spike times run to {spike_end:g} but the trials end at "
                    f"{trial_end:g}, about {ratio if ratio > 1 else 1 / ratio:.0f} times "
                    f"apart: the spike times look like {spike_word} and the trial times "
                    f"like {trial_word} ({n_in / n_total:.0%} of the spikes fall inside "
                    f"trials as read, {n_scaled / n_total:.0%} with the spike times {how}); "
                    "expected one time unit for both: give the units with the loader "
                    "options time_unit (spike tables, NPZ arrays) and trials_time_unit "
                    "(the trials table), 's' or 'ms' (command line --time-unit, "
                    "--trials-time-unit)")
    if n_in == 0:
        raise InputError(f"{src}: none of the {n_total} spikes "
                         f"({min(float(t[0]) for t in spike_times if len(t)):g}-{spike_end:g} s) "
                         f"falls inside any of the {start.size} trials "
                         f"({float(start[0]):g}-{trial_end:g} s); expected a trials table that "
                         "covers the spikes (check the trials file, its time origin and unit)")


def _check_trial_table(trials: dict, src: str) -> dict:
    if "start" not in trials or "stop" not in trials:
        missing = [c for c in ("start", "stop") if c not in trials]
        raise InputError(f"{src}: trials table lacks column(s) {missing}; expected 'start' "
                         "and 'stop' in seconds")
    n = len(np.asarray(trials["start"]).ravel())
    for name, col in trials.items():
        if len(np.asarray(col).ravel()) != n:
            raise InputError(f"{src}: trials column {name!r} has {len(col)} rows; expected "
                             f"{n} like 'start'")
    if n == 0:
        raise InputError(f"{src}: the trials table is empty; expected at least one trial")
    start, stop, order = check_trials(trials["start"], trials["stop"], source=src)
    out = {"start": start, "stop": stop}
    for name, col in trials.items():
        if name not in ("start", "stop"):
            out[str(name)] = np.asarray(col).ravel()[order]
    return out

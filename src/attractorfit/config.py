"""One TOML configuration for the whole run, with documented defaults.

Every parameter of every stage lives in :data:`PARAMETERS` (section -> key ->
:class:`Param`). ``attractorfit defaults`` prints them as a commented TOML file;
``run --config FILE`` reads a file that overrides any subset; the resolved
configuration is saved in the run folder as ``config.toml``.
"""

from __future__ import annotations

import math
import os
import tomllib
from dataclasses import dataclass
from typing import Any, Callable

from attractorfit.errors import InputError

__all__ = ["Param", "PARAMETERS", "default_config", "load_config", "resolve_config",
           "dumps_config", "check_config_for_data"]


@dataclass(frozen=True)
class Param:
    """One configuration parameter: default value, meaning, and a check."""

    default: Any
    doc: str
    check: Callable[[Any], bool] | None = None
    rule: str = ""


def _num(lo=None, hi=None, *, lo_open=False, integer=False):
    def ok(v):
        if isinstance(v, bool) or not isinstance(v, (int, float)):
            return False
        if integer and not float(v).is_integer():
            return False
        if not math.isfinite(float(v)):
            return False
        if lo is not None and (v <= lo if lo_open else v < lo):
            return False
        return hi is None or v <= hi
    return ok


def _choice(*opts):
    return lambda v: v in opts


def _window(v):
    return isinstance(v, list) and (len(v) == 0 or (
        len(v) == 2 and all(_num()(x) for x in v) and v[1] > v[0]))


def _unit_selection(v):
    """{column = [values]} with text or number values (a single value allowed)."""
    def ok(x):
        return isinstance(x, (str, int, float)) and not isinstance(x, bool)
    return isinstance(v, dict) and all(
        isinstance(k, str) and k and (ok(x) or (isinstance(x, list) and x
                                                  and all(ok(y) for y in x)))
        for k, x in v.items())


PARAMETERS: dict[str, dict[str, Param]] = {
    "analysis": {
        "bin_size": Param(0.05, "width of the count bins, seconds", _num(0, 10, lo_open=True),
                          "a number of seconds > 0 and <= 10"),
        "align": Param("", "trials-table column the analysis window is relative to "
                           "(e.g. 'delay_start'); empty: the trial start", lambda v: isinstance(v, str),
                       "a column name or ''"),
        "window": Param([], "analysis window [start, stop] in seconds relative to 'align'; "
                            "empty: the whole trial", _window,
                        "[] or [start, stop] with stop > start"),
        "condition": Param("", "trials-table column naming the remembered item (the "
                               "condition); empty: the first text-like label column",
                           lambda v: isinstance(v, str), "a column name or ''"),
        "min_rate_hz": Param(0.5, "units slower than this inside the windows are left out, Hz",
                             _num(0), "a number >= 0"),
        "continuous_window_s": Param(10.0, "window length standing in for trials when the "
                                           "recording has none, seconds",
                                     _num(0, lo_open=True), "a number > 0"),
    },
    "units": {
        "keep": Param({}, "units to analyse, by their metadata (the units table of an NWB "
                          "file, the cluster labels of a sorter folder as column 'group'; "
                          "'attractorfit inspect' lists the columns and values): "
                          "{unit_type = [\"SU\"]} keeps the units whose unit_type is SU; "
                          "with several columns a unit must match each; values compare "
                          "as text, ignoring case. The others are left out before binning "
                          "(summary.json recording.units_left_out says which). Empty: "
                          "every unit. Command line: --units COLUMN=VALUE[,VALUE]",
                      _unit_selection, "a table {column = [values]} of text or numbers"),
        "multi_unit_column": Param("auto", "unit metadata column that marks multi-units: "
                                           "a unit whose value there is mu, mua, multi or "
                                           "multi-unit (any case; spaces, hyphens and "
                                           "underscores ignored) is a multi-unit, named in "
                                           "the ISI caution of the comparison; 'auto': the "
                                           "first of unit_type, type, quality, group, "
                                           "label, KSLabel, classification, then any other "
                                           "text column, holding such a value; '': none",
                                   lambda v: isinstance(v, str),
                                   "a column name, 'auto' or ''"),
    },
    "states": {
        "n_states": Param(0, "number of states; 0 chooses it from the data",
                          _num(0, 64, integer=True), "0 or a whole number from 2 to 64"),
        "min_states": Param(1, "smallest state number considered when choosing",
                            _num(1, 64, integer=True), "a whole number >= 1"),
        "max_states": Param(8, "largest state number considered when choosing",
                            _num(2, 64, integer=True), "a whole number from 2 to 64"),
        "posterior_threshold": Param(0.8, "a bin is assigned to a state when its posterior "
                                          "exceeds this", _num(0.5, 1.0, lo_open=True),
                                     "a number in (0.5, 1]"),
        "latent_dims": Param(0, "dimensions of the factor-analysis latent space the vertex "
                                "codes are fitted in; 0 chooses them by cross-validation",
                             _num(0, 64, integer=True), "a whole number from 0 to 64"),
        "min_segment_s": Param(0.05, "state segments shorter than this are left unassigned, "
                                     "seconds", _num(0), "a number >= 0"),
    },
    "discreteness": {
        "n_boot": Param(99, "bootstrap replicates of the continuous-latent null",
                        _num(1, 100000, integer=True), "a whole number >= 1"),
        "alpha": Param(0.05, "significance level of the verdict", _num(0, 0.5, lo_open=True),
                       "a number in (0, 0.5]"),
    },
    "decoding": {
        "enabled": Param(True, "decode every categorical trial label (choice, outcome, item) "
                               "from the state at the end of the analysis window",
                         lambda v: isinstance(v, bool), "true or false"),
        "feature": Param("posterior", "'posterior': the state posterior averaged over the "
                                      "end of the window; 'state': the state assigned to "
                                      "the last bin", _choice("posterior", "state"),
                         "posterior or state"),
        "score": Param("balanced_accuracy", "what the p-value tests: 'balanced_accuracy' "
                                            "(mean recall over values; not inflated by a "
                                            "common value) or 'accuracy'",
                       _choice("balanced_accuracy", "accuracy"),
                       "balanced_accuracy or accuracy"),
        "end_fraction": Param(0.1, "fraction of the window, at its end, the posterior is "
                                   "averaged over (at least one bin)",
                              _num(0, 1, lo_open=True), "a number in (0, 1]"),
        "n_folds": Param(5, "folds of the stratified cross-validation",
                         _num(2, 100, integer=True), "a whole number from 2 to 100"),
        "n_permutations": Param(199, "label permutations of the p-value",
                                _num(1, 100000, integer=True), "a whole number >= 1"),
    },
    "robustness": {
        "enabled": Param(True, "rerun the state analysis with the number of states -1/+1, "
                               "the bin size halved and doubled, and other posterior "
                               "thresholds (fixed state counts, no discreteness test)",
                         lambda v: isinstance(v, bool), "true or false"),
        "state_steps": Param([-1, 1], "changes of the number of states to refit",
                             lambda v: isinstance(v, list) and all(
                                 _num(-8, 8, integer=True)(x) and x != 0 for x in v),
                             "a list of non-zero whole numbers from -8 to 8"),
        "bin_factors": Param([0.5, 2.0], "bin sizes to refit at, as multiples of "
                                         "analysis.bin_size",
                             lambda v: isinstance(v, list) and all(
                                 _num(0.05, 20, lo_open=False)(x) and x != 1 for x in v),
                             "a list of numbers from 0.05 to 20 other than 1"),
        "thresholds": Param([0.6, 0.95], "posterior thresholds to decode the chosen model "
                                         "with again",
                            lambda v: isinstance(v, list) and all(
                                _num(0.5, 1.0, lo_open=True)(x) and x < 1 for x in v),
                            "a list of numbers in (0.5, 1)"),
    },
    "drift": {
        "enabled": Param(True, "test unit rates and state occupancy for drift across the "
                               "session", lambda v: isinstance(v, bool), "true or false"),
        "alpha": Param(0.05, "false discovery rate for calling a unit drifting "
                             "(Benjamini-Hochberg)", _num(0, 0.5, lo_open=True),
                       "a number in (0, 0.5]"),
        "n_blocks": Param(3, "blocks of consecutive trials whose state occupancy is "
                             "compared", _num(2, 20, integer=True),
                          "a whole number from 2 to 20"),
        "n_permutations": Param(199, "trial permutations of the occupancy test",
                                _num(1, 100000, integer=True), "a whole number >= 1"),
    },
    "network": {
        "rule": Param("optimized", "decoder rule: 'optimized' (least readout noise with "
                                   "stability margins; the only rule that kept every vertex "
                                   "stable in our benchmark), 'pseudoinverse' (projection "
                                   "rule) or 'hebbian'",
                      _choice("pseudoinverse", "optimized", "hebbian"),
                      "one of pseudoinverse, optimized, hebbian"),
        "rank": Param("auto", "latent dimension K of the network: \"auto\" adds private "
                              "axes to the state model's codes until the encoder reproduces "
                              "the state rates (R^2 >= 0.97); 0 uses the code length; "
                              "\"full\" adds axes so any state rates can be fitted (slower "
                              "for many states)",
                      lambda v: v in ("full", "auto") or _num(0, 64, integer=True)(v),
                      "0, a whole number up to 64, \"auto\" or \"full\""),
        "hypercube": Param(False, "each model neuron reads one latent axis only (hypercube "
                                  "encoder)", lambda v: isinstance(v, bool), "true or false"),
        "extra_neurons": Param(0, "unrecorded model neurons added to lower readout shot "
                                  "noise (never part of the surrogate recordings)",
                               _num(0, 100000, integer=True), "a whole number >= 0"),
        "tau_s_min": Param(0.01, "shortest readout time constant searched, seconds",
                           _num(0.001, 10), "a number of seconds from 0.001 to 10"),
        "tau_s_max": Param(0.3, "longest readout time constant searched, seconds",
                           _num(0.001, 10), "a number of seconds from 0.001 to 10"),
        "dt": Param(1e-4, "simulation step, seconds (the transfer function is evaluated at "
                          "this step)", _num(1e-6, 1e-3), "a number of seconds from 1e-6 "
                                                              "to 1e-3"),
        "stability": Param("symmetric", "what the optimized rule's stability margins "
                                        "bound: 'symmetric' (the symmetric part of each "
                                        "vertex's Jacobian: a convex problem with a unique "
                                        "decoder, so the same results on every machine; "
                                        "more readout noise) or 'spectral' (its "
                                        "eigenvalues: the tightest decoder and the better "
                                        "occupancy in our benchmark, but the solver's "
                                        "answer moves with rounding, so another CPU or "
                                        "BLAS kernel gives another network)",
                           _choice("spectral", "symmetric"), "one of spectral, symmetric"),
        "field_steps": Param(0, "steps calibrating an occupancy field (0: none; 8 is a "
                                "good budget): a constant input along the latent axes, "
                                "folded into the neurons' biases, that brings the model's "
                                "state occupancy closer to the data's. Off by default: it "
                                "moves the fixed points off the states' vertices and can "
                                "remove some, so the network no longer has an attractor at "
                                "every state (the report shows how far they moved)",
                             _num(0, 100, integer=True), "a whole number from 0 to 100"),
        "cue_field": Param(False, "hold a constant latent input (cue field) along the "
                                  "code of each condition level's most used state through "
                                  "that level's trials, its one strength calibrated so that "
                                  "the model's per-level state use matches the data's (needs "
                                  "a condition column; false: the first state alone carries "
                                  "the cue). Off by default: on the demo it matched state use "
                                  "per level but moved the fixed points and worsened the rate, "
                                  "Fano factor and ISI statistics",
                           lambda v: isinstance(v, bool), "true or false"),
    },
    "compare": {
        "n_surrogates": Param(20, "surrogate recordings simulated from the fitted network",
                              _num(2, 10000, integer=True), "a whole number >= 2"),
        "held_out_fraction": Param(0.5, "fraction of trials kept out of the network fit and "
                                        "used for the comparison (0: compare on all trials)",
                                   _num(0.0, 0.9), "a number from 0 to 0.9"),
        "nulls": Param(["poisson", "dither", "shuffle", "continuous"],
                       "null surrogates the network is compared against",
                       lambda v: isinstance(v, list) and all(
                           x in ("poisson", "dither", "shuffle", "continuous") for x in v),
                       "a list drawn from poisson, dither, shuffle, continuous"),
        "n_null": Param(20, "surrogates of each null", _num(2, 10000, integer=True),
                        "a whole number >= 2"),
        "refit": Param(True, "also refit the state model on every surrogate (slower)",
                       lambda v: isinstance(v, bool), "true or false"),
        "n_boot": Param(500, "bootstrap resamples for confidence intervals",
                        _num(10, 100000, integer=True), "a whole number >= 10"),
    },
    "report": {
        "figure_formats": Param(["png", "svg"], "file formats of the figures under figures/",
                                lambda v: isinstance(v, list) and len(v) > 0 and all(
                                    x in ("png", "svg", "pdf") for x in v),
                                "a non-empty list drawn from png, svg, pdf"),
        "dpi": Param(200, "resolution of PNG figures (dots per inch)",
                     _num(50, 1200, integer=True), "a whole number from 50 to 1200"),
    },
    "run": {
        "seed": Param(0, "seed of every random stream of the run", _num(0, 2**63 - 1, integer=True),
                      "a whole number >= 0"),
    },
}


#: Settings that were renamed: (section, old key) -> new key. A user's file naming an old
#: key gets an error naming the new one; a run folder's own config.toml, written by an
#: earlier version, is read with the new names (``old_names=True``).
RENAMED: dict[tuple[str, str], str] = {("network", "cue_drive"): "cue_field"}


def default_config() -> dict:
    """The default configuration as a nested dict (a fresh copy)."""
    return {s: {k: _copy(p.default) for k, p in sec.items()} for s, sec in PARAMETERS.items()}


def _copy(v):
    if isinstance(v, dict):
        return {k: _copy(x) for k, x in v.items()}
    return list(v) if isinstance(v, list) else v


def resolve_config(overrides: dict | None, *, source: str = "configuration",
                   old_names: bool = False) -> dict:
    """Defaults updated with ``overrides``; unknown keys and bad values raise InputError.

    ``old_names=True`` reads the keys of :data:`RENAMED` under their new names (for run
    folders of earlier versions); otherwise an old key is an error naming the new one.
    """
    cfg = default_config()
    for section, values in (overrides or {}).items():
        if section not in PARAMETERS:
            raise InputError(f"{source}: unknown section [{section}]; expected one of "
                             f"{sorted(PARAMETERS)}")
        if not isinstance(values, dict):
            raise InputError(f"{source}: [{section}] must be a table of settings")
        for key, value in values.items():
            key = _current_name(section, key, source, old_names)
            p = PARAMETERS[section].get(key)
            if p is None:
                raise InputError(f"{source}: unknown setting {section}.{key}; expected one of "
                                 f"{sorted(PARAMETERS[section])}")
            if isinstance(p.default, float) and isinstance(value, int) and not isinstance(value, bool):
                value = float(value)
            if p.check is not None and not p.check(value):
                raise InputError(f"{source}: {section}.{key} = {value!r}; expected {p.rule}")
            cfg[section][key] = value
    st = cfg["states"]
    if st["min_states"] > st["max_states"]:
        raise InputError(f"{source}: states.min_states = {st['min_states']} is larger than "
                         f"states.max_states = {st['max_states']}")
    nw = cfg["network"]
    if nw["tau_s_min"] >= nw["tau_s_max"]:
        raise InputError(f"{source}: network.tau_s_min = {nw['tau_s_min']} is not below "
                         f"network.tau_s_max = {nw['tau_s_max']}")
    if st["n_states"] == 1:
        raise InputError(f"{source}: states.n_states = 1; expected 0 (choose) or at least 2 "
                         "states")
    return cfg


def _current_name(section: str, key: str, source: str, old_names: bool) -> str:
    new = RENAMED.get((section, key))
    if new is None:
        return key
    if old_names:
        return new
    raise InputError(f"{source}: {section}.{key} was renamed; write {section}.{new} "
                     "instead (same meaning and values)")


def check_config_for_data(cfg: dict, *, n_units: int, source: str = "configuration") -> None:
    """Check the settings whose range depends on the data (after binning).

    Parameters
    ----------
    cfg : dict
        A resolved configuration.
    n_units : int
        Units left for the analysis after binning.
    source : str
        Name used in messages.

    Raises
    ------
    InputError
        ``states.latent_dims`` not below the number of units, or an integer
        ``network.rank`` above it.
    """
    dims = cfg["states"]["latent_dims"]
    if dims and dims >= n_units:
        raise InputError(f"{source}: states.latent_dims = {dims}; expected fewer latent "
                         f"dimensions than the {n_units} units analysed (or 0 to choose)")
    rank = cfg["network"]["rank"]
    if rank not in ("full", "auto") and rank and rank > n_units:
        raise InputError(f"{source}: network.rank = {rank}; expected at most the {n_units} "
                         "units analysed (or 0 for the state model's code length)")


def load_config(path, *, old_names: bool = False) -> dict:
    """Read a TOML file and resolve it against the defaults.

    ``old_names``: see :func:`resolve_config` (True for a run folder's own config.toml).

    Raises
    ------
    InputError
        Missing or unreadable file, invalid TOML, unknown keys, values out of range.
    """
    path = os.fspath(path)
    try:
        with open(path, "rb") as fh:
            data = tomllib.load(fh)
    except FileNotFoundError:
        raise InputError(f"{path}: configuration file not found") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise InputError(f"{path}: cannot read the configuration ({exc})") from None
    except tomllib.TOMLDecodeError as exc:
        raise InputError(f"{path}: not valid TOML ({exc})") from None
    return resolve_config(data, source=os.path.basename(path), old_names=old_names)


def _toml_value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, str):
        return '"' + v.replace("\\", "\\\\").replace('"', '\\"') + '"'
    if isinstance(v, float):
        return repr(v)
    if isinstance(v, list):
        return "[" + ", ".join(_toml_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{" + ", ".join(f"{_toml_key(k)} = {_toml_value(x)}" for k, x in v.items()) + "}"
    return str(v)


def _toml_key(k: str) -> str:
    return k if k and all(c.isalnum() or c in "_-" for c in k) else _toml_value(str(k))


def dumps_config(cfg: dict | None = None, *, comments: bool = True) -> str:
    """TOML text of ``cfg`` (default: the defaults), each key with its meaning."""
    cfg = default_config() if cfg is None else cfg
    lines = ["# attractorfit configuration. Every key is optional; missing keys take the",
             "# defaults shown here."] if comments else []
    for section, sec in PARAMETERS.items():
        lines.append("")
        lines.append(f"[{section}]")
        for key, p in sec.items():
            if comments:
                lines.append(f"# {p.doc}" + (f" ({p.rule})" if p.rule else ""))
            lines.append(f"{key} = {_toml_value(cfg[section][key])}")
    return "\n".join(lines).lstrip("\n") + "\n"

"""Figures comparing the fitted network's surrogate recordings with the data.

Every figure function takes plain arrays and small dictionaries (not the stage
result dataclasses; ``pipeline.py`` pulls the arrays out), draws on a new
:class:`matplotlib.figure.Figure` built without pyplot (so no global figure
registry, nothing to close, nothing shown) and returns it. :func:`save_figure` writes
a figure as PNG and SVG, atomically.

Style rules, shared by all figures:

* widths are 7.0 in (a full page column) or 3.5 in (half), so fonts keep their size
  when a figure is placed in a paper; every text is at least 8 pt at the saved size;
* states use the Okabe-Ito colour-blind-safe qualitative set [1]_ (hex values in
  :data:`STATE_COLORS`), each state also with its own hatch, marker and line style,
  so that states stay apart in greyscale print and when there are more states than
  colours (colour and hatch cycle with co-prime periods 7 and 8: 56 distinct styles);
* data are drawn in near-black solid, the fitted network's surrogate in blue
  (dashed lines, hatched bars), nulls in greys with their own hatches;
* matrices use 'cividis', a sequential map whose lightness rises monotonically and
  that reads the same for common colour-vision deficiencies [2]_;
* every axis with data has a label with its unit (s, Hz, fraction, ...);
* user strings (unit ids, labels, titles) are drawn literally (no mathtext).

References
----------
.. [1] Okabe, M. & Ito, K. (2008). Color Universal Design (CUD): how to make figures
   and presentations that are friendly to colorblind people. J*Fly Data Depository
   for Drosophila Researchers (online publication).
.. [2] Nuñez, J. R., Anderton, C. R. & Renslow, R. S. (2018). Optimizing colormaps with
   consideration for color vision deficiency to enable accurate interpretation of
   scientific data. PLoS ONE 13:e0199239.
"""

from __future__ import annotations

import os
from collections.abc import Mapping

import matplotlib
import numpy as np
from matplotlib.backends.backend_agg import FigureCanvasAgg
from matplotlib.figure import Figure
from matplotlib.patches import Patch
from matplotlib.lines import Line2D
from matplotlib.transforms import blended_transform_factory

from attractorfit._output import atomic_writer
from attractorfit._validation import check_array, check_int, check_positive
from attractorfit.errors import InputError

__all__ = [
    "OKABE_ITO", "STATE_COLORS", "STATE_HATCHES", "DATA_COLOR", "MODEL_COLOR",
    "NULL_COLORS", "UNASSIGNED_COLOR", "FULL_WIDTH", "HALF_WIDTH",
    "state_style", "save_figure",
    "raster_with_states", "raster_compare", "latent_trajectories", "occupancy_bars",
    "dwell_survival", "transition_matrices", "rate_scatter", "distribution_compare",
    "distribution_panels", "state_by_condition", "pattern_overlap_time",
    "null_distribution", "model_diagnostics",
    "decoding_accuracy", "robustness_panel", "drift_panel",
]

#: The Okabe-Ito colour-blind-safe set (hex).
OKABE_ITO = {
    "black": "#000000", "orange": "#E69F00", "sky_blue": "#56B4E9",
    "bluish_green": "#009E73", "yellow": "#F0E442", "blue": "#0072B2",
    "vermillion": "#D55E00", "reddish_purple": "#CC79A7",
}
#: State colours in order: alternating dark and light in greyscale, yellow last.
STATE_COLORS = ("#0072B2", "#E69F00", "#009E73", "#56B4E9", "#D55E00", "#CC79A7", "#F0E442")
#: State hatches (period 8, co-prime with the 7 colours).
STATE_HATCHES = ("", "//", "..", "xx", "\\\\", "++", "oo", "--")
_STATE_MARKERS = ("o", "s", "^", "D", "v", "P", "X", "<", ">", "h")
_STATE_LINESTYLES = ("-", "--", "-.", ":", (0, (5, 1, 1, 1)), (0, (1, 1)), (0, (8, 2)))
DATA_COLOR = "#222222"
MODEL_COLOR = "#0072B2"
NULL_COLORS = ("#9A9A9A", "#C8C8C8", "#707070", "#E0E0E0")
_NULL_HATCHES = ("..", "xx", "++", "oo")
UNASSIGNED_COLOR = "#E4E4E4"
FULL_WIDTH = 7.0
HALF_WIDTH = 3.5

_FS_LABEL = 9.0
_FS_TICK = 8.0
_FS_TITLE = 10.0
_FS_SMALL = 8.0
_MIN_FONT = 8.0


# --------------------------------------------------------------------------- helpers
def state_style(state: int, colors=None) -> dict:
    """Drawing style of state ``state`` (0-based; -1 = unassigned).

    Returns a dict with ``color``, ``hatch``, ``marker`` and ``linestyle``. ``colors``
    (optional sequence of colours) replaces :data:`STATE_COLORS`.
    """
    state = int(state)
    if state < 0:
        return {"color": UNASSIGNED_COLOR, "hatch": "", "marker": ".", "linestyle": ":"}
    pal = STATE_COLORS if colors is None else tuple(colors)
    if not pal:
        raise InputError("state_colors: expected at least one colour, got an empty list")
    return {"color": pal[state % len(pal)],
            "hatch": STATE_HATCHES[state % len(STATE_HATCHES)],
            "marker": _STATE_MARKERS[state % len(_STATE_MARKERS)],
            "linestyle": _STATE_LINESTYLES[state % len(_STATE_LINESTYLES)]}


def _new_figure(width: float, height: float) -> Figure:
    fig = Figure(figsize=(width, height), layout="constrained")
    FigureCanvasAgg(fig)
    return fig


def _style_axes(ax, *, grid: bool = False) -> None:
    ax.tick_params(labelsize=_FS_TICK)
    ax.xaxis.label.set_size(_FS_LABEL)
    ax.yaxis.label.set_size(_FS_LABEL)
    ax.title.set_size(_FS_TITLE)
    if hasattr(ax, "zaxis"):
        ax.zaxis.label.set_size(_FS_LABEL)
        return
    for side in ("top", "right"):
        ax.spines[side].set_visible(False)
    if grid:
        ax.grid(True, color="#DDDDDD", linewidth=0.5)
        ax.set_axisbelow(True)


def _finish(fig: Figure) -> Figure:
    """Style every axes and raise any text below the minimum size to it."""
    for ax in fig.axes:
        if ax.get_label() == "<colorbar>":
            ax.tick_params(labelsize=_FS_TICK)
            ax.yaxis.label.set_size(_FS_LABEL)
            ax.xaxis.label.set_size(_FS_LABEL)
            continue
        _style_axes(ax)
        leg = ax.get_legend()
        if leg is not None:
            for t in leg.get_texts():
                t.set_fontsize(max(t.get_fontsize(), _MIN_FONT))
    for t in fig.findobj(matplotlib.text.Text):
        if t.get_fontsize() < _MIN_FONT:
            t.set_fontsize(_MIN_FONT)
    return fig


def _text(s) -> str:
    return "" if s is None else str(s)


def _title(ax, title) -> None:
    if title:
        ax.set_title(_text(title), parse_math=False, fontsize=_FS_TITLE)


def _suptitle(fig, title) -> None:
    if title:
        fig.suptitle(_text(title), fontsize=_FS_TITLE, parse_math=False)


def _p_text(p) -> str:
    """A p-value as written on figures: three significant digits, or n/a."""
    return "n/a" if p is None or not np.isfinite(p) else f"{float(p):.3g}"


def _names(name: str, values, what: str) -> list:
    """Category names as text; at least one is required."""
    out = [_text(v) for v in values]
    if not out:
        raise InputError(f"{name}: expected at least one {what}, got none")
    return out


def _labels(labels, n: int, name: str, default) -> list:
    if labels is None:
        return [default(i) for i in range(n)]
    labels = [_text(x) for x in labels]
    if len(labels) != n:
        raise InputError(f"{name}: expected {n} labels, got {len(labels)}")
    return labels


def _vector(name: str, value, n: int | None = None) -> np.ndarray:
    arr = check_array(name, value, ndim=1, finite=False)
    if n is not None and arr.size != n:
        raise InputError(f"{name}: expected {n} values, got {arr.size}")
    return arr


def _ci(name: str, value, n: int) -> np.ndarray | None:
    """Confidence intervals as an (n, 2) array [low, high]; (2, n) is accepted too."""
    if value is None:
        return None
    arr = check_array(name, value, ndim=2, finite=False)
    if arr.shape == (2, n) and arr.shape != (n, 2):
        arr = arr.T
    if arr.shape != (n, 2):
        raise InputError(f"{name}: expected shape ({n}, 2) (low, high per state), "
                         f"got {arr.shape}")
    return arr


def _vertex_text(vertices: np.ndarray) -> list:
    from attractorfit.states._vertices import codes_to_text
    return codes_to_text(np.where(vertices >= 0, 1, -1))


def _check_name(name: str) -> str:
    name = _text(name)
    if (not name or name in (".", "..") or "/" in name or "\\" in name or "\0" in name
            or os.sep in name):
        raise InputError(f"figure name: expected a plain file name without folders, "
                         f"got {name!r}")
    return name


def save_figure(fig: Figure, folder, name: str, *, formats=("png", "svg"),
                dpi: float = 200) -> list:
    """Save ``fig`` as ``folder/name.png`` and ``folder/name.svg`` atomically.

    Parameters
    ----------
    fig : matplotlib.figure.Figure
    folder : path-like
        Created if missing.
    name : str
        File name without extension and without folders.
    formats : sequence of str, default ("png", "svg")
        Any of "png", "svg", "pdf".
    dpi : float, default 200
        Resolution of raster formats.

    Returns
    -------
    list of str
        The written paths, in the order of ``formats``.

    Notes
    -----
    Outputs are byte-identical for identical figures: the SVG carries no date and a
    fixed id salt, and text in SVG is drawn as paths (no font needed to view it).
    """
    name = _check_name(name)
    dpi = check_positive("dpi", dpi)
    folder = os.fspath(folder)
    paths = []
    for fmt in formats:
        fmt = _text(fmt).lower()
        if fmt not in ("png", "svg", "pdf"):
            raise InputError(f"formats: expected 'png', 'svg' or 'pdf', got {fmt!r}")
        path = os.path.join(folder, f"{name}.{fmt}")
        meta = {"png": {"Software": None}, "svg": {"Date": None},
                "pdf": {"CreationDate": None, "ModDate": None}}[fmt]
        with matplotlib.rc_context({"svg.hashsalt": "attractorfit:" + name,
                                    "svg.fonttype": "path"}):
            with atomic_writer(path, "wb") as fh:
                fig.savefig(fh, format=fmt, dpi=dpi, metadata=meta)
        paths.append(path)
    return paths


def _legend_outside(fig, handles, *, ncols=None) -> None:
    if not handles:
        return
    ncols = ncols or (len(handles) if len(handles) <= 5 else int(np.ceil(len(handles) / 2)))
    fig.legend(handles=handles, loc="outside upper center", ncols=ncols,
               fontsize=_FS_SMALL, frameon=False)


# --------------------------------------------------------------------------- rasters
def _check_segments(name: str, segments) -> list:
    out = []
    if segments is None:
        return out
    for i, seg in enumerate(segments):
        try:
            start, stop, state = seg
            start, stop, state = float(start), float(stop), int(state)
        except (TypeError, ValueError):
            raise InputError(f"{name}[{i}]: expected (start, stop, state), got {seg!r}") from None
        if not (np.isfinite(start) and np.isfinite(stop)) or stop <= start:
            raise InputError(f"{name}[{i}]: expected finite start < stop (s), got "
                             f"({start!r}, {stop!r})")
        out.append((start, stop, state))
    return out


def _draw_state_band(ax, segments, y0: float, height: float, colors) -> set:
    """Coloured band of decoded states, in data x and data y coordinates."""
    used = set()
    by_state: dict = {}
    for start, stop, state in segments:
        by_state.setdefault(state, []).append((start, stop - start))
    for state in sorted(by_state):
        st = state_style(state, colors)
        ax.broken_barh(by_state[state], (y0, height), facecolors=st["color"],
                       hatch=st["hatch"] or None, edgecolor="#333333", linewidth=0.0)
        used.add(state)
    return used


def _draw_raster(ax, spikes, *, duration, segments, colors, unit_labels, t0=0.0):
    n = len(spikes)
    trains = [np.asarray(s, dtype=float).ravel() - t0 for s in spikes]
    if n:
        ax.eventplot(trains, lineoffsets=np.arange(n), linelengths=0.8,
                     colors=DATA_COLOR, linewidths=0.6)
    band_h = max(1.0, 0.08 * n)
    y0 = n - 0.5 + 0.25 * band_h
    used = _draw_state_band(ax, segments, y0, band_h, colors) if segments else set()
    ax.set_xlim(0.0, duration)
    top = y0 + band_h + 0.2 if segments else n - 0.5
    ax.set_ylim(-0.5, max(top, 0.5))
    ticks, labels = [], []
    if n:
        if unit_labels is not None and n <= 30:
            ticks, labels = list(range(n)), list(unit_labels)
        else:
            step = max(1, int(np.ceil(n / 5)))
            ticks = list(range(0, n, step))
            labels = [str(i + 1) if unit_labels is None else unit_labels[i] for i in ticks]
    if segments:
        ticks.append(y0 + band_h / 2)
        labels.append("state")
    ax.set_yticks(ticks, labels=labels, parse_math=False)
    ax.set_xlabel("time from trial start (s)")
    ax.set_ylabel("unit")
    return used


def _state_handles(used, state_labels, colors) -> list:
    handles = []
    for s in sorted(used, key=lambda k: (k < 0, k)):
        st = state_style(s, colors)
        if s < 0:
            label = "unassigned"
        elif state_labels is not None and s < len(state_labels):
            label = _text(state_labels[s])
        else:
            label = f"state {s}"
        handles.append(Patch(facecolor=st["color"], hatch=st["hatch"] or None,
                             edgecolor="#333333", linewidth=0.4, label=label))
    return handles


def _spike_lists(name, trials) -> list:
    if isinstance(trials, np.ndarray) and trials.dtype != object:
        raise InputError(f"{name}: expected a list with one array of spike times per unit")
    out = []
    for i, s in enumerate(trials):
        arr = np.asarray(s, dtype=float).ravel()
        if arr.size and not np.all(np.isfinite(arr)):
            raise InputError(f"{name}: unit {i} has a spike time that is not a finite number")
        out.append(arr)
    return out


def raster_with_states(spike_times_per_unit, *, duration: float, segments=None,
                       state_colors=None, state_labels=None, unit_labels=None,
                       t0: float = 0.0, title=None) -> Figure:
    """Spike raster of one trial with the decoded state as a coloured band above it.

    Parameters
    ----------
    spike_times_per_unit : list of array_like
        One array of spike times (s) per unit.
    duration : float
        Length of the trial's analysis window (s); the x axis runs from 0 to it.
    segments : list of (start, stop, state), optional
        Decoded segments in seconds from the window start (``states.csv`` rows);
        state -1 is drawn as "unassigned".
    state_colors : sequence of colours, optional
        Replaces :data:`STATE_COLORS`.
    state_labels : sequence of str, optional
        Names of the states in the legend (e.g. vertex codes); default ``state i``.
    unit_labels : sequence of str, optional
        Unit ids for the y axis (shown when there are at most 30 units).
    t0 : float, default 0
        Time subtracted from the spike times (the window start, for absolute times).
    title : str, optional

    Returns
    -------
    matplotlib.figure.Figure
    """
    duration = check_positive("duration", duration)
    spikes = _spike_lists("spike_times_per_unit", spike_times_per_unit)
    segs = _check_segments("segments", segments)
    n = len(spikes)
    units = _labels(unit_labels, n, "unit_labels", lambda i: str(i + 1)) \
        if unit_labels is not None else None
    fig = _new_figure(FULL_WIDTH, 2.2 + 0.04 * min(n, 60))
    ax = fig.add_subplot()
    used = _draw_raster(ax, spikes, duration=duration, segments=segs, colors=state_colors,
                        unit_labels=units, t0=t0)
    _title(ax, title)
    _legend_outside(fig, _state_handles(used, state_labels, state_colors))
    return _finish(fig)


def raster_compare(trials_data, trials_surrogate, *, duration, segments_data=None,
                   segments_surrogate=None, state_colors=None, state_labels=None,
                   trial_labels=None, titles=("data", "surrogate (fitted network)")) -> Figure:
    """Example trials, data (left) beside surrogate (right), with decoded-state bands.

    Parameters
    ----------
    trials_data, trials_surrogate : list of trials
        Each trial is a list with one array of spike times (s, from the window start)
        per unit. Both lists have the same length (one row of panels per pair).
    duration : float or sequence of float
        Window length (s), one for all rows or one per row.
    segments_data, segments_surrogate : list of segment lists, optional
        Per row, the decoded ``(start, stop, state)`` segments (see
        :func:`raster_with_states`).
    state_colors, state_labels : optional
        As in :func:`raster_with_states`.
    trial_labels : sequence of str, optional
        Row names (e.g. "trial 12, item A"); default "example i".
    titles : (str, str)
        Column titles.

    Returns
    -------
    matplotlib.figure.Figure
    """
    n_rows = len(trials_data)
    if n_rows == 0 or len(trials_surrogate) != n_rows:
        raise InputError(f"trials_surrogate: expected as many example trials as trials_data "
                         f"({n_rows}, at least 1), got {len(trials_surrogate)}")
    durations = np.broadcast_to(np.asarray(duration, dtype=float), (n_rows,)) \
        if np.ndim(duration) == 0 else _vector("duration", duration, n_rows)
    for d in durations:
        check_positive("duration", float(d))
    rows = _labels(trial_labels, n_rows, "trial_labels", lambda i: f"example {i + 1}")
    seg_d = [None] * n_rows if segments_data is None else list(segments_data)
    seg_s = [None] * n_rows if segments_surrogate is None else list(segments_surrogate)
    if len(seg_d) != n_rows or len(seg_s) != n_rows:
        raise InputError(f"segments_data/segments_surrogate: expected one segment list per "
                         f"example trial ({n_rows})")
    n_units = max(len(t) for t in list(trials_data) + list(trials_surrogate))
    fig = _new_figure(FULL_WIDTH, n_rows * (1.3 + 0.025 * min(n_units, 60)) + 0.6)
    axes = fig.subplots(n_rows, 2, squeeze=False)
    used: set = set()
    for r in range(n_rows):
        for c, (trials, segs, name) in enumerate(((trials_data, seg_d, "data"),
                                                  (trials_surrogate, seg_s, "surrogate"))):
            ax = axes[r, c]
            spikes = _spike_lists(f"trials_{name}[{r}]", trials[r])
            used |= _draw_raster(ax, spikes, duration=float(durations[r]),
                                 segments=_check_segments(f"segments_{name}[{r}]", segs[r]),
                                 colors=state_colors, unit_labels=None)
            if r == 0:
                _title(ax, titles[c])
            if c == 0:
                ax.set_ylabel(f"{rows[r]}\nunit")
    _legend_outside(fig, _state_handles(used, state_labels, state_colors))
    return _finish(fig)


# --------------------------------------------------------------------------- latent space
def _trajectories(name, trajs) -> list:
    if trajs is None:
        return []
    if isinstance(trajs, np.ndarray) and trajs.ndim == 2:
        trajs = [trajs]
    out = []
    for i, t in enumerate(trajs):
        arr = check_array(f"{name}[{i}]", t, finite=False)
        if arr.ndim == 1:
            arr = arr[:, None]
        if arr.ndim != 2:
            raise InputError(f"{name}[{i}]: expected a (time x latent) array, got shape "
                             f"{arr.shape}")
        out.append(arr)
    return out


def latent_trajectories(trajs_data, trajs_surrogate=None, *, vertices=None,
                        vertices_surrogate=None, vertex_labels=None, n_dims: int = 2,
                        bin_size: float | None = None, axis_unit: str = "a.u.",
                        max_trajectories: int = 20,
                        titles=("data", "surrogate (fitted network)")) -> Figure:
    """Trajectories in the first two (or three) latent dimensions, vertices marked.

    Parameters
    ----------
    trajs_data : array (T x K) or list of such arrays
        Latent trajectories of the data, one array per trial.
    trajs_surrogate : same, optional
        Latent trajectories of the surrogate (e.g. the network readout y); drawn in a
        second panel.
    vertices : array (V x K), optional
        Vertex positions in the data panel's latent space (e.g. state means).
    vertices_surrogate : array (V x K), optional
        Vertex positions in the surrogate panel (default: ``vertices``).
    vertex_labels : sequence of str, optional
        Vertex names; default their codes as text (``H`` for a positive coordinate,
        ``L`` for a negative one, per latent axis).
    n_dims : {2, 3}
        Number of latent dimensions drawn. With a single latent dimension (K = 1) the
        latent is drawn against time.
    bin_size : float, optional
        Seconds per trajectory sample (used for the time axis when K = 1).
    axis_unit : str, default "a.u."
        Unit written on the latent axes.
    max_trajectories : int, default 20
        At most this many trajectories are drawn per panel (the first ones).
    titles : (str, str)

    Returns
    -------
    matplotlib.figure.Figure
    """
    n_dims = check_int("n_dims", n_dims, low=2, high=3)
    max_trajectories = check_int("max_trajectories", max_trajectories, low=1)
    panels = [("data", _trajectories("trajs_data", trajs_data), DATA_COLOR)]
    if not panels[0][1]:
        raise InputError("trajs_data: expected at least one trajectory, got none")
    sur = _trajectories("trajs_surrogate", trajs_surrogate)
    if sur:
        panels.append(("surrogate", sur, MODEL_COLOR))
    k = min(min(t.shape[1] for t in p[1]) for p in panels)
    verts = {}
    for key, v in (("data", vertices), ("surrogate",
                                        vertices if vertices_surrogate is None
                                        else vertices_surrogate)):
        if v is not None:
            arr = check_array("vertices" if key == "data" else "vertices_surrogate", v, ndim=2)
            if arr.shape[1] < min(k, n_dims):
                raise InputError(f"vertices: expected at least {min(k, n_dims)} latent "
                                 f"coordinates per vertex, got shape {arr.shape}")
            verts[key] = arr
    labels = {}
    for key, arr in verts.items():
        labels[key] = (_labels(vertex_labels, arr.shape[0], "vertex_labels", str)
                       if vertex_labels is not None else _vertex_text(arr))
    d = min(n_dims, k)
    w = FULL_WIDTH if len(panels) == 2 else HALF_WIDTH * 1.3
    fig = _new_figure(w, 3.4 if d < 3 else 3.8)
    for i, (key, trajs, color) in enumerate(panels):
        if d == 3:
            ax = fig.add_subplot(1, len(panels), i + 1, projection="3d")
        else:
            ax = fig.add_subplot(1, len(panels), i + 1)
        for t in trajs[:max_trajectories]:
            if d == 1:
                x = np.arange(t.shape[0]) * (bin_size or 1.0)
                ax.plot(x, t[:, 0], color=color, lw=0.8, alpha=0.55)
            elif d == 2:
                ax.plot(t[:, 0], t[:, 1], color=color, lw=0.7, alpha=0.45)
                ax.plot(t[0, 0], t[0, 1], "o", color=color, ms=2.5, alpha=0.8)
            else:
                ax.plot(t[:, 0], t[:, 1], t[:, 2], color=color, lw=0.7, alpha=0.45)
        if key in verts:
            v = verts[key]
            for j in range(v.shape[0]):
                st = state_style(j)
                if d == 1:
                    ax.axhline(v[j, 0], color=st["color"], ls="--", lw=1.2)
                    ax.annotate(labels[key][j], (1.0, v[j, 0]),
                                xycoords=("axes fraction", "data"), fontsize=_FS_SMALL,
                                annotation_clip=False, parse_math=False)
                elif d == 2:
                    ax.plot(v[j, 0], v[j, 1], marker="D", ms=8, mfc=st["color"],
                            mec="black", mew=1.0, ls="none", zorder=5)
                    ax.annotate(labels[key][j], (v[j, 0], v[j, 1]), xytext=(6, 6),
                                textcoords="offset points", fontsize=_FS_SMALL + 1,
                                fontweight="bold", zorder=6, parse_math=False,
                                bbox=dict(boxstyle="round,pad=0.15", fc="white",
                                          ec="none", alpha=0.8))
                else:
                    ax.scatter([v[j, 0]], [v[j, 1]], [v[j, 2]], marker="D", s=50,
                               c=[st["color"]], edgecolors="black", depthshade=False)
                    ax.text(v[j, 0], v[j, 1], v[j, 2], "  " + labels[key][j],
                            fontsize=_FS_SMALL + 1, fontweight="bold", parse_math=False)
        if d == 1:
            ax.set_xlabel("time in window (s)" if bin_size else "time in window (bins)")
            ax.set_ylabel(f"latent 1 ({axis_unit})")
        else:
            ax.set_xlabel(f"latent 1 ({axis_unit})")
            ax.set_ylabel(f"latent 2 ({axis_unit})")
            if d == 3:
                ax.set_zlabel(f"latent 3 ({axis_unit})")
        _title(ax, titles[i] if i < len(titles) else key)
    return _finish(fig)


# --------------------------------------------------------------------------- occupancy
def occupancy_bars(occ_data, occ_model=None, ci_model=None, nulls=None, *, ci_data=None,
                   state_labels=None, model_label: str = "surrogate (fitted network)",
                   ylabel: str = "occupancy (fraction of time)", title=None) -> Figure:
    """Occupancy per state: data, surrogate and nulls, with confidence intervals.

    Parameters
    ----------
    occ_data : array (S,)
        Fraction of (assigned) time in each state, data.
    occ_model : array (S,), optional
        Same for the fitted network's surrogate.
    ci_model, ci_data : array (S, 2), optional
        Low and high ends of a confidence interval per state.
    nulls : dict {name: (occupancy (S,), ci (S, 2) or None)}, optional
        Null models drawn beside them.
    state_labels : sequence of str, optional
        Names on the x axis (e.g. vertex codes); default ``0 .. S-1``.

    Returns
    -------
    matplotlib.figure.Figure
    """
    occ = _vector("occ_data", occ_data)
    n = occ.size
    if n == 0:
        raise InputError("occ_data: expected at least one state, got none")
    series = [("data", occ, _ci("ci_data", ci_data, n), DATA_COLOR, "")]
    if occ_model is not None:
        series.append((model_label, _vector("occ_model", occ_model, n),
                       _ci("ci_model", ci_model, n), MODEL_COLOR, "//"))
    for j, (name, val) in enumerate((nulls or {}).items()):
        try:
            o, c = val
        except (TypeError, ValueError):
            raise InputError(f"nulls[{name!r}]: expected (occupancy, ci or None)") from None
        series.append((_text(name), _vector(f"nulls[{name!r}]", o, n),
                       _ci(f"nulls[{name!r}] ci", c, n), NULL_COLORS[j % len(NULL_COLORS)],
                       _NULL_HATCHES[j % len(_NULL_HATCHES)]))
    labels = _labels(state_labels, n, "state_labels", str)
    fig = _new_figure(FULL_WIDTH if n > 4 or len(series) > 2 else HALF_WIDTH * 1.4, 3.0)
    ax = fig.add_subplot()
    width = 0.8 / len(series)
    x = np.arange(n)
    top = 0.0
    for j, (name, vals, ci, color, hatch) in enumerate(series):
        pos = x - 0.4 + width * (j + 0.5)
        yerr = None
        if ci is not None:
            yerr = np.vstack([np.clip(vals - ci[:, 0], 0, None), np.clip(ci[:, 1] - vals, 0, None)])
            top = max(top, np.nanmax(ci[:, 1]))
        ax.bar(pos, vals, width=width * 0.95, color=color, hatch=hatch or None,
               edgecolor="#333333", linewidth=0.5, label=name, yerr=yerr,
               error_kw=dict(ecolor="black", elinewidth=0.9, capsize=2.5))
        top = max(top, np.nanmax(vals))
    ax.set_xticks(x, labels=labels, parse_math=False)
    ax.set_xlabel("state")
    ax.set_ylabel(ylabel)
    ax.set_ylim(0, min(1.0, top * 1.15) if top > 0 else 1.0)
    has_ci = any(s[2] is not None for s in series)
    if len(series) > 1 or has_ci:
        # legend above the axes, in columns, so it never covers bars or error bars
        leg = ax.legend(fontsize=_FS_SMALL, frameon=False, loc="lower center",
                        bbox_to_anchor=(0.5, 1.0), ncol=min(len(series), 5),
                        title="error bars: confidence intervals" if has_ci else None,
                        title_fontsize=_FS_SMALL)
        leg.get_title().set_color("#444444")
    _title(ax, title)
    return _finish(fig)


# --------------------------------------------------------------------------- dwell times
def _curve(name, val):
    try:
        times, surv, cens = val
    except (TypeError, ValueError):
        raise InputError(f"{name}: expected (times, survival, censored_times)") from None
    times = _vector(f"{name} times", times)
    surv = _vector(f"{name} survival", surv, times.size)
    cens = _vector(f"{name} censored_times", [] if cens is None else cens)
    for what, arr in (("times", times), ("censored_times", cens)):
        if arr.size and (not np.all(np.isfinite(arr)) or arr.min() <= 0):
            raise InputError(f"{name} {what}: expected finite durations > 0 s (log axis), "
                             f"got {arr[~(np.isfinite(arr) & (arr > 0))][0]!r}")
    if times.size and np.any(np.diff(times) < 0):
        raise InputError(f"{name} times: expected increasing durations")
    return times, surv, cens


def _survival_at(times, surv, t):
    idx = np.searchsorted(times, t, side="right") - 1
    return np.where(idx >= 0, surv[np.clip(idx, 0, None)] if surv.size else 1.0, 1.0)


def _draw_survival(ax, times, surv, cens, *, color, ls, label, marker):
    if times.size:
        x = np.r_[times[0], times]
        y = np.r_[1.0, surv]
        if cens.size and cens.max() > times[-1]:
            x = np.r_[x, cens.max()]
            y = np.r_[y, surv[-1]]
        ax.step(x, y, where="post", color=color, ls=ls, lw=1.4, label=label)
    if cens.size:
        ax.plot(cens, _survival_at(times, surv, cens), ls="none", marker=marker, ms=7,
                mew=1.0, color=color, label=f"{label}: censored")


def dwell_survival(data, model=None, *, state_labels=None,
                   labels=("data", "surrogate (fitted network)"), title=None) -> Figure:
    """Dwell-time survival curves per state, log time axis, censored dwells marked.

    Parameters
    ----------
    data : dict {state: (times, survival, censored_times)}
        Per state, the Kaplan-Meier curve: ``times`` (s, increasing, > 0) at which
        complete dwells ended, ``survival`` S(t) just after each time (S = 1 before the
        first), and the durations of censored dwells (cut by a trial edge), drawn as
        ticks on the curve.
    model : dict, optional
        Same for the surrogate.
    state_labels : dict or sequence, optional
        Panel titles per state; default ``state i``.
    labels : (str, str)
        Legend names of data and model.

    Returns
    -------
    matplotlib.figure.Figure
    """
    if not isinstance(data, Mapping) or not data:
        raise InputError("data: expected a dict {state: (times, survival, censored_times)} "
                         "with at least one state")
    if model is not None and not isinstance(model, Mapping):
        raise InputError("model: expected a dict {state: (times, survival, censored_times)}")
    states = sorted(set(data) | set(model or {}))
    n = len(states)
    ncols = min(4, n)
    nrows = int(np.ceil(n / ncols))
    fig = _new_figure(FULL_WIDTH, 0.6 + 1.9 * nrows)
    axes = fig.subplots(nrows, ncols, squeeze=False, sharex=True, sharey=True)
    for i, s in enumerate(states):
        ax = axes.flat[i]
        if s in data:
            _draw_survival(ax, *_curve(f"data[{s!r}]", data[s]), color=DATA_COLOR, ls="-",
                           label=labels[0], marker="|")
        if model is not None and s in model:
            _draw_survival(ax, *_curve(f"model[{s!r}]", model[s]), color=MODEL_COLOR,
                           ls="--", label=labels[1], marker="|")
        ax.set_xscale("log")
        ax.set_ylim(0, 1.04)
        ax.set_xlabel("dwell time (s)")
        if i % ncols == 0:
            ax.set_ylabel("fraction of dwells\nlonger than t")
        ax.xaxis.set_tick_params(labelbottom=True)
        if isinstance(state_labels, Mapping):
            name = state_labels.get(s, f"state {s}")
        elif state_labels is not None and isinstance(s, (int, np.integer)) \
                and 0 <= s < len(state_labels):
            name = state_labels[s]
        else:
            name = f"state {s}"
        _title(ax, name)
    for ax in list(axes.flat)[n:]:
        ax.set_visible(False)
    handles = [Line2D([], [], color=DATA_COLOR, ls="-", lw=1.4, label=labels[0])]
    if model is not None:
        handles.append(Line2D([], [], color=MODEL_COLOR, ls="--", lw=1.4, label=labels[1]))
    handles.append(Line2D([], [], color="#555555", ls="none", marker="|", ms=7,
                          label="censored dwell (cut by trial edge)"))
    _legend_outside(fig, handles)
    _suptitle(fig, title)
    return _finish(fig)


# --------------------------------------------------------------------------- transitions
def _square(name, value) -> np.ndarray:
    arr = check_array(name, value, ndim=2)
    if arr.shape[0] != arr.shape[1] or arr.shape[0] == 0:
        raise InputError(f"{name}: expected a square matrix (from state x to state), "
                         f"got shape {arr.shape}")
    return arr


def transition_matrices(T_data, T_model=None, *, state_labels=None, off_diagonal: bool = False,
                        cmap: str = "cividis", annotate: bool | None = None,
                        quantity: str = "transition probability per bin",
                        titles=("data", "surrogate (fitted network)")) -> Figure:
    """Transition matrices of data and surrogate side by side, one colour scale.

    Parameters
    ----------
    T_data, T_model : array (S x S)
        Row = from state, column = to state.
    state_labels : sequence of str, optional
    off_diagonal : bool, default False
        Hide the diagonal and scale the colours to the off-diagonal entries (useful
        when staying dominates per-bin probabilities).
    cmap : str, default "cividis"
    annotate : bool, optional
        Write the values in the cells (default: when S <= 10).
    quantity : str
        Colour-bar label.

    Returns
    -------
    matplotlib.figure.Figure
    """
    mats = [_square("T_data", T_data)]
    if T_model is not None:
        mats.append(_square("T_model", T_model))
        if mats[1].shape != mats[0].shape:
            raise InputError(f"T_model: expected shape {mats[0].shape} like T_data, got "
                             f"{mats[1].shape}")
    n = mats[0].shape[0]
    labels = _labels(state_labels, n, "state_labels", str)
    annotate = n <= 10 if annotate is None else bool(annotate)
    shown = []
    for m in mats:
        m = m.astype(float).copy()
        if off_diagonal:
            np.fill_diagonal(m, np.nan)
        shown.append(m)
    finite = np.concatenate([m[np.isfinite(m)] for m in shown]) if n > 1 or not off_diagonal \
        else np.array([0.0])
    vmax = float(finite.max()) if finite.size and finite.max() > 0 else 1.0
    fig = _new_figure(FULL_WIDTH if len(mats) == 2 else HALF_WIDTH * 1.3,
                      3.3 if n <= 8 else 4.2)
    axes = fig.subplots(1, len(mats), squeeze=False)[0]
    cm = matplotlib.colormaps[cmap].with_extremes(bad="white")
    im = None
    for ax, m, t in zip(axes, shown, titles):
        im = ax.imshow(m, cmap=cm, vmin=0.0, vmax=vmax, interpolation="nearest")
        ax.set_xticks(range(n), labels=labels, parse_math=False)
        ax.set_yticks(range(n), labels=labels, parse_math=False)
        ax.set_xlabel("to state")
        ax.set_ylabel("from state")
        _title(ax, t)
        if annotate:
            decimals = 2 if vmax >= 0.1 else 3 if vmax >= 0.01 else 4
            for i in range(n):
                for j in range(n):
                    v = m[i, j]
                    if not np.isfinite(v):
                        continue
                    rgba = cm(v / vmax)
                    lum = 0.299 * rgba[0] + 0.587 * rgba[1] + 0.114 * rgba[2]
                    ax.text(j, i, f"{v:.{decimals}f}", ha="center", va="center", fontsize=_FS_SMALL,
                            color="black" if lum > 0.5 else "white")
        for side in ("top", "right"):
            ax.spines[side].set_visible(True)
    cb = fig.colorbar(im, ax=list(axes), shrink=0.85)
    cb.set_label(quantity + (" (off-diagonal)" if off_diagonal else ""), fontsize=_FS_LABEL)
    cb.ax.tick_params(labelsize=_FS_TICK)
    fig = _finish(fig)
    for ax in axes:
        for side in ("top", "right"):
            ax.spines[side].set_visible(True)
    return fig


# --------------------------------------------------------------------------- single units
def rate_scatter(r_data, r_model, *, r2: float, r2_ref95: float | None = None, groups=None,
                 group_labels=None, xlabel: str = "data rate (Hz)",
                 ylabel: str = "surrogate rate (Hz)", title=None) -> Figure:
    """Rates, data vs surrogate, with the identity line and R^2 in the legend.

    Parameters
    ----------
    r_data, r_model : array (n,)
        Paired rates (e.g. per unit x per state, centred per unit: Amendment 5).
    r2 : float
        The R^2 to report (computed by the comparison stage).
    r2_ref95 : float, optional
        Its reference value from pairs of model surrogates, shown beside it.
    groups : array of int (n,), optional
        Colours points by group (e.g. state), with state styles.
    group_labels : sequence of str, optional
    xlabel, ylabel : str
        Axis labels with units.

    Returns
    -------
    matplotlib.figure.Figure
    """
    x = _vector("r_data", r_data)
    y = _vector("r_model", r_model, x.size)
    if x.size == 0:
        raise InputError("r_data: expected at least one rate, got none")
    fig = _new_figure(HALF_WIDTH * 1.25, HALF_WIDTH * 1.15)
    ax = fig.add_subplot()
    ok = np.isfinite(x) & np.isfinite(y)
    lo = float(min(x[ok].min(), y[ok].min())) if ok.any() else 0.0
    hi = float(max(x[ok].max(), y[ok].max())) if ok.any() else 1.0
    pad = 0.05 * (hi - lo or 1.0)
    lo, hi = lo - pad, hi + pad
    ax.plot([lo, hi], [lo, hi], color="#777777", ls="--", lw=1.0, label="identity")
    r2_text = "n/a" if r2 is None or not np.isfinite(r2) else f"{float(r2):.2f}"
    ref = "" if r2_ref95 is None or not np.isfinite(r2_ref95) else \
        f" (model vs model: {float(r2_ref95):.2f})"
    if groups is None:
        ax.scatter(x, y, s=14, facecolors="none", edgecolors=DATA_COLOR, linewidths=0.8,
                   label=f"R\u00b2 = {r2_text}{ref}")
    else:
        g = _vector("groups", groups, x.size).astype(int)
        names = sorted(set(g.tolist()))
        for k in names:
            st = state_style(k)
            name = (_text(group_labels[k]) if group_labels is not None and 0 <= k
                    < len(group_labels) else f"state {k}")
            ax.scatter(x[g == k], y[g == k], s=16, marker=st["marker"], color=st["color"],
                       edgecolors="#222222", linewidths=0.4, label=name)
        ax.plot([], [], ls="none", label=f"R\u00b2 = {r2_text}{ref}")
    ax.set_xlim(lo, hi)
    ax.set_ylim(lo, hi)
    ax.set_aspect("equal", adjustable="box")
    ax.set_xlabel(_text(xlabel), parse_math=False)
    ax.set_ylabel(_text(ylabel), parse_math=False)
    ax.legend(fontsize=_FS_SMALL, frameon=False, loc="upper left")
    _title(ax, title)
    return _finish(fig)


def _draw_distribution(ax, a, b, *, kind, bins):
    """Draw data (and model) distributions; return the sample sizes."""
    vals = [a[np.isfinite(a)], None if b is None else b[np.isfinite(b)]]
    styles = ((DATA_COLOR, "-"), (MODEL_COLOR, "--"))
    if kind == "hist":
        allv = np.concatenate([v for v in vals if v is not None])
        edges = np.histogram_bin_edges(allv, bins=bins) if np.ptp(allv) > 0 else \
            np.array([allv[0] - 0.5, allv[0] + 0.5])
        for v, (color, ls) in zip(vals, styles):
            if v is not None and v.size:
                ax.hist(v, bins=edges, density=True, histtype="step", color=color, ls=ls,
                        lw=1.4)
        ax.set_ylabel("density (per x unit)")
    else:
        for v, (color, ls) in zip(vals, styles):
            if v is not None and v.size:
                s = np.sort(v)
                ax.step(np.r_[s[0], s], np.r_[0.0, np.arange(1, s.size + 1) / s.size],
                        where="post", color=color, ls=ls, lw=1.4)
        ax.set_ylim(0, 1.02)
        ax.set_ylabel("cumulative fraction")
    return [0 if v is None else v.size for v in vals]


def distribution_compare(values_data, values_model, *, xlabel: str, kind: str = "ecdf",
                         bins="auto", labels=("data", "surrogate (fitted network)"),
                         note: str | None = None, title=None) -> Figure:
    """Distribution of a statistic (ISI CV, Fano factor, pairwise correlation), data vs model.

    Parameters
    ----------
    values_data, values_model : array_like
        One value per unit (or pair); non-finite values are left out.
    xlabel : str
        The statistic and its unit, e.g. "ISI CV (dimensionless)".
    kind : {"ecdf", "hist"}
        Empirical cumulative distributions (default: no binning choice) or step
        histograms on shared bins.
    bins : int or str
        Histogram bins (``kind="hist"``).
    note : str, optional
        Extra text in the corner (e.g. a two-sample test result).

    Returns
    -------
    matplotlib.figure.Figure
    """
    return distribution_panels({xlabel: (values_data, values_model)}, kind=kind, bins=bins,
                               labels=labels, notes=None if note is None else {xlabel: note},
                               title=title)


def distribution_panels(panels, *, kind: str = "ecdf", bins="auto",
                        labels=("data", "surrogate (fitted network)"), notes=None,
                        title=None) -> Figure:
    """Several distributions side by side: ``{xlabel: (values_data, values_model)}``.

    See :func:`distribution_compare` for the arguments; ``notes`` is a dict
    ``{xlabel: text}``. ``values_model`` may be None (data only). Each panel notes
    its sample sizes (data / model).
    """
    if kind not in ("ecdf", "hist"):
        raise InputError(f"kind: expected 'ecdf' or 'hist', got {kind!r}")
    if not isinstance(panels, Mapping) or not panels:
        raise InputError("panels: expected a dict {xlabel: (values_data, values_model)} with "
                         "at least one entry")
    n = len(panels)
    fig = _new_figure(FULL_WIDTH if n > 1 else HALF_WIDTH * 1.3, 2.8)
    axes = fig.subplots(1, n, squeeze=False)[0]
    for ax, (xl, val) in zip(axes, panels.items()):
        try:
            a, b = val
        except (TypeError, ValueError):
            raise InputError(f"panels[{xl!r}]: expected (values_data, values_model)") from None
        a = check_array(f"{xl}: values_data", a, finite=False).ravel()
        b = None if b is None else check_array(f"{xl}: values_model", b, finite=False).ravel()
        if not np.isfinite(a).any():
            raise InputError(f"{xl}: values_data has no finite value")
        sizes = _draw_distribution(ax, a, b, kind=kind, bins=bins)
        ax.set_xlabel(_text(xl), parse_math=False)
        note = f"n = {sizes[0]}" + (f" / {sizes[1]}" if b is not None else "")
        if notes and xl in notes:
            note += "\n" + _text(notes[xl])
        ax.text(0.98, 0.04, note, transform=ax.transAxes, ha="right", va="bottom",
                fontsize=_FS_SMALL, parse_math=False,
                bbox=dict(boxstyle="round,pad=0.2", fc="white", ec="none", alpha=0.8))
    handles = [Line2D([], [], color=DATA_COLOR, ls="-", lw=1.4, label=_text(labels[0]))]
    if any(v[1] is not None for v in panels.values()):
        handles.append(Line2D([], [], color=MODEL_COLOR, ls="--", lw=1.4,
                              label=_text(labels[1])))
    _legend_outside(fig, handles)
    _suptitle(fig, title)
    return _finish(fig)


# --------------------------------------------------------------------------- conditions
def state_by_condition(table, *, matching=None, state_labels=None,
                       xlabel: str = "remembered item", title=None) -> Figure:
    """Fraction of delay time in each state, per condition level (stacked bars).

    Parameters
    ----------
    table : dict {level: fractions per state (S,)}
        Per level of a trial label (remembered item, outcome), the fraction of delay
        time spent in each state (rows may sum to less than 1: the rest is drawn as
        unassigned time).
        A dict of such dicts ``{grouping: {level: fractions}}`` gives one panel per
        grouping (e.g. "remembered item" and "outcome"), the grouping names as x labels.
    matching : dict {level: int or float}, optional
        (Per grouping when ``table`` has groupings.) An int names the cue-matching
        state of that level, whose segment is outlined and its fraction written above
        the bar; a float is the fraction of delay time in the cue-matching state,
        drawn as a diamond at that height.
    state_labels : sequence of str, optional
    xlabel : str
        Name of the grouping (single panel).

    Returns
    -------
    matplotlib.figure.Figure
    """
    if not isinstance(table, Mapping) or not table:
        raise InputError("table: expected a dict {level: fractions per state} with at least "
                         "one level")
    grouped = all(isinstance(v, Mapping) for v in table.values())
    groups = dict(table) if grouped else {xlabel: table}
    if matching is not None and not isinstance(matching, Mapping):
        raise InputError("matching: expected a dict {level: state or fraction}")
    matches = (dict(matching) if grouped else {xlabel: matching}) if matching else {}
    n_states = None
    for g, tab in groups.items():
        for lvl, fr in tab.items():
            v = _vector(f"table[{lvl!r}]", fr, n_states)
            n_states = v.size
    labels = _labels(state_labels, n_states, "state_labels", lambda i: f"state {i}")
    widths = [max(1, len(t)) for t in groups.values()]
    fig = _new_figure(min(FULL_WIDTH, 1.4 + 0.75 * sum(widths) + 0.6 * len(groups)), 3.2)
    axes = fig.subplots(1, len(groups), squeeze=False, width_ratios=widths)[0]
    diamond = unassigned = False
    for ax, (g, tab) in zip(axes, groups.items()):
        levels = list(tab)
        fr = np.array([_vector(f"table[{lvl!r}]", tab[lvl], n_states) for lvl in levels])
        bottom = np.zeros(len(levels))
        x = np.arange(len(levels))
        for s in range(n_states):
            st = state_style(s)
            ax.bar(x, fr[:, s], bottom=bottom, width=0.65, color=st["color"],
                   hatch=st["hatch"] or None, edgecolor="#333333", linewidth=0.4)
            bottom = bottom + fr[:, s]
        rest = np.clip(1.0 - bottom, 0.0, None)
        if np.any(rest > 1e-9):
            unassigned = True
            ax.bar(x, rest, bottom=bottom, width=0.65, color=UNASSIGNED_COLOR,
                   edgecolor="#333333", linewidth=0.4)
        m = matches.get(g) or {}
        for i, lvl in enumerate(levels):
            if lvl not in m:
                continue
            val = m[lvl]
            if isinstance(val, (int, np.integer)) and not isinstance(val, bool):
                s = int(val)
                if not 0 <= s < n_states:
                    raise InputError(f"matching[{lvl!r}]: expected a state in 0..{n_states - 1}"
                                     f", got {s}")
                y0 = fr[i, :s].sum()
                ax.bar([i], [fr[i, s]], bottom=[y0], width=0.65, fill=False,
                       edgecolor="black", linewidth=2.0)
                ax.text(i, min(bottom[i], 1.0) + 0.03, f"{fr[i, s]:.2f}", ha="center",
                        va="bottom", fontsize=_FS_SMALL)
            else:
                f = float(val)
                ax.plot([i], [f], marker="D", ms=7, mfc="white", mec="black", mew=1.4,
                        ls="none", zorder=5)
                ax.text(i + 0.12, f, f"{f:.2f}", va="center", ha="left", fontsize=_FS_SMALL,
                        bbox=dict(boxstyle="round,pad=0.15", fc="white", ec="none"),
                        zorder=6)
                diamond = True
        ax.set_xticks(x, labels=[_text(lvl) for lvl in levels], parse_math=False)
        ax.set_xlim(-0.6, len(levels) - 0.4)
        ax.set_ylim(0, 1.12)
        ax.set_xlabel(_text(g), parse_math=False)
        ax.set_ylabel("fraction of delay time")
    handles = _state_handles(set(range(n_states)) | ({-1} if unassigned else set()),
                             labels, None)
    if any(isinstance(v, (int, np.integer)) for mm in matches.values() for v in mm.values()):
        handles.append(Patch(fill=False, edgecolor="black", linewidth=2.0,
                             label="cue-matching state"))
    if diamond:
        handles.append(Line2D([], [], marker="D", ms=7, mfc="white", mec="black", ls="none",
                              label="in cue-matching state"))
    _legend_outside(fig, handles)
    _suptitle(fig, title)
    return _finish(fig)


# --------------------------------------------------------------------------- overlaps
def pattern_overlap_time(times, overlaps, *, pattern_labels=None, segments=None,
                         ylabel: str = "overlap with pattern (a.u.)", title=None) -> Figure:
    """Overlap of the surrogate's rates with each stored pattern over time.

    Parameters
    ----------
    times : array (T,)
        Time (s) of each sample.
    overlaps : array (T x P)
        Overlap with pattern mu at each time (e.g. the normalised projection of the
        population rate on pattern mu).
    pattern_labels : sequence of str, optional
        Names (e.g. vertex codes); pattern mu is drawn in the style of state mu.
    segments : list of (start, stop, state), optional
        Decoded states of the same surrogate, drawn as a band along the top.
    ylabel : str

    Returns
    -------
    matplotlib.figure.Figure
    """
    t = _vector("times", times)
    ov = check_array("overlaps", overlaps, finite=False)
    if ov.ndim == 1:
        ov = ov[:, None]
    if ov.ndim != 2 or ov.shape[0] != t.size:
        raise InputError(f"overlaps: expected shape ({t.size}, patterns), got {ov.shape}")
    labels = _labels(pattern_labels, ov.shape[1], "pattern_labels", lambda i: f"pattern {i}")
    segs = _check_segments("segments", segments)
    fig = _new_figure(FULL_WIDTH, 2.8)
    ax = fig.add_subplot()
    for mu in range(ov.shape[1]):
        st = state_style(mu)
        ax.plot(t, ov[:, mu], color=st["color"], ls=st["linestyle"], lw=1.3, label=labels[mu])
    used = set()
    if segs:
        tr = blended_transform_factory(ax.transData, ax.transAxes)
        by: dict = {}
        for a, b, s in segs:
            by.setdefault(s, []).append((a, b - a))
        for s in sorted(by):
            st = state_style(s)
            ax.broken_barh(by[s], (1.02, 0.06), facecolors=st["color"],
                           hatch=st["hatch"] or None, edgecolor="#333333", linewidth=0.0,
                           transform=tr, clip_on=False)
            used.add(s)
        ax.text(-0.01, 1.05, "state", transform=ax.transAxes, ha="right", va="center",
                fontsize=_FS_SMALL)
    if t.size:
        ax.set_xlim(t[0], t[-1])
    ax.set_xlabel("time (s)")
    ax.set_ylabel(_text(ylabel), parse_math=False)
    ax.legend(fontsize=_FS_SMALL, frameon=False, loc="center left", bbox_to_anchor=(1.0, 0.5))
    _title(ax, title)
    return _finish(fig)


# --------------------------------------------------------------------------- tests
def null_distribution(observed: float, null_values, *, p_value: float, label: str,
                      verdict: str | None = None, null_name: str | None = None,
                      bins="auto", title=None) -> Figure:
    """The observed statistic on the histogram of its null distribution.

    Parameters
    ----------
    observed : float
    null_values : array_like
        The statistic on each null (bootstrap) dataset.
    p_value : float
        As computed by the test (e.g. (1 + b) / (B + 1)).
    label : str
        The statistic and its unit (x axis).
    verdict : str, optional
        Written in the corner with the p-value.
    null_name : str, optional
        Name of the null model, written in the legend.

    Returns
    -------
    matplotlib.figure.Figure
    """
    obs = float(observed)
    null = check_array("null_values", null_values, finite=False).ravel()
    null = null[np.isfinite(null)]
    if null.size == 0:
        raise InputError("null_values: expected at least one finite null statistic")
    fig = _new_figure(HALF_WIDTH * 1.5, 3.1)
    ax = fig.add_subplot()
    lo, hi = min(null.min(), obs), max(null.max(), obs)
    span = hi - lo or 1.0
    edges = np.histogram_bin_edges(null, bins=bins, range=(null.min(), null.max())) \
        if np.ptp(null) > 0 else np.array([null[0] - 0.5 * span * 0.05, null[0] + 0.5 * span * 0.05])
    name = f"null: {_text(null_name)}" if null_name else "null datasets"
    ax.hist(null, bins=edges, color=NULL_COLORS[0], edgecolor="#333333", linewidth=0.4)
    ax.axvline(obs, color="#D55E00", lw=2.2)
    ax.set_xlim(lo - 0.05 * span, hi + 0.05 * span)
    ax.set_ylim(0, ax.get_ylim()[1] * 1.25)
    ax.set_xlabel(_text(label), parse_math=False)
    ax.set_ylabel("number of null datasets")
    pv = _p_text(p_value)
    text = f"p = {pv}" + (f"\nverdict: {_text(verdict)}" if verdict else "")
    ax.text(0.98, 0.97, text, transform=ax.transAxes, ha="right", va="top",
            fontsize=_FS_SMALL + 1, parse_math=False,
            bbox=dict(boxstyle="round,pad=0.3", fc="white", ec="#999999"))
    _legend_outside(fig, [Patch(facecolor=NULL_COLORS[0], edgecolor="#333333", linewidth=0.4,
                                label=f"{name} (B = {null.size})"),
                          Line2D([], [], color="#D55E00", lw=2.2, label="observed")], ncols=1)
    _title(ax, title)
    return _finish(fig)


def model_diagnostics(margins, residuals, readout_noise_ratio, *, capacity, load,
                      vertex_labels=None, used=None, residual_labels=None,
                      margin_unit: str = "1/\u03c4_s", title=None) -> Figure:
    """Fitted-network diagnostics in four panels.

    Parameters
    ----------
    margins : array (V,)
        Stability margin per vertex: minus the largest real part of the Jacobian's
        eigenvalues (> 0 stable), in units of 1/tau_s.
    residuals : array (R,)
        Decoder constraint residuals (e.g. ``|a x - tau_s D r|`` per vertex, latent units).
    readout_noise_ratio : array (V,)
        Readout s.d. divided by the vertex spacing, per vertex (Amendment 2).
    capacity : float or None
        Estimated number of patterns the circuit can hold (NaN/None: not estimated).
    load : float
        Number of patterns it currently holds.
    vertex_labels : sequence of str, optional
        Default: ``vertex i``.
    used : array of bool (V,), optional
        Which vertices are states of the data; the others (unused vertices) are drawn
        pale with a hatch: a stable unused vertex is a spurious attractor.
    residual_labels : sequence of str, optional
        Default: the vertex labels when R == V, else ``constraint i``.

    Returns
    -------
    matplotlib.figure.Figure
    """
    m = _vector("margins", margins)
    v = m.size
    if v == 0:
        raise InputError("margins: expected at least one vertex, got none")
    res = _vector("residuals", residuals)
    ratio = _vector("readout_noise_ratio", readout_noise_ratio, v)
    labels = _labels(vertex_labels, v, "vertex_labels", lambda i: f"vertex {i}")
    use = np.ones(v, bool) if used is None else _vector("used", used, v).astype(bool)
    rlabels = (_labels(residual_labels, res.size, "residual_labels", str)
               if residual_labels is not None else
               (labels if res.size == v else [f"constraint {i}" for i in range(res.size)]))
    cap = np.nan if capacity is None else float(capacity)
    load = float(load)
    fig = _new_figure(FULL_WIDTH, 5.4)
    axes = fig.subplots(2, 2)
    x = np.arange(v)
    colors = [DATA_COLOR if u else "#BBBBBB" for u in use]
    hatches = [None if u else "//" for u in use]

    ax = axes[0, 0]
    for i in range(v):
        ax.bar(x[i], m[i], color=colors[i], hatch=hatches[i], edgecolor="#333333", lw=0.4)
    ax.axhline(0, color="black", lw=0.8)
    ax.set_xticks(x, labels=labels, parse_math=False, rotation=45 if v > 6 else 0)
    ax.set_xlabel("vertex")
    ax.set_ylabel(f"stability margin ({margin_unit})")
    _title(ax, "stability (> 0: stable)")

    ax = axes[0, 1]
    ok = np.isfinite(res)
    ax.bar(np.arange(res.size), np.where(ok, res, 0.0), color=MODEL_COLOR, edgecolor="#333333",
           lw=0.4)
    if ok.any() and np.nanmax(res) > 0 and np.nanmin(res[res > 0], initial=np.inf) > 0 and \
            np.nanmax(res) / max(np.nanmin(res[res > 0], initial=np.inf), 1e-300) > 100:
        ax.set_yscale("log")
    ax.set_xticks(np.arange(res.size), labels=rlabels, parse_math=False,
                  rotation=45 if res.size > 6 else 0)
    ax.set_xlabel("vertex" if res.size == v else "constraint")
    ax.set_ylabel("fixed-point residual\n(latent units)")
    _title(ax, "decoder constraint residuals")

    ax = axes[1, 0]
    for i in range(v):
        ax.bar(x[i], ratio[i], color=colors[i], hatch=hatches[i], edgecolor="#333333", lw=0.4)
    ax.axhline(1.0, color="#D55E00", ls="--", lw=1.0, label="s.d. = spacing")
    ax.set_xticks(x, labels=labels, parse_math=False, rotation=45 if v > 6 else 0)
    ax.set_xlabel("vertex")
    ax.set_ylabel("readout s.d. / vertex spacing\n(ratio)")
    ax.legend(fontsize=_FS_SMALL, frameon=False)
    _title(ax, "readout shot noise")

    ax = axes[1, 1]
    vals = [load, cap if np.isfinite(cap) else 0.0]
    ax.barh([1, 0], vals, color=[MODEL_COLOR, NULL_COLORS[0]], hatch=[None, ".."],
            edgecolor="#333333", lw=0.4, height=0.6)
    ax.set_yticks([1, 0], labels=["current load", "capacity estimate"])
    for yy, val, txt in ((1, load, f"{load:g}"),
                         (0, vals[1], f"{cap:.3g}" if np.isfinite(cap) else "not estimated")):
        ax.text(val, yy, "  " + txt, va="center", fontsize=_FS_SMALL)
    ax.set_xlim(0, max(vals) * 1.35 if max(vals) > 0 else 1.0)
    ax.set_xlabel("number of patterns")
    ax.set_ylabel("")
    _title(ax, "capacity vs load")
    handles = []
    if not use.all():
        handles = [Patch(facecolor=DATA_COLOR, label="vertex used by a data state"),
                   Patch(facecolor="#BBBBBB", hatch="//", edgecolor="#333333",
                         label="unused vertex (stable = spurious attractor)")]
    _legend_outside(fig, handles)
    _suptitle(fig, title)
    return _finish(fig)


# --------------------------------------------------------------------------- lab checks
def decoding_accuracy(names, values, nulls, chance, p_values, *,
                      ylabel: str = "cross-validated balanced accuracy", title=None) -> Figure:
    """Decoding score of each trial label with its permutation null and chance level.

    Parameters
    ----------
    names : sequence of str
        Trial labels (one column each).
    values : array (L,)
        Observed cross-validated score of each label (fraction).
    nulls : sequence of arrays
        The score under each label permutation, per label (drawn as a box and
        whiskers spanning the 2.5-97.5 percentiles).
    chance : array (L,)
        Chance level of each label (a dashed line).
    p_values : array (L,)
        Permutation p-values, written above each label.

    Returns
    -------
    matplotlib.figure.Figure
    """
    from matplotlib.patches import Rectangle

    labels = _names("names", names, "label")
    n = len(labels)
    val = _vector("values", values, n)
    ch = _vector("chance", chance, n)
    pv = _vector("p_values", p_values, n)
    if len(nulls) != n:
        raise InputError(f"nulls: expected {n} null distributions, got {len(nulls)}")
    nl = [_vector(f"nulls[{i}]", v) for i, v in enumerate(nulls)]
    fig = _new_figure(HALF_WIDTH * (1.2 if n <= 2 else 1.8), 3.0)
    ax = fig.add_subplot()
    x = np.arange(n)
    for i in range(n):
        v = nl[i][np.isfinite(nl[i])]
        if v.size:
            lo, q1, med, q3, hi = np.percentile(v, [2.5, 25, 50, 75, 97.5])
            ax.add_patch(Rectangle((x[i] - 0.18, q1), 0.36, q3 - q1,
                                   facecolor=NULL_COLORS[1], edgecolor="#555555", lw=0.6))
            ax.plot([x[i] - 0.18, x[i] + 0.18], [med, med], color="#555555", lw=0.8)
            ax.plot([x[i], x[i]], [lo, q1], color="#555555", lw=0.8)
            ax.plot([x[i], x[i]], [q3, hi], color="#555555", lw=0.8)
        ax.plot([x[i] - 0.32, x[i] + 0.32], [ch[i], ch[i]], color="black", ls="--", lw=1.0)
        ax.plot(x[i], val[i], marker="D", ms=8, color="#D55E00", mec="black", mew=0.6,
                ls="none")
        ax.text(x[i], 1.03, f"p = {_p_text(pv[i])}", ha="center", va="bottom", fontsize=_FS_SMALL,
                transform=blended_transform_factory(ax.transData, ax.transAxes))
    ax.set_xlim(-0.6, n - 0.4)
    ax.set_ylim(0, 1.0)
    ax.set_xticks(x, labels=labels, parse_math=False, rotation=30 if n > 3 else 0)
    ax.set_xlabel("trial label")
    ax.set_ylabel(_text(ylabel), parse_math=False)
    _legend_outside(fig, [
        Line2D([], [], marker="D", ms=7, color="#D55E00", mec="black", ls="none",
               label="observed"),
        Patch(facecolor=NULL_COLORS[1], edgecolor="#555555", label="shuffled labels"),
        Line2D([], [], color="black", ls="--", label="chance")], ncols=3)
    _title(ax, title)
    return _finish(fig)


def robustness_panel(setting_names, occupancy, mean_dwell_s, metrics, *, state_labels=None,
                     title=None) -> Figure:
    """How occupancy, dwell times and summary numbers change across analysis settings.

    Parameters
    ----------
    setting_names : sequence of str
        One name per setting (x axis), the chosen setting first.
    occupancy : array (n_settings, S)
        Occupancy of the state matched to each chosen state (NaN where none is).
    mean_dwell_s : array (n_settings, S)
        Mean dwell time (s) of the matched state.
    metrics : dict {name: array (n_settings,)}
        Fractions in [0, 1] shown in the third panel (e.g. unassigned fraction, cube
        R^2, agreement with the chosen setting).
    state_labels : sequence of str, optional

    Returns
    -------
    matplotlib.figure.Figure
    """
    names = _names("setting_names", setting_names, "setting")
    m = len(names)
    occ = check_array("occupancy", occupancy, ndim=2, finite=False)
    dw = check_array("mean_dwell_s", mean_dwell_s, ndim=2, finite=False)
    if occ.shape[0] != m or dw.shape != occ.shape:
        raise InputError(f"occupancy, mean_dwell_s: expected shape ({m}, S) each, got "
                         f"{occ.shape} and {dw.shape}")
    s = occ.shape[1]
    slabels = _labels(state_labels, s, "state_labels", lambda i: f"state {i}")
    fig = _new_figure(FULL_WIDTH, 3.3)
    axes = fig.subplots(1, 3)
    x = np.arange(m)
    handles = []
    for k in range(s):
        st = state_style(k)
        for ax, val in ((axes[0], occ[:, k]), (axes[1], dw[:, k])):
            ax.plot(x, val, marker=st["marker"], color=st["color"], ls=st["linestyle"],
                    lw=1.0, ms=5, mec="black", mew=0.4)
        handles.append(Line2D([], [], marker=st["marker"], color=st["color"],
                              ls=st["linestyle"], mec="black", mew=0.4, label=slabels[k]))
    axes[0].set_ylabel("occupancy (fraction of time)")
    axes[0].set_ylim(0, min(1.0, np.nanmax(occ, initial=0.0) * 1.25) or 1.0)
    _title(axes[0], "occupancy")
    axes[1].set_ylabel("mean dwell (s)")
    pos = dw[np.isfinite(dw) & (dw > 0)]
    if pos.size and pos.max() / pos.min() > 5:
        from matplotlib.ticker import FuncFormatter

        axes[1].set_yscale("log")
        axes[1].yaxis.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))
        axes[1].yaxis.set_minor_formatter(FuncFormatter(lambda v, _: ""))
    _title(axes[1], "dwell time")
    markers = ("o", "s", "^", "D", "v")
    for j, (name, val) in enumerate(metrics.items()):
        v = _vector(f"metrics[{name!r}]", val, m)
        axes[2].plot(x, v, marker=markers[j % len(markers)], ls=":", lw=0.8, ms=5,
                     color=NULL_COLORS[2] if j % 2 else DATA_COLOR, label=_text(name))
    axes[2].set_ylim(-0.02, 1.05)
    axes[2].set_ylabel("fraction")
    axes[2].legend(fontsize=_FS_SMALL, frameon=False, loc="center left")
    _title(axes[2], "summary")
    for ax in axes:
        ax.set_xticks(x, labels=names, parse_math=False, rotation=60, ha="right")
        ax.set_xlabel("setting")
        ax.axvspan(-0.4, 0.4, color="#EEEEEE", zorder=0)
    _legend_outside(fig, handles)
    _suptitle(fig, title)
    return _finish(fig)


def drift_panel(rho, drifting, block_occupancy, *, p_value: float, state_labels=None,
                note: str = "", title=None) -> Figure:
    """Drift across the session: unit rate trends and state occupancy per block.

    Parameters
    ----------
    rho : array (N,)
        Spearman correlation of each unit's rate with the trial index.
    drifting : array of bool (N,)
        Units called drifting (after the false-discovery-rate correction).
    block_occupancy : array (n_blocks, S)
        Occupancy of each state in each block of consecutive trials.
    p_value : float
        p-value of the occupancy-homogeneity test, written on the right panel.
    state_labels : sequence of str, optional
    note : str
        A short line added to the right panel's title (e.g. what the test is
        stratified by).

    Returns
    -------
    matplotlib.figure.Figure
    """
    r = _vector("rho", rho)
    d = _vector("drifting", drifting, r.size).astype(bool)
    occ = check_array("block_occupancy", block_occupancy, ndim=2, finite=False)
    nb, s = occ.shape
    slabels = _labels(state_labels, s, "state_labels", lambda i: f"state {i}")
    fig = _new_figure(FULL_WIDTH, 3.0)
    ax0, ax1 = fig.subplots(1, 2)
    ok = np.isfinite(r)
    edges = np.linspace(-1, 1, 21)
    ax0.hist([r[ok & ~d], r[ok & d]], bins=edges, stacked=True,
             color=[NULL_COLORS[0], "#D55E00"], edgecolor="#333333", linewidth=0.4,
             label=["no significant trend", "drifting (FDR-corrected)"])
    ax0.set_xlabel("rate vs trial index (Spearman rho)")
    ax0.set_ylabel("number of units")
    from matplotlib.ticker import MaxNLocator

    ax0.yaxis.set_major_locator(MaxNLocator(integer=True))
    ax0.set_ylim(0, ax0.get_ylim()[1] * 1.35)
    ax0.legend(fontsize=_FS_SMALL, frameon=False, loc="upper left")
    _title(ax0, f"units: {int(d.sum())} of {r.size} drift")
    x = np.arange(nb)
    bottom = np.zeros(nb)
    for k in range(s):
        st = state_style(k)
        v = np.nan_to_num(occ[:, k])
        ax1.bar(x, v, bottom=bottom, color=st["color"], hatch=st["hatch"] or None,
                edgecolor="#333333", linewidth=0.4, label=slabels[k], width=0.7)
        bottom += v
    ax1.set_xticks(x, labels=[f"block {i + 1}" for i in range(nb)])
    ax1.set_xlabel("consecutive trials, session order")
    ax1.set_ylabel("occupancy (fraction of time)")
    ax1.set_ylim(0, 1.0)
    _title(ax1, f"states by block (p = {_p_text(p_value)})" + (f"\n{_text(note)}" if note else ""))
    ax1.legend(fontsize=_FS_SMALL, frameon=False, loc="center left", bbox_to_anchor=(1.0, 0.5))
    _suptitle(fig, title)
    return _finish(fig)

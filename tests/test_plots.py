"""Figures: each runs on small synthetic inputs, labels its axes, saves PNG and SVG."""

import os
import xml.etree.ElementTree as ET

import matplotlib.image as mpimg
import matplotlib.text
import numpy as np
import pytest
from matplotlib.colors import to_rgb

from attractorfit import plots as P
from attractorfit.errors import InputError

SEGS = [(0.0, 0.7, 0), (0.7, 0.9, -1), (0.9, 2.1, 1), (2.1, 3.0, 2)]
LABELS = ["LL", "HL", "LH", "HH"]


def _trial(rng, n=8, dur=3.0):
    return [np.sort(rng.uniform(0, dur, rng.poisson(15))) for _ in range(n)]


def _km(rng, scale):
    d = np.sort(rng.exponential(scale, 30))
    return d[:25], 1 - np.arange(1, 26) / 30, d[25:]


def _builders():
    rng = np.random.default_rng(0)
    v2 = np.array([[-1, -1], [1, -1], [-1, 1], [1, 1]], float)
    v3 = np.array([[a, b, c] for a in (-1, 1) for b in (-1, 1) for c in (-1, 1)], float)
    trajs = [np.cumsum(rng.normal(0, 0.1, (40, 3)), 0) for _ in range(3)]
    occ = np.array([0.3, 0.25, 0.25, 0.2])
    ci = np.c_[occ - 0.05, occ + 0.05]
    T = np.full((4, 4), 0.05) + np.eye(4) * 0.8
    t = np.linspace(0, 3, 60)
    return {
        "raster": lambda: P.raster_with_states(_trial(rng), duration=3.0, segments=SEGS,
                                               state_labels=LABELS, title="trial 1",
                                               unit_labels=[f"u{i}" for i in range(8)]),
        "raster_compare": lambda: P.raster_compare(
            [_trial(rng), _trial(rng)], [_trial(rng), _trial(rng)], duration=3.0,
            segments_data=[SEGS, SEGS], segments_surrogate=[SEGS[::-1], None]),
        "latent2": lambda: P.latent_trajectories(trajs, trajs[::-1], vertices=v2),
        "latent3": lambda: P.latent_trajectories(trajs, vertices=v3, n_dims=3),
        "latent1": lambda: P.latent_trajectories([x[:, :1] for x in trajs], bin_size=0.02,
                                                 vertices=v2[:2, :1]),
        "occupancy": lambda: P.occupancy_bars(occ, occ[::-1], ci, {"null": (occ * 0 + .25, None)},
                                              ci_data=ci.T, state_labels=LABELS),
        "dwell": lambda: P.dwell_survival({0: _km(rng, 0.5), 1: _km(rng, 1.0)},
                                          {0: _km(rng, 0.4), 2: _km(rng, 0.3)},
                                          state_labels=LABELS),
        "transitions": lambda: P.transition_matrices(T, T.T, state_labels=LABELS),
        "transitions_off": lambda: P.transition_matrices(T, off_diagonal=True),
        "rates": lambda: P.rate_scatter(rng.normal(0, 5, 30), rng.normal(0, 5, 30), r2=0.8,
                                        r2_ref95=0.7, groups=np.arange(30) % 3),
        "rates_plain": lambda: P.rate_scatter([1, 2, 3], [1.1, 2.2, 2.9], r2=float("nan")),
        "distribution": lambda: P.distribution_compare(
            rng.gamma(4, 0.25, 30), rng.gamma(4, 0.25, 30), xlabel="ISI CV (dimensionless)",
            note="two-sample KS p = 0.4"),
        "distribution_hist": lambda: P.distribution_compare(
            rng.normal(size=50), None, xlabel="pairwise count correlation (Pearson r)",
            kind="hist"),
        "panels": lambda: P.distribution_panels({
            "ISI CV (dimensionless)": (rng.gamma(4, .25, 30), rng.gamma(4, .25, 30)),
            "Fano factor (dimensionless)": (rng.gamma(4, .3, 30), [np.nan, 1.0, 1.2])}),
        "conditions": lambda: P.state_by_condition(
            {"A": [.6, .2, .1, .1], "B": [.1, .6, .2, .0]}, matching={"A": 0, "B": 1},
            state_labels=LABELS),
        "conditions_grouped": lambda: P.state_by_condition(
            {"remembered item": {"A": [.6, .2, .1, .1], "B": [.1, .6, .2, .0]},
             "outcome": {"correct": [.4, .4, .1, .1], "error": [.3, .3, .2, .1]}},
            matching={"outcome": {"correct": .55, "error": .3}}),
        "overlap": lambda: P.pattern_overlap_time(
            t, np.stack([np.sin(t + k) for k in range(3)], 1), segments=SEGS),
        "null": lambda: P.null_distribution(3.0, rng.normal(size=100), p_value=1 / 101,
                                            label="log-likelihood ratio (nats per bin)",
                                            verdict="discrete", null_name="continuous"),
        "null_constant": lambda: P.null_distribution(0.5, np.zeros(20), p_value=1.0,
                                                     label="statistic (a.u.)"),
        "diagnostics": lambda: P.model_diagnostics(
            [.4, .3, -.1, .2], [1e-8, 1e-3, 2e-3, 1e-4], [.3, .5, .9, 1.2], capacity=10.0,
            load=4, used=[1, 1, 1, 0]),
        "diagnostics_nocap": lambda: P.model_diagnostics([.4, .3], [0.1, 0.2, 0.3],
                                                         [.3, .5], capacity=None, load=2),
    }


BUILDERS = _builders()


def _axes_with_data(fig):
    out = []
    for ax in fig.axes:
        if not ax.get_visible():
            continue
        if ax.lines or ax.collections or ax.patches or ax.images:
            out.append(ax)
    return out


@pytest.mark.parametrize("name", sorted(BUILDERS))
def test_figure_labels_fonts_and_files(name, tmp_path):
    fig = BUILDERS[name]()
    axes = _axes_with_data(fig)
    assert axes, "figure has no axes with data"
    for ax in axes:
        if ax.get_label() == "<colorbar>":
            assert ax.get_ylabel() or ax.get_xlabel()
            continue
        assert ax.get_xlabel().strip(), f"{name}: an axis has no x label"
    paths = P.save_figure(fig, tmp_path / "figs", name, dpi=60)
    for t in fig.findobj(matplotlib.text.Text):  # after drawing: ticks exist now
        if t.get_visible() and t.get_text().strip():
            assert t.get_fontsize() >= 8.0, (name, t.get_text(), t.get_fontsize())
    assert [os.path.basename(p) for p in paths] == [f"{name}.png", f"{name}.svg"]
    img = mpimg.imread(paths[0])
    w, h = fig.get_size_inches()
    # PNG size is figure size x dpi (to within a pixel of rounding)
    assert img.ndim == 3 and abs(img.shape[1] - w * 60) <= 1 and abs(img.shape[0] - h * 60) <= 1
    assert img[..., :3].std() > 0.01  # not blank
    root = ET.parse(paths[1]).getroot()
    assert root.tag.endswith("svg")
    assert not [f for f in os.listdir(tmp_path / "figs") if f.endswith(".part")]


def test_save_is_deterministic_and_can_write_pdf(tmp_path):
    # same inputs, fresh figures: byte-identical files (no dates, fixed SVG ids)
    a, b = (P.save_figure(BUILDERS["transitions"](), tmp_path / d, "tm",
                          formats=("png", "svg", "pdf"), dpi=50) for d in "ab")
    for pa, pb in zip(a, b):
        with open(pa, "rb") as fa, open(pb, "rb") as fb:
            assert fa.read() == fb.read(), pa
    with open(a[2], "rb") as fh:
        assert fh.read(5) == b"%PDF-"


def test_hostile_strings_are_drawn_literally(tmp_path):
    # '$' would start mathtext and an unbalanced one would fail at draw time
    bad = "$x^<script>"
    fig = P.raster_with_states([[0.1, 0.5], [0.2]], duration=1.0, segments=[(0, 1, 0)],
                               state_labels=[bad], unit_labels=[bad, "u_2"], title=bad)
    P.save_figure(fig, tmp_path, "raster", dpi=40)
    texts = [t.get_text() for t in fig.findobj(matplotlib.text.Text)]
    assert bad in texts
    fig = P.transition_matrices(np.eye(2), state_labels=[bad, "$"])
    P.save_figure(fig, tmp_path, "tm", formats=("png",), dpi=40)


def test_okabe_ito_palette_and_cycling():
    # Okabe & Ito (2008) colour-universal-design set, hex values as published (from memory)
    assert P.OKABE_ITO == {"black": "#000000", "orange": "#E69F00", "sky_blue": "#56B4E9",
                           "bluish_green": "#009E73", "yellow": "#F0E442",
                           "blue": "#0072B2", "vermillion": "#D55E00",
                           "reddish_purple": "#CC79A7"}
    assert set(P.STATE_COLORS) <= set(P.OKABE_ITO.values())
    styles = [P.state_style(s) for s in range(56)]
    # colour x hatch cycle with co-prime periods: 56 distinct styles
    assert len({(s["color"], s["hatch"]) for s in styles}) == 56
    # greyscale print: any two of the first 8 states differ in hatch or in grey level
    lum = [np.dot(to_rgb(s["color"]), [0.299, 0.587, 0.114]) for s in styles[:8]]
    for i in range(8):
        for j in range(i):
            assert styles[i]["hatch"] != styles[j]["hatch"] or abs(lum[i] - lum[j]) > 0.1
    assert P.state_style(-1)["color"] == P.UNASSIGNED_COLOR
    assert P.state_style(3, colors=["#111111"])["color"] == "#111111"


def test_ecdf_matches_scipy():
    # Reference library: scipy.stats.ecdf (empirical CDF of uncensored data).
    from scipy import stats
    x = np.random.default_rng(1).gamma(3, 1, 25)
    fig = P.distribution_compare(x, None, xlabel="ISI CV (dimensionless)")
    line = fig.axes[0].lines[0]
    xs, ys = line.get_xdata()[1:], line.get_ydata()[1:]
    ref = stats.ecdf(x).cdf
    np.testing.assert_allclose(ys, ref.evaluate(xs), atol=1e-12)


def test_censor_marks_sit_on_the_kaplan_meier_curve():
    # Reference library: scipy.stats.ecdf on CensoredData gives the Kaplan-Meier estimate;
    # the censoring ticks must sit at S(t) of that curve at each censored duration.
    from scipy import stats
    rng = np.random.default_rng(2)
    done = rng.exponential(1.0, 40)
    cens = rng.exponential(1.0, 15)
    sf = stats.ecdf(stats.CensoredData(uncensored=done, right=cens)).sf
    fig = P.dwell_survival({0: (sf.quantiles, sf.probabilities, cens)})
    ax = fig.axes[0]
    marks = [ln for ln in ax.lines if ln.get_marker() == "|"][0]
    np.testing.assert_allclose(marks.get_xdata(), cens)
    np.testing.assert_allclose(marks.get_ydata(), sf.evaluate(cens), atol=1e-12)
    assert ax.get_xscale() == "log"


def test_null_histogram_counts_every_finite_replicate():
    null = np.r_[np.random.default_rng(3).normal(size=99), np.nan]
    fig = P.null_distribution(5.0, null, p_value=0.01, label="statistic (a.u.)")
    ax = fig.axes[0]
    assert sum(p.get_height() for p in ax.patches if p.get_height() > 0) == 99
    lo, hi = ax.get_xlim()
    assert lo < null[np.isfinite(null)].min() and hi > 5.0


def test_transition_annotations_and_shared_scale():
    a = np.array([[0.9, 0.1], [0.2, 0.8]])
    b = np.array([[0.5, 0.5], [0.4, 0.6]])
    fig = P.transition_matrices(a, b)
    ims = [ax.images[0] for ax in fig.axes if ax.images]
    assert len(ims) == 2 and ims[0].get_clim() == ims[1].get_clim() == (0.0, 0.9)
    texts = sorted(t.get_text() for t in fig.axes[0].texts)
    assert texts == ["0.10", "0.20", "0.80", "0.90"]


@pytest.mark.parametrize("call, match", [
    (lambda: P.state_style(0, colors=[]), "state_colors"),
    (lambda: P.occupancy_bars([.5, .5], state_labels=["a"]), "state_labels: expected 2"),
    (lambda: P.occupancy_bars([.5, .5], [.5]), "occ_model: expected 2 values"),
    (lambda: P.occupancy_bars([.5, .5], [.5, .5], [[0, 1, 2]]), r"ci_model: expected shape"),
    (lambda: P.occupancy_bars([]), "occ_data: expected at least one state"),
    (lambda: P.occupancy_bars([.5, .5], nulls={"n": 3}), r"nulls\['n'\]"),
    (lambda: P.save_figure(P.occupancy_bars([1.0]), "/tmp", "a/b"), "figure name"),
    (lambda: P.save_figure(P.occupancy_bars([1.0]), "/tmp", "x", formats=("gif",)), "formats"),
    (lambda: P.raster_with_states([[0.1]], duration=1, segments=[(0, 1)]), r"segments\[0\]"),
    (lambda: P.raster_with_states([[0.1]], duration=1, segments=[(1, 0.5, 0)]),
     r"start < stop"),
    (lambda: P.raster_with_states(np.zeros((2, 3)), duration=1), "one array of spike times"),
    (lambda: P.raster_with_states([[0.1, np.nan]], duration=1), "unit 0 has a spike time"),
    (lambda: P.raster_with_states([[0.1]], duration=0), "duration"),
    (lambda: P.raster_compare([[[0.1]]], [], duration=1), "trials_surrogate"),
    (lambda: P.raster_compare([[[0.1]]], [[[0.2]]], duration=1, segments_data=[]),
     "one segment list per"),
    (lambda: P.latent_trajectories([np.zeros((2, 2, 2))]), r"trajs_data\[0\]"),
    (lambda: P.latent_trajectories([]), "at least one trajectory"),
    (lambda: P.latent_trajectories(np.zeros((5, 3)), vertices=np.zeros((2, 1))),
     "vertices: expected at least 2"),
    (lambda: P.latent_trajectories(np.zeros((5, 3)), n_dims=4), "n_dims"),
    (lambda: P.dwell_survival({0: (1, 2)}), r"data\[0\]: expected"),
    (lambda: P.dwell_survival({0: ([0.0, 1.0], [0.5, 0.2], [])}), "durations > 0"),
    (lambda: P.dwell_survival({0: ([2.0, 1.0], [0.5, 0.2], [])}), "increasing"),
    (lambda: P.dwell_survival({}), "data: expected a dict"),
    (lambda: P.dwell_survival({0: ([1.0], [0.5], [])}, model=[1]), "model: expected a dict"),
    (lambda: P.transition_matrices(np.zeros((2, 3))), "T_data: expected a square"),
    (lambda: P.transition_matrices(np.eye(2), np.eye(3)), "T_model: expected shape"),
    (lambda: P.rate_scatter([], [], r2=0.5), "r_data: expected at least one"),
    (lambda: P.distribution_compare([1.0], [1.0], xlabel="x", kind="box"), "kind"),
    (lambda: P.distribution_panels([]), "panels: expected a dict"),
    (lambda: P.distribution_panels({"x": [1.0]}), r"panels\['x'\]"),
    (lambda: P.distribution_compare([np.nan], [1.0], xlabel="x"), "no finite value"),
    (lambda: P.state_by_condition({}), "table: expected a dict"),
    (lambda: P.state_by_condition({"A": [1.0]}, matching=[0]), "matching: expected a dict"),
    (lambda: P.state_by_condition({"A": [1.0]}, matching={"A": 3}), r"matching\['A'\]"),
    (lambda: P.pattern_overlap_time([0, 1], np.zeros((3, 2))), "overlaps: expected shape"),
    (lambda: P.null_distribution(1.0, [np.nan], p_value=1.0, label="x"), "null_values"),
    (lambda: P.model_diagnostics([], [], [], capacity=1, load=1), "margins"),
])
def test_bad_input_raises(call, match):
    with pytest.raises(InputError, match=match):
        call()

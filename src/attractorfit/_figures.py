"""Figures and report of a run: thin adapters from stage results to plots/report.

Every figure function in :mod:`attractorfit.plots` takes plain arrays; this module
pulls those arrays out of :class:`~attractorfit.pipeline.RunResult` and assembles
``figures/``, ``tables/`` and ``report.html``.
"""

from __future__ import annotations

import os

import numpy as np

from attractorfit import plots
from attractorfit.report import FigureBlock, Section, TableBlock, Verdict, build_report

__all__ = ["write_figures_and_report", "methods_text"]


def _segments_of_trial(decoding, pos):
    seg = decoding.segments
    m = (seg.trial_pos == pos) & (seg.state >= 0)
    return [(float(a), float(b), int(s)) for a, b, s in
            zip(seg.start[m], seg.stop[m], seg.state[m])]


def _survival_dict(decoding):
    out = {}
    seg = decoding.segments
    for s, curve in enumerate(decoding.survival):
        if curve.n == 0:
            continue
        m = (seg.state == s) & seg.censored
        cens = (seg.stop[m] - seg.start[m]).astype(float)
        out[s] = (np.asarray(curve.times, float), np.asarray(curve.survival, float), cens)
    return out


def _state_means_in_latent(trajs, bin_states, n_states):
    k = trajs[0].shape[1] if trajs else 0
    pos = np.full((n_states, k), np.nan)
    allz = np.concatenate(trajs) if trajs else np.zeros((0, k))
    alls = np.concatenate(bin_states) if bin_states else np.zeros(0, int)
    for s in range(n_states):
        if np.any(alls == s):
            pos[s] = allz[alls == s].mean(axis=0)
    return pos


def _trial_spikes(recording, binned, pos):
    """Spike times per unit (kept units) of analysed trial ``pos``, from its window start."""
    t0 = float(binned.window_start[pos])
    t1 = t0 + float(binned.n_valid[pos]) * binned.bin_size
    out = []
    for i in binned.unit_index:
        t = recording.spike_times[i]
        a, b = np.searchsorted(t, [t0, t1])
        out.append(t[a:b] - t0)
    return out


def methods_text(result) -> str:
    """A methods paragraph generated from the resolved configuration and the results."""
    cfg, b, sf = result.config, result.binned, result.state_fit
    a, st = cfg["analysis"], cfg["states"]
    win = (f"from {a['window'][0]:g} s to {a['window'][1]:g} s relative to "
           f"'{a['align'] or 'trial start'}'") if a["window"] else "over whole trials"
    parts = [
        f"Spike counts of {b.n_units} units (mean rate at least {a['min_rate_hz']:g} Hz) were "
        f"taken in {b.bin_size * 1e3:g} ms bins {win} in {b.n_trials} trials.",
    ]
    if sf is not None:
        how = ("fixed by the user" if sf.choice is None else
               f"chosen by the '{sf.choice.rule}' rule among {min(sf.choice.candidates)} to "
               f"{max(sf.choice.candidates)} states")
        parts.append(
            f"A Poisson hidden Markov model with {sf.n_states} states ({how}) was fitted by "
            "expectation-maximisation with several restarts, trials treated as independent "
            f"sequences. A bin was assigned to a state when its posterior exceeded "
            f"{sf.posterior_threshold:g}, and runs shorter than {sf.min_segment_s * 1e3:g} ms "
            "were left unassigned. Dwell times cut by a trial edge were treated as censored "
            "(Kaplan-Meier; the mean dwell is the restricted mean). Each state received a "
            f"vertex code on a {sf.n_dims}-dimensional hypercube chosen so that additive "
            f"binary features explain the state log-rates (R^2 = {sf.cube_r2:.3f}).")
    d = result.discreteness
    if d is not None:
        parts.append(
            f"Discreteness was tested by a parametric bootstrap ({d.n_boot} replicates) against "
            f"a fitted continuous-latent null: {d.description}. Every replicate reran the "
            "whole statistic, including the choice of the number of states; "
            "p = (1 + b)/(B + 1).")
    nf = getattr(result, "network_fit", None)
    if nf is not None and hasattr(nf, "methods_text"):
        parts.append(nf.methods_text())
    cmp_ = getattr(result, "comparison", None)
    if cmp_ is not None and hasattr(cmp_, "methods_text"):
        parts.append(cmp_.methods_text())
    return " ".join(parts)


CAUTIONS = [
    "These results are statistical evidence about a model of the recording, not proof "
    "about how the brain computes: a good fit shows the model is sufficient, not that it "
    "is the mechanism.",
    "The state analysis depends on the bin size, on how the number of states was chosen "
    "and on the posterior threshold; the assumptions are listed beside each verdict.",
    "The discreteness test is only as strong as its null: it rules out the continuous-latent "
    "model named beside the verdict, not every continuous model.",
    "The network's connectivity W = E D is low-rank and ignores Dale's law (a neuron's "
    "outgoing weights may have both signs).",
    "A multi-unit is not a single cell: inter-spike-interval statistics of multi-units are "
    "compared with caution.",
]


def write_figures_and_report(folder, result, *, title="attractorfit report") -> dict:
    """Write figures/, tables/ and report.html for ``result``; return their paths."""
    sf, b, rec = result.state_fit, result.binned, result.recording
    fig_dir = folder.file("figures", "x")[:-2]
    sections, figures = [], {}
    labels = [f"{s} {t}" for s, t in enumerate(sf.vertex_text)]
    dec = sf.decoding

    rcfg = result.config.get("report", {})
    formats = tuple(rcfg.get("figure_formats", ("png", "svg")))
    if "png" not in formats:
        formats = ("png",) + formats  # the report embeds the PNG
    dpi = rcfg.get("dpi", 200)

    def add(sec_blocks, fig, name, caption):
        figures[name] = plots.save_figure(fig, fig_dir, name, formats=formats, dpi=dpi)
        sec_blocks.append(FigureBlock(figures[name][0], caption=caption, name=name))

    # --- states
    blocks = []
    n_show = min(4, b.n_trials)
    show = np.linspace(0, b.n_trials - 1, n_show).round().astype(int)
    surrogate = getattr(result, "surrogate_example", None)
    for j, pos in enumerate(show[:2]):
        spikes = _trial_spikes(rec, b, pos)
        dur = float(b.n_valid[pos]) * b.bin_size
        if surrogate is not None:
            s_rec, s_bin, s_dec = surrogate
            spos = min(pos, s_bin.n_trials - 1)
            fig = plots.raster_compare(
                [spikes], [_trial_spikes(s_rec, s_bin, spos)], duration=dur,
                segments_data=[_segments_of_trial(dec, pos)],
                segments_surrogate=[_segments_of_trial(s_dec, spos)], state_labels=labels)
        else:
            fig = plots.raster_with_states(spikes, duration=dur,
                                           segments=_segments_of_trial(dec, pos),
                                           state_labels=labels,
                                           title=f"trial {int(b.trial_index[pos])}")
        add(blocks, fig, f"raster_trial{int(b.trial_index[pos])}",
            "Spike raster of an example trial with the decoded state as a coloured band "
            "(unassigned time left blank).")
    lat = sf.latent
    if lat.n_dims >= 1:
        verts = _state_means_in_latent(lat.trajectories, dec.bin_states, sf.n_states)
        fig = plots.latent_trajectories(lat.trajectories, None, vertices=verts,
                                        vertex_labels=sf.vertex_text,
                                        n_dims=min(2, lat.n_dims), bin_size=b.bin_size)
        add(blocks, fig, "latent_trajectories",
            "Latent trajectories (factor analysis of square-root counts) with each state's "
            "mean position marked by its vertex code.")
    cmp_ = getattr(result, "comparison", None)
    if cmp_ is None:
        fig = plots.occupancy_bars(dec.occupancy, state_labels=labels)
        add(blocks, fig, "occupancy", "Fraction of assigned time spent in each state.")
        fig = plots.dwell_survival(_survival_dict(dec), state_labels=labels)
        add(blocks, fig, "dwell_survival",
            "Dwell-time survival per state (Kaplan-Meier; ticks mark censored dwells cut by "
            "a trial edge).")
        fig = plots.transition_matrices(_finite(dec.transition_probs), state_labels=labels,
                                        off_diagonal=True,
                                        quantity="probability of the next state")
        add(blocks, fig, "transitions", "Which state follows which (rows: from, columns: to).")
    cond = categorical_condition(dec)
    if cond is not None:
        tab = dec.conditions[cond]
        table = {str(lv): np.asarray(fr) for lv, fr in zip(tab.levels, tab.state_fraction)}
        fig = plots.state_by_condition(table, matching={str(lv): int(m) for lv, m in
                                                        zip(tab.levels, tab.mapping)},
                                       state_labels=labels, xlabel=cond)
        add(blocks, fig, "state_by_condition",
            f"Fraction of analysed time in each state by '{cond}'; the outlined segment is the "
            "state matched to that level.")
    sections.append(Section("States", blocks))

    verdicts = []
    d = result.discreteness
    if d is not None:
        blocks = []
        fig = plots.null_distribution(d.statistic, d.null_statistics, p_value=d.p_value,
                                      label="mixture log-likelihood gain per bin",
                                      verdict=d.verdict, null_name="continuous-latent null")
        add(blocks, fig, "discreteness_null", d.text())
        sections.append(Section("Discreteness test", blocks))
        verdicts.append(Verdict("Discrete states", d.verdict, d.p_value, d.text(),
                                assumptions=_assumptions(result)))
    nf = getattr(result, "network_fit", None)
    if cmp_ is not None and nf is not None:
        sec, v, t = _model_sections(result, labels, add)
        sections.extend(sec)
        verdicts.extend(v)

    tables = {"states": (["state", "vertex", "occupancy", "mean_dwell_s"],
                         [[s, t, float(o), float(m)] for s, (t, o, m) in
                          enumerate(zip(sf.vertex_text, dec.occupancy, dec.mean_dwell_s))])}
    if cmp_ is not None:
        tables.update(_comparison_tables(cmp_))
    if sf.choice is not None:
        ch = sf.choice
        tables["state_count_choice"] = (["n_states", "loglik", "bic", "heldout_per_bin"],
                                        [[int(c), float(l), float(bb), float(h)] for c, l, bb, h in
                                         zip(ch.candidates, ch.loglik, ch.bic,
                                             ch.heldout_per_bin)])
    summary = {"units": b.n_units, "trials": b.n_trials, "bin size (ms)": b.bin_size * 1e3,
               "states": sf.n_states, "cube R²": round(float(sf.cube_r2), 3),
               "unassigned": round(float(dec.unassigned_fraction), 3)}
    if d is not None:
        summary["discreteness p"] = d.p_value
    if cmp_ is not None and hasattr(cmp_, "summary_block"):
        cb = cmp_.summary_block()
        for k in ("occupancy_tvd", "rate_r2"):
            if k in cb:
                summary[k.replace("_", " ")] = cb[k]
    from attractorfit.pipeline import input_record, versions

    files = build_report(folder.file("report.html"), title=title,
                         subtitle=rec.source, summary=summary, sections=sections,
                         methods=methods_text(result), cautions=CAUTIONS,
                         versions=versions(), input_hash=input_record(rec)["sha256"] or "",
                         verdicts=verdicts, tables=tables,
                         tables_dir=os.path.join(folder.path, "tables"))
    return {"figures": figures, "report": files}


def categorical_condition(decoding):
    """The first condition table (labels were filtered to categorical ones upstream)."""
    return next(iter(decoding.conditions), None)


def _assumptions(result) -> dict:
    sf, b = result.state_fit, result.binned
    how = "given" if sf.choice is None else f"{sf.choice.rule} over {min(sf.choice.candidates)}-" \
                                             f"{max(sf.choice.candidates)}"
    out = {"bin size": f"{b.bin_size * 1e3:g} ms", "number of states": f"{sf.n_states} ({how})",
           "posterior threshold": f"{sf.posterior_threshold:g}"}
    d = result.discreteness
    if d is not None:
        out["null"] = d.description
        out["bootstrap replicates"] = str(d.n_boot)
    return out


def _model_sections(result, labels, add):
    """Sections for the fitted network and the model-vs-data comparison."""
    nf, c = result.network_fit, result.comparison
    where = "held-out trials" if c.held_out else "all trials (no held-out set)"
    sections, verdicts = [], []
    blocks = [f"The data's state model decodes the data and {c.n_surrogates} surrogate "
              f"recordings of the fitted network on {c.n_trials} {where}; every statistic is "
              "judged against the spread of the same statistic between independent model "
              "surrogates of the data's size."]
    nulls = {n.replace("_", " "): (r.occupancy, r.occupancy_ci) for n, r in c.nulls.items()}
    fig = plots.occupancy_bars(c.occupancy_data, c.occupancy_model, c.occupancy_model_ci,
                               nulls or None, ci_data=c.occupancy_data_ci, state_labels=labels)
    add(blocks, fig, "occupancy", "Occupancy per state: data (95% trial-bootstrap interval), "
        "fitted-network surrogates and null surrogates (2.5-97.5 percentiles over single "
        "surrogates), all decoded with the data's state model.")
    sd, sm = c.survival_for_plot()
    fig = plots.dwell_survival(sd, sm, state_labels=labels)
    add(blocks, fig, "dwell_survival",
        "Dwell-time survival per state, data vs surrogates (Kaplan-Meier; ticks mark dwells "
        "cut by a trial edge, treated as censored).")
    fig = plots.transition_matrices(_finite(c.transitions_data), _finite(c.transitions_model),
                                    state_labels=labels,
                                    off_diagonal=True, quantity="probability of the next state")
    add(blocks, fig, "transitions", "Which state follows which, data and surrogates "
        "(rows: from, columns: to).")
    d, m, st = c.centred_rates()
    r2 = c.metrics.get("rate_r2")
    fig = plots.rate_scatter(d, m, r2=float(r2.value) if r2 else float("nan"),
                             r2_ref95=float(r2.ref) if r2 else None, groups=st,
                             group_labels=labels, xlabel="data rate - unit mean (Hz)",
                             ylabel="surrogate rate - unit mean (Hz)")
    add(blocks, fig, "rate_scatter", "State modulation of every unit's rate (per-unit x "
        "per-state rates, centred per unit), data vs surrogates, with the identity line.")
    panels = {"ISI CV": (c.isi_cv_data, None if c.isi_cv_model is None else
                         np.ravel(c.isi_cv_model)),
              "Fano factor (100 ms counts)": (c.fano_data, np.ravel(c.fano_model)),
              "pairwise count correlation": (c.correlation_data, np.ravel(c.correlation_model))}
    panels = {k: v for k, v in panels.items() if v[0] is not None and np.size(v[0])}
    fig = plots.distribution_panels(panels, notes={"ISI CV": "multi-units: compare with "
                                                             "caution"})
    add(blocks, fig, "single_unit_statistics", "Single-unit and pairwise statistics, data vs "
        "pooled surrogates (empirical cumulative distributions).")
    for name, cd in c.conditions.items():
        lv = [str(x) for x in cd["levels"]]
        table = {"data": {a: np.asarray(f) for a, f in zip(lv, cd["fraction_data"])},
                 "surrogate": {a: np.asarray(f) for a, f in zip(lv, cd["fraction_model"])}}
        match = {a: int(s) for a, s in zip(lv, cd["matching_state"])}
        fig = plots.state_by_condition(table, matching={"data": match, "surrogate": match},
                                       state_labels=labels, xlabel=name)
        add(blocks, fig, f"state_by_{_safe(name)}", f"Fraction of time in each state by "
            f"'{name}', data and surrogates; outlined: the level's cue-matching state.")
    if result.surrogate_example is not None:
        s_rec, s_bin, s_dec = result.surrogate_example
        x = s_bin.sequences(dtype=float)[0]
        from scipy.ndimage import gaussian_filter1d

        rate = gaussian_filter1d(x, 0.1 / s_bin.bin_size, axis=0) / s_bin.bin_size
        pat = nf.target_rates_hz
        ov = _cosine(rate, pat)
        times = np.arange(len(x)) * s_bin.bin_size
        fig = plots.pattern_overlap_time(times, ov, pattern_labels=labels,
                                         segments=_segments_of_trial(s_dec, 0))
        add(blocks, fig, "pattern_overlap", "Overlap (cosine similarity, rates smoothed over "
            "100 ms) of one surrogate trial's population rate with each state's rate pattern.")
    sections.append(Section("Model vs data", blocks))

    blocks = []
    block = nf.summary_block()
    for note in block.get("notes", []):
        blocks.append(note)
    used = np.ones(nf.n_states, bool)
    fig = plots.model_diagnostics(np.asarray(nf.margins, float),
                                  np.abs(nf.decoder_residual * np.ones(nf.n_states)),
                                  np.asarray(nf.readout_noise_ratio, float),
                                  capacity=None, load=float(nf.n_states),
                                  vertex_labels=nf.vertex_text, used=used)
    add(blocks, fig, "model_diagnostics", "Fitted network: stability margin at each state's "
        "vertex (rate picture; > 0 stable), decoder constraint residual, readout shot-noise "
        "s.d. over the vertex spacing, and the number of patterns held.")
    sections.append(Section("Fitted network", blocks))

    ok = [m for m in c.metrics.values() if m.consistent is not None]
    n_ok = sum(bool(m.consistent) for m in ok)
    verdicts.append(Verdict(
        "Network reproduces the data", "consistent" if ok and n_ok == len(ok) else
        "not_consistent", None,
        f"{n_ok} of {len(ok)} statistics of the held-out data fall within the spread between "
        "independent model surrogates. " + " ".join(c.text[:3]),
        assumptions={"compared trials": where, "surrogates": str(c.n_surrogates),
                     "decoder rule": nf.rule, "tau_s": f"{nf.tau_s * 1e3:.0f} ms",
                     "membrane noise": f"{nf.noise:.3g}",
                     "states decoded with": "the data's fitted Poisson HMM"}))
    for name, r in c.nulls.items():
        verdicts.append(Verdict(f"Network vs {name} null", r.verdict, r.p_network_better,
                                r.text, assumptions={"null": r.description,
                                                     "null surrogates": str(r.n_surrogates)}))
    return sections, verdicts, None


def _finite(m):
    """Transition rows of states never left are undefined (NaN): drawn as zeros."""
    return np.nan_to_num(np.asarray(m, dtype=float), nan=0.0)


def _cosine(rate, patterns):
    a = rate / np.maximum(np.linalg.norm(rate, axis=1, keepdims=True), 1e-12)
    b = patterns / np.maximum(np.linalg.norm(patterns, axis=1, keepdims=True), 1e-12)
    return a @ b.T


def _safe(name: str) -> str:
    return "".join(ch if ch.isalnum() else "_" for ch in str(name))[:40]


def _comparison_tables(c) -> dict:
    rows = []
    for kind, metrics in (("decoded", c.metrics), ("refitted", c.refit_metrics)):
        for m in metrics.values():
            rows.append([kind, m.name, float(m.value), m.ref_suffix, float(m.ref),
                         float(m.p_value), "" if m.consistent is None else
                         ("yes" if m.consistent else "no")])
    out = {"comparison": (["states", "statistic", "value", "reference", "reference_value",
                           "p_value", "consistent"], rows)}
    nrows = [[n, r.verdict, float(r.p_network_better), float(r.p_null_better),
              int(r.n_surrogates)] for n, r in c.nulls.items()]
    if nrows:
        out["nulls"] = (["null", "verdict", "p_network_better", "p_null_better",
                         "n_surrogates"], nrows)
    return out

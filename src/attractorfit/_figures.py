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
    """Spike times per unit (kept units) of analysed trial ``pos``, from its window start.

    Units are found by id: a surrogate recording may hold only the data's kept units, so
    positions in the data's recording do not apply to it.
    """
    t0 = float(binned.window_start[pos])
    t1 = t0 + float(binned.n_valid[pos]) * binned.bin_size
    where = {u: i for i, u in enumerate(recording.unit_ids)}
    out = []
    for u in binned.unit_ids:
        t = recording.spike_times[where[u]]
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
    if nf is not None and getattr(nf, "cue_field", None) is not None:
        lost = int(np.asarray(nf.cue_unstable, bool).sum())
        parts.append(
            f"Each trial of level l of '{nf.condition}' received a constant latent input "
            f"(cue field) g x_l for its whole length, x_l the vertex code of the state that "
            f"level's training trials occupy most; the one strength g = {nf.cue_strength:.3g} "
            "was calibrated by simulating the training trials (same random numbers at every "
            "step) so that the fraction of delay time in that state, averaged over levels, "
            f"matched the data's ({nf.cue_model_use:.3f} against {nf.cue_target_use:.3f}), "
            "and tau_s was searched again with the field on. The field moves the network's "
            f"fixed points: under it {lost} of {np.asarray(nf.cue_unstable).size} "
            "(level, state) pairs had no stable fixed point near the state's vertex.")
    cmp_ = getattr(result, "comparison", None)
    if cmp_ is not None and hasattr(cmp_, "methods_text"):
        parts.append(cmp_.methods_text())
    parts.extend(_lab_methods(result))
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
    cond = result.config.get("analysis", {}).get("condition") or None
    for j, pos in enumerate(show[:2]):
        spikes = _trial_spikes(rec, b, pos)
        dur = float(b.n_valid[pos]) * b.bin_size
        name = f"trial {int(b.trial_index[pos])}"
        if cond and cond in b.labels:
            name += f", {cond} {b.labels[cond][pos]}"
        if surrogate is not None:
            s_rec, s_bin, s_dec = surrogate
            spos = min(pos, s_bin.n_trials - 1)
            fig = plots.raster_compare(
                [spikes], [_trial_spikes(s_rec, s_bin, spos)], duration=dur,
                segments_data=[_segments_of_trial(dec, pos)],
                segments_surrogate=[_segments_of_trial(s_dec, spos)], state_labels=labels,
                trial_labels=[name])
        else:
            fig = plots.raster_with_states(spikes, duration=dur,
                                           segments=_segments_of_trial(dec, pos),
                                           state_labels=labels,
                                           title=name)
        add(blocks, fig, f"raster_trial{int(b.trial_index[pos])}",
            f"Spike raster of an example trial ({name}) with the decoded state as a coloured "
            "band (unassigned time left blank)"
            + ("; beside it a fitted-network surrogate trial of the same condition."
               if surrogate is not None else "."))
    lat = sf.latent
    if lat.n_dims >= 1:
        verts = _state_means_in_latent(lat.trajectories, dec.bin_states, sf.n_states)
        fig = plots.latent_trajectories(lat.trajectories, None, vertices=verts,
                                        vertex_labels=sf.vertex_text,
                                        n_dims=2, bin_size=b.bin_size)  # K = 1: vs time
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
    sections.extend(_lab_sections(result, labels, add))

    tables = {"state_summary": (["state", "vertex", "occupancy", "mean_dwell_s"],
                                [[s, t, float(o), float(m)] for s, (t, o, m) in
                                 enumerate(zip(sf.vertex_text, dec.occupancy,
                                               dec.mean_dwell_s))])}
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
    fresh = float(getattr(nf, "fresh_occupancy_tvd", float("nan")))
    if np.isfinite(fresh):
        blocks.append(f"Occupancy TVD between the fitted network and the training data: "
                      f"{nf.occupancy_tvd:.3f} at the chosen calibration evaluation (the "
                      f"least of {nf.n_simulations} simulations on one noise realisation, so "
                      f"optimistic), {fresh:.3f} when the same trials are simulated again "
                      "with new noise. The held-out comparison above is the test.")
    h = nf._field()
    if np.any(h != 0):
        shift = nf._shift()
        moved = ", ".join(f"{t} {d:.2f}" if np.isfinite(d) else f"{t} none"
                          for t, d in zip(nf.vertex_text, shift))
        blocks.append(f"Occupancy field: a constant input of size {np.linalg.norm(h):.3g} "
                      "(latent units) along the latent axes, added to every neuron's bias "
                      "through the encoder, was calibrated to bring the model's state "
                      "occupancy closer to the data's. It moves the rate picture's stable "
                      "fixed points off the vertices; distance of each state's fixed point "
                      "from its vertex "
                      f"(vertex spacing 2; none: no stable fixed point in the orthant): "
                      f"{moved}. The states' rates in the comparison are measured from "
                      "decoded spikes, not at the vertices.")
    on_state = float(getattr(nf, "latent_on_state", float("nan")))
    if np.isfinite(on_state):
        use = ", ".join(f"{t} {100 * u:.0f}%" for t, u in zip(nf.vertex_text, nf.latent_use))
        blocks.append(f"Latent readout of the fitted network (sampled every 10 ms over "
                      f"{nf.n_calibration_trials} simulated trials): in the orthant of a "
                      f"state's vertex {100 * on_state:.0f}% of the time ({use}), and within "
                      "0.5 of the vertex on every axis (a quarter of the vertex spacing) "
                      f"{100 * nf.latent_near_state:.0f}% of the time. States in the "
                      "comparison are decoded from spikes, as for the data, so these "
                      "numbers say how literally the attractor picture describes the "
                      "fitted model.")
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
                     "occupancy field": (f"size {np.linalg.norm(nf._field()):.3g}, "
                                         "calibrated to the training trials' occupancy"
                                         if np.any(nf._field() != 0) else "none"),
                     "latent near a state's vertex": _pct(getattr(
                         nf, "latent_near_state", None)),
                     "cue field": (f"strength {nf.cue_strength:.3g} along each level's "
                                   "most used state" if getattr(nf, "cue_field", None)
                                   is not None else "none (only the first state depends "
                                   "on the condition)"),
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


# --------------------------------------------------------------------------- Amendment 7
def _pct(x) -> str:
    return "n/a" if x is None or not np.isfinite(x) else f"{100 * float(x):.0f}%"


def _lab_sections(result, labels, add) -> list:
    """Sections for end-of-window decoding, the robustness panel and drift."""
    sections = []
    sf = result.state_fit
    es = getattr(result, "end_state", None)
    if es:
        first = next(iter(es.values()))
        what = "balanced accuracy" if first.score == "balanced_accuracy" else "accuracy"
        blocks = [
            "Can the state at the end of the analysis window tell what kind of trial it was "
            "(the remembered item, the choice, the outcome)? For each categorical trial "
            "label, a nearest-centroid classifier predicts the label from the state posterior "
            f"averaged over the last {first.end_fraction:.0%} of the window"
            if first.feature == "posterior" else
            "Can the state at the end of the analysis window tell what kind of trial it was? "
            "For each categorical trial label, a nearest-centroid classifier predicts the "
            "label from the state assigned to the last bin",
        ]
        blocks[0] += (f", scored by {first.n_folds}-fold cross-validation ({what}); the "
                      "p-value compares it with the same classifier on shuffled labels.")
        fig = plots.decoding_accuracy(list(es), [v.value for v in es.values()],
                                      [v.null for v in es.values()],
                                      [v.chance for v in es.values()],
                                      [v.p_value for v in es.values()],
                                      ylabel=f"cross-validated {what}")
        add(blocks, fig, "end_state_decoding",
            f"Cross-validated {what} of predicting each trial label from the end-of-window "
            "state (diamond), its distribution with shuffled labels (box: quartiles, "
            "whiskers: 2.5-97.5 percentiles) and chance (dashed).")
        for v in es.values():
            blocks.append(Verdict(
                f"'{v.label}' from the end-of-window state",
                "above_chance" if v.p_value <= 0.05 else "not_above_chance", v.p_value,
                v.text(), assumptions={
                    "feature": (f"posterior averaged over the last {v.end_fraction:.0%} of "
                                "the window" if v.feature == "posterior"
                                else "state of the last bin"),
                    "classifier": "nearest class centroid (no tuning)",
                    "cross-validation": f"{v.n_folds} folds stratified by the label",
                    "state model": "fitted on all trials without the labels",
                    "trials": "exchangeable (no drift that follows the label)"}))
        blocks.append(TableBlock(
            "end_state_decoding", ["label", "levels", "n_trials", "score", "value", "chance",
                                   "null_mean", "p_value", "n_permutations", "accuracy",
                                   "majority", "balanced_accuracy"],
            [[v.label, len(v.levels), v.n_trials, v.score, v.value, v.chance, v.null_mean,
              v.p_value, v.n_permutations, v.accuracy, v.majority, v.balanced_accuracy]
             for v in es.values()],
            caption="Decoding of trial labels from the end-of-window state."))
        sections.append(Section("Trial labels from the end-of-window state", blocks))

    rob = getattr(result, "robustness", None)
    if rob is not None:
        blocks = [_robustness_words(rob)]
        names = [st.name for st in rob.settings]
        fig = plots.robustness_panel(
            names, rob.by_chosen_state("occupancy"), rob.by_chosen_state("mean_dwell_s"),
            {"unassigned fraction": [st.unassigned_fraction for st in rob.settings],
             "cube R²": [st.cube_r2 for st in rob.settings],
             "agreement with chosen": [st.agreement for st in rob.settings]},
            state_labels=labels)
        add(blocks, fig, "robustness",
            "The state analysis rerun with one state fewer and one more, the bin size halved "
            "and doubled, and lower and higher posterior thresholds (shaded: the chosen "
            "setting). Each chosen state is followed through its matched state "
            "(Hungarian matching of state rate vectors); gaps: no state matched.")
        h, rows = rob.table()
        blocks.append(TableBlock("robustness", h, rows, caption="One row per setting. "
                                 "states_found_again: chosen states matched with rate-"
                                 "modulation correlation >= 0.8; agreement: fraction of "
                                 "jointly assigned time in matched states."))
        h, rows = rob.state_table()
        blocks.append(TableBlock("robustness_states", h, rows, max_rows=12,
                                 caption="One row per state of every setting, with the "
                                         "chosen state it was matched to (-1: none)."))
        blocks.append("Assumptions: refits keep the chosen posterior threshold and minimum "
                      "segment duration, fit their vertex codes in the chosen analysis's "
                      "latent space (so cube R² is comparable), fix their number of states "
                      "(no new choice) and skip the discreteness test; the threshold "
                      "settings decode the chosen model again without refitting it.")
        sections.append(Section("Robustness of the state analysis", blocks))

    ud = getattr(result, "unit_drift", None)
    sd = getattr(result, "state_drift", None)
    if ud is not None and sd is not None:
        n_d, n_u = int(ud.drifting.sum()), ud.drifting.size
        strat = (f", compared within each value of '{sd.stratified_by}' so that a changing "
                 "mix of trial types does not pass for drift" if sd.stratified_by else "")
        blocks = [
            f"{n_d} of {n_u} units ({_pct(ud.fraction_drifting)}) change their rate steadily "
            "across the session (Spearman correlation of the per-trial rate with the trial "
            f"index, Benjamini-Hochberg false discovery rate {ud.alpha:g}). State occupancy in "
            f"{sd.n_blocks} blocks of consecutive trials{strat}: chi-square "
            f"{sd.statistic:.1f}, permutation p = {sd.p_value:.3g} ({sd.n_permutations} "
            "reassignments of whole trials to blocks). "
            + ("Occupancy differs between parts of the session beyond what reshuffling "
               "trials gives: states found on the whole session may mix periods of "
               "different behaviour or recording quality." if sd.p_value <= 0.05 else
               "Occupancy does not differ between parts of the session beyond what "
               "reshuffling trials gives."),
            f"The chi-square p-value that treats every bin as independent "
            f"({sd.p_asymptotic:.2g}) is shown only for comparison: bins within a dwell are "
            "not independent, so it is far too small and should not be used."]
        fig = plots.drift_panel(ud.rho, ud.drifting, sd.occupancy, p_value=sd.p_value,
                                state_labels=labels,
                                note=f"tested within each '{sd.stratified_by}'"
                                if sd.stratified_by else "")
        add(blocks, fig, "drift",
            "Left: trend of every unit's rate across trials (Spearman rho), drifting units "
            "highlighted. Right: state occupancy in consecutive blocks of trials.")
        h, rows = sd.table()
        blocks.append(TableBlock("state_drift", h, rows,
                                 caption="State occupancy per block of consecutive trials."))
        order = np.argsort(np.nan_to_num(ud.q_value, nan=2.0), kind="stable")
        urows = ud.rows()
        blocks.append(TableBlock("unit_drift", ["unit", "rho", "p_value", "q_value",
                                                "drifting", "relative_change"],
                                 [urows[i] for i in order], max_rows=15,
                                 caption="Units sorted by q-value; relative_change: fitted "
                                         "change from first to last trial over the mean "
                                         "rate."))
        blocks.append("Assumptions: trials are in session order of their start times; rates "
                      "are counted inside the analysis window; a trend in the task (e.g. "
                      "more errors late in the session) also shows up as drift.")
        sections.append(Section("Drift across the session", blocks))
    return sections


def _lab_methods(result) -> list:
    """Methods sentences for end-of-window decoding, robustness and drift."""
    out = []
    es = getattr(result, "end_state", None)
    if es:
        v = next(iter(es.values()))
        feat = (f"the state posterior averaged over the last {v.end_fraction:.0%} of the "
                "analysis window" if v.feature == "posterior" else
                "the state assigned to the last bin of the analysis window")
        out.append(f"Each categorical trial label was predicted from {feat} by a "
                   f"nearest-centroid classifier in {v.n_folds}-fold cross-validation "
                   f"stratified by the label ({v.score.replace('_', ' ')}, mean over folds); "
                   f"the p-value came from {v.n_permutations} permutations of the labels over "
                   "trials with the same folds, p = (1 + b)/(B + 1).")
    rob = getattr(result, "robustness", None)
    if rob is not None:
        out.append("For the robustness panel the Poisson HMM was refitted with a fixed "
                   "number of states at the settings listed in the panel, or the chosen "
                   "model was decoded again at other posterior thresholds; states were "
                   "matched to the chosen ones by the Hungarian algorithm on the Euclidean "
                   "distance between state rate vectors.")
    ud, sd = getattr(result, "unit_drift", None), getattr(result, "state_drift", None)
    if ud is not None and sd is not None:
        out.append("Drift: each unit's per-trial rate was rank-correlated with the trial "
                   "index (Spearman) and the p-values adjusted across units "
                   f"(Benjamini-Hochberg, false discovery rate {ud.alpha:g}); state "
                   f"occupancy in {sd.n_blocks} blocks of consecutive trials was compared by "
                   "a chi-square statistic of homogeneity" +
                   (f" summed over the levels of '{sd.stratified_by}'" if sd.stratified_by
                    else "") + f", with a p-value from {sd.n_permutations} permutations of "
                   "whole trials across blocks.")
    return out


def _robustness_words(rob) -> str:
    """Plain words on whether the state analysis depends on the settings."""
    s0 = rob.n_states
    parts = []
    fixed = [st for st in rob.settings[1:] if st.n_states == s0]
    if fixed:
        stable = [st.name for st in fixed if st.n_matched_similar == s0
                  and (not np.isfinite(st.agreement) or st.agreement >= 0.8)]
        unstable = [st.name for st in fixed if st.name not in stable]
        parts.append(f"With the same number of states, {len(stable)} of {len(fixed)} "
                     "settings find every chosen state again (rate-modulation correlation "
                     ">= 0.8) and assign at least 80% of the jointly assigned time to the "
                     "matched states" + (f"; not so for {', '.join(unstable)}." if unstable
                                         else "."))
        worst = max(fixed, key=lambda st: st.occupancy_tvd)
        parts.append(f"The largest change of occupancy is {worst.occupancy_tvd:.3f} (total "
                     f"variation distance, {worst.name}).")
    more = [st for st in rob.settings[1:] if st.n_states > s0]
    for st in more:
        extra = [float(o) for o, sim in zip(st.occupancy, st.similar) if not sim]
        parts.append(f"With {st.n_states} states, {st.n_matched_similar} of the {s0} chosen "
                     f"states are found again; the states without a close match take "
                     f"{_pct(sum(extra))} of the assigned time.")
    fewer = [st for st in rob.settings[1:] if 0 < st.n_states < s0]
    for st in fewer:
        found = {int(j) for j in st.match[st.similar]}
        lost = sorted(set(range(s0)) - found)
        parts.append(f"With {st.n_states} states, {st.n_matched_similar} of the {s0} chosen "
                     "states are found again" + (f" (not found: state "
                                                 f"{', '.join(map(str, lost))})" if lost
                                                 else "") + ".")
    if any(st.name == "chosen" for st in rob.settings):
        parts.append("A conclusion that changes between these settings rests on the "
                     "setting, not on the data alone.")
    return " ".join(parts)

"""Sub-commands of the ``attractorfit`` command line (argument parsing and wiring only)."""

from __future__ import annotations

import json
import sys


def register(sub) -> None:
    """Add every sub-command to the argparse sub-parser collection ``sub``."""
    p = sub.add_parser(
        "inspect", help="summarise a recording: units, rates, variability, trials, warnings",
        description="Load a recording and print, per unit, the spike count, mean rate, "
                    "ISI coefficient of variation, Fano factor of whole-trial counts and "
                    "the fraction of inter-spike intervals under 1.5 ms; per recording, "
                    "its duration, trials and label levels, and any warnings about the "
                    "input. Nothing is written.")
    _add_load_options(p)
    p.add_argument("--json", action="store_true",
                   help="print one JSON document instead of plain text")
    p.set_defaults(func=_inspect)

    p = sub.add_parser(
        "defaults", help="print every setting with its default and meaning (TOML)",
        description="Print the full configuration with documented defaults as TOML. Save "
                    "it, edit what you need and pass it to run/states with --config.")
    p.set_defaults(func=_defaults)

    p = sub.add_parser(
        "states", help="discrete states and the discreteness test of one recording",
        description="Bin the recording, choose the number of states, fit a Poisson hidden "
                    "Markov model, give every state a vertex code, decode segments, "
                    "occupancy and dwell times, and test whether discrete states describe "
                    "the activity better than a continuous latent. Writes states.csv, "
                    "posteriors.npz, summary.json and config.toml into --out.")
    _add_load_options(p)
    _add_run_options(p)
    p.add_argument("--no-test", action="store_true",
                   help="skip the discreteness test (it reruns the state analysis on "
                        "every bootstrap surrogate and takes most of the time)")
    p.set_defaults(func=_states)

    p = sub.add_parser(
        "run", help="the whole job: states, discreteness test, network fit, surrogates, "
                    "comparison, report",
        description="Run every stage on one recording: binning, discrete states with vertex "
                    "codes, the discreteness test, a low-rank spiking network fitted so its "
                    "attractors reproduce the states' occupancy and dwell times, surrogate "
                    "recordings from it and from null models, the model-vs-data comparison on "
                    "held-out trials, figures and report.html. Writes the run folder "
                    "(summary.json, states.csv, posteriors.npz, model.npz, surrogate.nwb, "
                    "config.toml, figures/, tables/, report.html).")
    _add_load_options(p)
    _add_run_options(p)
    where = p.add_mutually_exclusive_group()
    where.add_argument("--scheduler", metavar="ADDRESS",
                       help="simulate the network's surrogate recordings on a running Dask "
                            "cluster (e.g. tcp://10.0.0.5:8786; needs the 'cluster' extra); "
                            "results are identical to a local run")
    where.add_argument("--local-cluster", type=int, metavar="N",
                       help="start a local Dask cluster of N worker processes for the "
                            "surrogate simulations")
    p.set_defaults(func=_run)

    p = sub.add_parser(
        "demo", help="run the whole job on the bundled sample recording",
        description="Run 'attractorfit run' on the bundled sample recording (an invented "
                    "task: a mouse holds which of four reward ports was cued across a 3 s "
                    "delay; 96 units) with the settings in the bundled demo.toml, and print "
                    "where the report is.")
    p.add_argument("--out", metavar="DIR", default=None,
                   help="folder for the results (default: ./attractorfit_demo)")
    p.add_argument("--seed", type=int, default=None, metavar="N", help="seed (default 0)")
    p.add_argument("--jobs", type=int, default=2, metavar="N",
                   help="workers (default 2; the results do not depend on it)")
    p.add_argument("--quiet", action="store_true", help="no progress bar or summary lines")
    p.add_argument("--verbose", action="store_true", help="log what each stage does")
    p.set_defaults(func=_demo)

    from attractorfit.sweep import add_sweep_command

    add_sweep_command(sub)


def _add_load_options(p) -> None:
    p.add_argument("path", help="recording: an NWB, NIX, CSV/TSV or NPZ file, a sorter "
                                "output folder, or any file neo can read")
    p.add_argument("--trials", metavar="CSV",
                   help="trials table (CSV/TSV with start and stop in seconds plus label "
                        "columns) when the trials are not inside the recording file")
    p.add_argument("--time-unit", choices=["s", "ms"], default=None,
                   help="unit of the spike times in a CSV/TSV table (default: seconds)")
    p.add_argument("--trials-time-unit", choices=["s", "ms"], default=None,
                   help="unit of the --trials table when it differs from --time-unit")
    p.add_argument("--sampling-rate", type=float, default=None, metavar="HZ",
                   help="sampling rate of a sorter folder's spike_times.npy when its "
                        "params.py does not give it")
    p.add_argument("--good-only", action="store_true",
                   help="sorter folders: keep only units labelled good")


def _add_run_options(p) -> None:
    p.add_argument("--out", metavar="DIR",
                   help="folder for the results (default: a new folder named after the "
                        "input in the current directory; never the input's own folder)")
    p.add_argument("--config", metavar="FILE",
                   help="TOML file with settings that override the defaults "
                        "(see 'attractorfit defaults')")
    p.add_argument("--seed", type=int, default=None, metavar="N",
                   help="seed of every random stream (default: run.seed of the "
                        "configuration, 0); the same seed gives byte-identical results")
    p.add_argument("--jobs", type=int, default=1, metavar="N",
                   help="worker processes for bootstrap replicates and model fits "
                        "(results do not depend on it)")
    p.add_argument("--force", action="store_true",
                   help="overwrite the results of an earlier run in --out")
    p.add_argument("--quiet", action="store_true", help="no progress bars or notes")
    p.add_argument("--verbose", action="store_true", help="log what each stage does")


def _resolve(args):
    """Configuration, seed and output folder from the command-line arguments."""
    import os

    from attractorfit.config import load_config, resolve_config

    cfg = load_config(args.config) if args.config else resolve_config(None)
    _apply_seed_and_jobs(args, cfg)
    out = args.out
    if out is None:
        stem = os.path.splitext(os.path.basename(os.path.normpath(args.path)))[0]
        out = os.path.join(os.getcwd(), f"{stem}_attractorfit")
    return cfg, int(cfg["run"]["seed"]), out


def _apply_seed_and_jobs(args, cfg) -> None:
    """Check --seed and --jobs; a given seed replaces run.seed of the configuration."""
    from attractorfit.errors import InputError

    if args.seed is not None:
        if args.seed < 0:
            raise InputError(f"--seed: expected a whole number >= 0, got {args.seed}")
        cfg["run"]["seed"] = args.seed
    if args.jobs < 1:
        raise InputError(f"--jobs: expected a whole number >= 1, got {args.jobs}")


def _progress_wanted(args) -> bool:
    return not args.quiet and sys.stderr.isatty()


def load_from_args(args):
    """Load the recording named on the command line with its loader options."""
    from attractorfit.io import load

    options = {}
    if getattr(args, "trials", None):
        options["trials"] = args.trials
    if getattr(args, "time_unit", None):
        options["time_unit"] = args.time_unit
    if getattr(args, "trials_time_unit", None):
        options["trials_time_unit"] = args.trials_time_unit
    if getattr(args, "sampling_rate", None):
        options["sampling_rate"] = args.sampling_rate
    if getattr(args, "good_only", False):
        options["good_only"] = True
    return load(args.path, **options)


def _inspect(args) -> int:
    from attractorfit._output import to_jsonable
    from attractorfit.stats import unit_summary

    rec = load_from_args(args)
    s = unit_summary(rec)
    info = {
        "source": rec.source,
        "n_units": rec.n_units,
        "n_spikes": rec.n_spikes,
        "duration_s": rec.duration,
        "n_trials": rec.n_trials,
        "trial_columns": {c: _levels(rec.trials[c]) for c in rec.label_columns},
        "units": [
            {"unit": u, "n_spikes": int(n), "rate_hz": r, "isi_cv": cv, "fano": f,
             "isi_under_1.5ms": c}
            for u, n, r, cv, f, c in zip(s.unit_ids, s.n_spikes, s.rate_hz, s.isi_cv,
                                         s.fano, s.contamination)],
        "warnings": list(rec.warnings),
    }
    if args.json:
        print(json.dumps(to_jsonable(info), indent=2))
        return 0
    out = sys.stdout
    out.write(f"recording   {info['source']}\n")
    out.write(f"units       {rec.n_units}   spikes {rec.n_spikes}   duration "
              f"{rec.duration:.1f} s\n")
    if rec.n_trials:
        dur = rec.trials["stop"] - rec.trials["start"]
        out.write(f"trials      {rec.n_trials}   length {dur.min():.3g}-{dur.max():.3g} s\n")
        for c, lv in info["trial_columns"].items():
            out.write(f"  {c:<12}{lv}\n")
    else:
        out.write("trials      none (will be analysed as one continuous epoch)\n")
    out.write("\n unit          spikes   rate_Hz   ISI_CV   Fano   ISI<1.5ms\n")
    for row in info["units"]:
        out.write(f" {row['unit']:<12} {row['n_spikes']:>7} {row['rate_hz']:>9.2f} "
                  f"{row['isi_cv']:>8.2f} {row['fano']:>6.2f} {row['isi_under_1.5ms']:>10.2%}\n")
    if rec.warnings:
        out.write("\nwarnings\n")
        for w in rec.warnings:
            out.write(f"  - {w}\n")
    return 0


def _defaults(args) -> int:
    from attractorfit.config import dumps_config

    sys.stdout.write(dumps_config())
    return 0


def _prepare(args):
    """Configuration, seed, output folder (checked before any work) and the recording."""
    from attractorfit import pipeline

    cfg, seed, out = _resolve(args)
    folder = pipeline.RunFolder(out, inputs=[args.path] + ([args.trials] if args.trials else []),
                                force=args.force)
    return cfg, seed, folder, load_from_args(args)


def _states(args) -> int:
    from attractorfit import pipeline

    cfg, seed, folder, rec = _prepare(args)
    res = pipeline.run_states(rec, cfg, seed=seed, n_jobs=args.jobs,
                              progress=_progress_wanted(args), discreteness=not args.no_test)
    summary = pipeline.base_summary(res, seed=seed)
    summary["states"] = res.state_fit.summary_block()
    if res.discreteness is not None:
        summary["discreteness"] = res.discreteness.summary_block()
    pipeline.write_state_outputs(folder, res)
    folder.write_text("config.toml", pipeline.dumps_config(cfg))
    from attractorfit._figures import write_figures_and_report

    write_figures_and_report(folder, res, title="attractorfit: discrete states")
    folder.write_json("summary.json", summary)
    if not args.quiet:
        sf = res.state_fit
        print(f"{sf.n_states} states (vertex codes {', '.join(sf.vertex_text)}); "
              f"results in {folder.path}")
        if res.discreteness is not None:
            print(res.discreteness.text())
    return 0


def _run(args) -> int:
    cfg, seed, folder, rec = _prepare(args)
    if args.local_cluster is not None and args.local_cluster < 1:
        from attractorfit.errors import InputError

        raise InputError(f"--local-cluster: expected a whole number >= 1, got "
                         f"{args.local_cluster}")
    return _run_recording(rec, cfg, seed, folder, jobs=args.jobs, quiet=args.quiet,
                          progress=not args.quiet, scheduler=args.scheduler,
                          local_cluster=args.local_cluster)


def _run_recording(rec, cfg, seed, folder, *, jobs, quiet, progress, scheduler=None,
                   local_cluster=None) -> int:
    import time

    from attractorfit import pipeline
    from attractorfit._figures import write_figures_and_report

    from tqdm.auto import tqdm

    t0 = time.perf_counter()
    pipeline.log.info("%s", rec)
    bar = tqdm(total=3, desc="states", unit="stage", disable=quiet or not sys.stderr.isatty(),
               bar_format="{desc:<28}{bar:20} {n_fmt}/{total_fmt} [{elapsed}]")
    pipeline.log.info("finding states and testing discreteness")
    res = pipeline.run_states(rec, cfg, seed=seed, n_jobs=jobs, progress=False)
    bar.update(1)
    bar.set_description("network fit and comparison")
    pipeline.run_model(res, seed=seed, n_jobs=jobs, progress=progress, scheduler=scheduler,
                       local_cluster=local_cluster)
    bar.update(1)
    bar.set_description("figures and report")
    summary = pipeline.base_summary(res, seed=seed)
    summary["states"] = res.state_fit.summary_block()
    summary["discreteness"] = res.discreteness.summary_block()
    summary["model"] = res.network_fit.summary_block()
    summary["comparison"] = res.comparison.summary_block()
    pipeline.write_state_outputs(folder, res)
    pipeline.write_model_outputs(folder, res)
    folder.write_text("config.toml", pipeline.dumps_config(cfg))
    pipeline.log.info("writing figures and report")
    write_figures_and_report(folder, res)
    folder.write_json("summary.json", summary)
    bar.update(1)
    bar.close()
    if not quiet:
        sf, d, c = res.state_fit, res.discreteness, res.comparison.summary_block()
        print(f"{sf.n_states} states, vertex codes {', '.join(sf.vertex_text)}; "
              f"discreteness: {d.verdict} (p = {d.p_value:.3g})")
        print(f"fitted network vs held-out data: occupancy TVD {c.get('occupancy_tvd', float('nan')):.3f} "
              f"(reference {c.get('occupancy_tvd_ref95', float('nan')):.3f}), unit-rate R^2 "
              f"{c.get('rate_r2', float('nan')):.3f}")
        print(f"report: {folder.file('report.html')}  ({time.perf_counter() - t0:.0f} s)")
    return 0


def _demo(args) -> int:
    import importlib.resources as resources
    import os

    from attractorfit import pipeline
    from attractorfit.config import load_config
    from attractorfit.io import load

    data = resources.files("attractorfit.sample_data")
    path = str(data / "ports_session.nwb")
    cfg = load_config(str(data / "demo.toml"))
    _apply_seed_and_jobs(args, cfg)
    out = args.out or os.path.join(os.getcwd(), "attractorfit_demo")
    folder = pipeline.RunFolder(out, inputs=[path], force=True)
    rec = load(path)
    return _run_recording(rec, cfg, int(cfg["run"]["seed"]), folder, jobs=args.jobs,
                          quiet=args.quiet, progress=not args.quiet)


def _levels(col) -> str:
    import numpy as np

    col = np.asarray(col)
    if col.dtype.kind in "fc":
        if np.all(np.isfinite(col)) and np.unique(col).size > 12:
            return f"numeric, {np.nanmin(col):g} to {np.nanmax(col):g}"
    vals, counts = np.unique(col.astype(str), return_counts=True)
    if vals.size > 12:
        return f"{vals.size} distinct values"
    return ", ".join(f"{v} ({c})" for v, c in zip(vals, counts))

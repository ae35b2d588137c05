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
                    "the fraction of inter-spike intervals under 1.5 ms and its metadata "
                    "(units-table columns such as a single/multi-unit type or a site); per "
                    "recording, its duration, trials and label levels, the unit metadata "
                    "columns with their value counts, the multi-units, and any warnings "
                    "about the input. Nothing is written.")
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
                    "posteriors.npz, state_model.npz, summary.json and config.toml into "
                    "--out; 'fit', 'simulate', 'compare' and 'report' continue from there.")
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
                    "config.toml, figures/, tables/, report.html, and for the stage "
                    "commands and --resume: state_model.npz, discreteness.npz, "
                    "comparison.npz, input.json).")
    _add_load_options(p)
    _add_run_options(p)
    _add_cluster_options(p)
    p.add_argument("--resume", action="store_true",
                   help="continue an earlier, possibly interrupted run in --out of the same "
                        "input, configuration and seed: stages whose results are complete "
                        "there are kept, the others are done (refused if the input, a "
                        "setting or the seed differs)")
    p.set_defaults(func=_run)

    _register_stage_commands(sub)

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


def _register_stage_commands(sub) -> None:
    """fit, simulate, compare, report: one stage on an existing run folder."""
    p = sub.add_parser(
        "fit", help="fit the spiking network to the states of a run folder",
        description="Fit a low-rank spiking network whose attractors sit at the states found "
                    "by 'attractorfit states' in RUN_FOLDER: its occupancy and dwell times are "
                    "calibrated on the training trials. The recording is read again from "
                    "where the run found it (it must be unchanged); the settings and seed are "
                    "the run's (config.toml). Writes model.npz and the 'model' block of "
                    "summary.json.")
    _add_stage_options(p)
    p.set_defaults(func=_fit)

    p = sub.add_parser(
        "simulate", help="simulate a surrogate recording from the fitted network",
        description="Simulate the network fitted by 'attractorfit fit' in RUN_FOLDER and "
                    "write the first surrogate recording, with the data's trials, as "
                    "surrogate.nwb (the same file 'attractorfit run' writes). 'compare' "
                    "simulates the full set of surrogates itself, with the same random "
                    "streams, so its numbers equal those of 'run'.")
    _add_stage_options(p, jobs=False, data=False)
    p.set_defaults(func=_simulate)

    p = sub.add_parser(
        "compare", help="compare the fitted network with the held-out data",
        description="Simulate surrogate recordings from the fitted network and from null "
                    "models, decode them with the data's state model and compare them with "
                    "the held-out trials of the data (occupancy, dwell times, transitions, "
                    "unit rates, variability), each statistic judged against the spread "
                    "between independent model surrogates. Writes comparison.npz, the "
                    "'comparison' block of summary.json and report.html (and "
                    "surrogate.nwb when 'simulate' has not written it).")
    _add_stage_options(p)
    _add_cluster_options(p)
    p.set_defaults(func=_compare)

    p = sub.add_parser(
        "report", help="write the report of a run folder again",
        description="Rebuild figures/, tables/ and report.html of RUN_FOLDER from what the "
                    "earlier stages stored there (no model is refitted): the states, the "
                    "discreteness test when it was run, and the fitted network and comparison "
                    "when 'compare' was run.")
    _add_stage_options(p, jobs=False)
    p.set_defaults(func=_report)


def _add_stage_options(p, *, jobs: bool = True, data: bool = True) -> None:
    p.add_argument("folder", metavar="RUN_FOLDER",
                   help="folder written by 'attractorfit states' or 'attractorfit run'")
    if data:
        p.add_argument("--input", metavar="PATH", default=None,
                       help="new place of the recording if it moved since the run (it must "
                            "be the same file: its SHA-256 is checked)")
        p.add_argument("--trials", metavar="CSV", default=None,
                       help="new place of the trials table if it moved (checked the same "
                            "way)")
    if jobs:
        p.add_argument("--jobs", type=int, default=1, metavar="N",
                       help="worker processes (results do not depend on it)")
    p.add_argument("--quiet", action="store_true", help="no notes")
    p.add_argument("--verbose", action="store_true", help="log what the stage does")


def _add_cluster_options(p) -> None:
    where = p.add_mutually_exclusive_group()
    where.add_argument("--scheduler", metavar="ADDRESS",
                       help="simulate the network's surrogate recordings on a running Dask "
                            "cluster (e.g. tcp://10.0.0.5:8786; needs the 'cluster' extra); "
                            "results are identical to a local run")
    where.add_argument("--local-cluster", type=int, metavar="N",
                       help="start a local Dask cluster of N worker processes for the "
                            "surrogate simulations")


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
    p.add_argument("--units", action="append", metavar="COLUMN=VALUE[,VALUE]",
                   help="analyse only the units whose metadata column COLUMN (see "
                        "'inspect') has one of the values, e.g. --units unit_type=SU; "
                        "repeat for several columns (a unit must match each); sets "
                        "[units] keep of the configuration for that column")


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
    cfg["units"]["keep"] = {**cfg["units"]["keep"], **unit_selection(args)}
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


def unit_selection(args) -> dict:
    """``--units COLUMN=VALUE[,VALUE]`` options as ``{column: [values]}``."""
    from attractorfit.errors import InputError

    keep: dict = {}
    for item in getattr(args, "units", None) or []:
        column, sep, values = item.partition("=")
        wanted = [v.strip() for v in values.split(",") if v.strip()]
        if not sep or not column.strip() or not wanted:
            raise InputError(f"--units: {item!r}; expected COLUMN=VALUE[,VALUE], e.g. "
                             "unit_type=SU")
        keep.setdefault(column.strip(), [])
        keep[column.strip()] += [v for v in wanted if v not in keep[column.strip()]]
    return keep


def load_from_args(args):
    """Load the recording named on the command line with its loader options."""
    from attractorfit.io import load

    return load(args.path, **_load_options(args))


def _load_options(args) -> dict:
    """The loader options given on the command line."""
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
    return options


def _inspect(args) -> int:
    from attractorfit._output import to_jsonable
    from attractorfit.stats import unit_summary

    rec = load_from_args(args)
    n_all, keep = rec.n_units, unit_selection(args)
    if keep:
        rec = rec.select_units(rec.match_units(keep, option="--units"))
    s = unit_summary(rec)
    multi_column, multi = rec.multi_units()
    info = {
        "source": rec.source,
        "n_units": rec.n_units,
        "n_spikes": rec.n_spikes,
        "duration_s": rec.duration,
        "n_trials": rec.n_trials,
        "trial_columns": {c: _levels(rec.trials[c]) for c in rec.label_columns},
        "unit_columns": rec.unit_info_counts(),
        "units_selected": {"keep": keep, "n_units": rec.n_units, "of": n_all} if keep
        else None,
        "multi_units": {"column": multi_column, "units": multi},
        "units": [
            {"unit": u, "n_spikes": int(n), "rate_hz": r, "isi_cv": cv, "fano": f,
             "isi_under_1p5ms": c, "metadata": rec.unit_metadata(k)}
            for k, (u, n, r, cv, f, c) in enumerate(zip(
                s.unit_ids, s.n_spikes, s.rate_hz, s.isi_cv, s.fano, s.contamination))],
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
    _write_unit_columns(out, info)
    cols = list(rec.unit_info)
    out.write(("\n unit          spikes   rate_Hz   ISI_CV   Fano   ISI<1.5ms"
               + "".join(f"  {c[:10]:<10}" for c in cols)).rstrip() + "\n")
    for row in info["units"]:
        line = (f" {row['unit']:<12} {row['n_spikes']:>7} {row['rate_hz']:>9.2f} "
                f"{row['isi_cv']:>8.2f} {row['fano']:>6.2f} {row['isi_under_1p5ms']:>10.2%}"
                + "".join(f"  {str(row['metadata'][c])[:10]:<10}" for c in cols))
        out.write(line.rstrip() + "\n")
    if rec.warnings:
        out.write("\nwarnings\n")
        for w in rec.warnings:
            out.write(f"  - {w}\n")
    return 0


def _write_unit_columns(out, info) -> None:
    """The unit metadata columns with their value counts, the selection, multi-units."""
    sel = info["units_selected"]
    if sel:
        rule = "; ".join(f"{c} in {v}" for c, v in sel["keep"].items())
        out.write(f"selected    {sel['n_units']} of {sel['of']} units ({rule})\n")
    if not info["unit_columns"]:
        out.write("unit columns none\n")
        return
    out.write("unit columns\n")
    for c, counts in info["unit_columns"].items():
        if "distinct" in counts:
            text = f"{counts['distinct']} distinct values" + (
                f", {counts['min']:g} to {counts['max']:g}" if "min" in counts else "")
        else:
            text = ", ".join(f"{v or repr('')} ({n})" for v, n in counts.items())
        out.write(f"  {c:<12}{text}\n")
    mu = info["multi_units"]
    if mu["column"]:
        out.write(f"multi-units {len(mu['units'])} by {mu['column']} (flagged in the ISI "
                  "comparison)\n")


def _defaults(args) -> int:
    from attractorfit.config import dumps_config

    sys.stdout.write(dumps_config())
    return 0


def _prepare(args):
    """Configuration, seed, output folder (checked before any work) and the recording."""
    from attractorfit import pipeline

    cfg, seed, out = _resolve(args)
    resume = getattr(args, "resume", False)
    if resume and args.force:
        from attractorfit.errors import InputError

        raise InputError("--resume and --force: choose one (continue the earlier run, or "
                         "start over)")
    folder = pipeline.RunFolder(out, inputs=[args.path] + ([args.trials] if args.trials else []),
                                force=args.force, resume=resume)
    return cfg, seed, folder, load_from_args(args)


def _states(args) -> int:
    from attractorfit import _stages, pipeline

    cfg, seed, folder, rec = _prepare(args)
    _start_fresh(folder, cfg, args.path, _load_options(args), rec)
    res = pipeline.run_states(rec, cfg, seed=seed, n_jobs=args.jobs,
                              progress=_progress_wanted(args), discreteness=not args.no_test)
    pipeline.write_state_outputs(folder, res)
    _stages.save_states(folder, res, seed=seed, fresh=True)
    ok = _write_report(folder, res, _notices(args), title="attractorfit: discrete states")
    if not args.quiet:
        sf = res.state_fit
        print(f"{sf.n_states} states (vertex codes {', '.join(sf.vertex_text)}); "
              f"results in {folder.path}")
        if res.discreteness is not None:
            print(res.discreteness.text())
    return 0 if ok else 1


def _run(args) -> int:
    cfg, seed, folder, rec = _prepare(args)
    _check_cluster(args)
    return _run_recording(rec, cfg, seed, folder, jobs=args.jobs, quiet=args.quiet,
                          progress=not args.quiet, scheduler=args.scheduler,
                          local_cluster=args.local_cluster, resume=args.resume,
                          input_path=args.path, load_options=_load_options(args),
                          notices=_notices(args))


def _write_report(folder, res, notices, *, title="attractorfit report") -> bool:
    """Figures, tables and report.html, then the run log; False when the report failed.

    The stages' files are written before this is called, so a failure here loses
    nothing: it is logged with its traceback in run_log.txt, one line says what failed
    and how to redo only the report, and the command exits 1 (our bug, not the input's).
    A full disk or a folder that became unwritable is the environment's: exit 2.
    """
    import traceback

    from attractorfit import pipeline
    from attractorfit._figures import write_figures_and_report

    try:
        write_figures_and_report(folder, res, title=title)
        ok = True
    except OSError as exc:
        _write_log(folder, notices)
        from attractorfit.errors import InputError

        raise InputError(f"{folder.path}: could not write the figures and report "
                         f"({exc.strerror or exc}); the finished stages are kept, "
                         f"'attractorfit report {folder.path}' writes the report") from None
    except Exception as exc:  # noqa: BLE001 - any bug in the figures must not lose the run
        pipeline.log.error("figures and report failed:\n%s", traceback.format_exc())
        print(f"attractorfit: error: the figures and report failed ({type(exc).__name__}: "
              f"{exc}); the finished stages are kept in {folder.path}, and 'attractorfit "
              f"report {folder.path}' (or the same run with --resume) redoes only the "
              "report; details in run_log.txt; this is a bug, please report it",
              file=sys.stderr)
        ok = False
        _remove_stale_report(folder)
    _write_log(folder, notices)
    return ok


def _notices(args):
    """The command's NoticeBook (set by the command line; None when called directly)."""
    return getattr(args, "notices", None)


def _remove_stale_report(folder) -> None:
    """A report.html of an earlier run must not pass for this run's."""
    import os

    try:
        os.unlink(folder.file("report.html"))
    except FileNotFoundError:
        pass


def _write_log(folder, notices) -> None:
    """run_log.txt: the command's progress messages and warnings (with their counts)."""
    if notices is not None:
        folder.write_text("run_log.txt", notices.log_text())


def _check_cluster(args) -> None:
    if args.local_cluster is not None and args.local_cluster < 1:
        from attractorfit.errors import InputError

        raise InputError(f"--local-cluster: expected a whole number >= 1, got "
                         f"{args.local_cluster}")


def _start_fresh(folder, cfg, input_path, load_options, rec) -> None:
    """Before any work: forget stage files of an earlier run; record config and input."""
    from attractorfit import _stages

    _stages.remove_stage_files(folder)
    _record_run(folder, cfg, input_path, load_options, rec)


def _record_run(folder, cfg, input_path, load_options, rec) -> None:
    from attractorfit import _stages, pipeline

    folder.write_text("config.toml", pipeline.dumps_config(cfg))
    _stages.write_input_record(folder, input_path, load_options, rec)


def _run_recording(rec, cfg, seed, folder, *, jobs, quiet, progress, scheduler=None,
                   local_cluster=None, resume=False, input_path=None,
                   load_options=None, notices=None) -> int:
    import time

    from attractorfit import _stages, pipeline

    from tqdm.auto import tqdm

    t0 = time.perf_counter()
    pipeline.log.info("%s", rec)
    done = set()
    if resume and _stages.check_resume(folder, cfg, seed, rec):
        done = _stages.completed_stages(folder)
        _record_run(folder, cfg, input_path, load_options or {}, rec)
        kept = [s for s in _stages.STAGES if s in done]
        todo = [s for s in _stages.STAGES if s not in done] + ["report"]
        pipeline.log.info("resuming the run in %s: keeping %s; doing %s", folder.path,
                          ", ".join(kept) or "nothing", ", ".join(todo))
        if not quiet:
            print(f"resuming: kept {', '.join(kept) or 'nothing'}; doing {', '.join(todo)}")
    else:
        _start_fresh(folder, cfg, input_path, load_options or {}, rec)
    bar = tqdm(total=5, desc="states", unit="stage", disable=quiet or not sys.stderr.isatty(),
               bar_format="{desc:<28}{bar:20} {n_fmt}/{total_fmt} [{elapsed}]")

    def step(name):
        bar.update(1)
        bar.set_description(name)

    def skipped(stage):
        pipeline.log.info("%s: complete in the run folder (%s); skipped", stage,
                          _stages.MARKERS[stage])

    if "states" in done:
        skipped("states")
        res = _stages.restore_states(folder, rec, cfg, need_discreteness=True)
    else:
        pipeline.log.info("finding states and testing discreteness")
        res = pipeline.run_states(rec, cfg, seed=seed, n_jobs=jobs, progress=False)
        pipeline.write_state_outputs(folder, res)
        _stages.save_states(folder, res, seed=seed, fresh=not resume)
    step("network fit")
    if "fit" in done:
        skipped("fit")
        _stages.restore_fit(folder, res)
    else:
        pipeline.fit_model(res, seed=seed, n_jobs=jobs, progress=progress)
        _stages.save_fit(folder, res)
    step("surrogates")
    cluster = {"scheduler": scheduler, "local_cluster": local_cluster}
    if "simulate" in done:
        skipped("simulate")
    elif "compare" in done:
        pipeline.simulate_model(res, seed=seed, n=1, **cluster)
        _stages.save_surrogate(folder, res)
    else:
        pipeline.simulate_model(res, seed=seed, n_jobs=jobs, progress=progress, **cluster)
        _stages.save_surrogate(folder, res)
    step("comparison")
    if "compare" in done:
        skipped("compare")
        _stages.restore_comparison(folder, res)
        _stages.first_surrogate(folder, res)
    else:
        if not res.surrogates:  # kept from an earlier run: the same streams again
            pipeline.simulate_model(res, seed=seed, n_jobs=jobs, progress=progress, **cluster)
        pipeline.compare_model(res, seed=seed, n_jobs=jobs, progress=progress)
        _stages.save_comparison(folder, res)
    step("figures and report")
    pipeline.log.info("writing figures and report")
    ok = _write_report(folder, res, notices)
    bar.update(1)
    bar.close()
    if not ok:
        return 1
    if not quiet:
        sf, d, c = res.state_fit, res.discreteness, res.comparison.summary_block()
        print(f"{sf.n_states} states, vertex codes {', '.join(sf.vertex_text)}; "
              f"discreteness: {d.verdict} (p = {d.p_value:.3g})")
        _print_comparison(c)
        print(f"report: {folder.file('report.html')}  ({time.perf_counter() - t0:.0f} s)")
    return 0


def _print_comparison(c) -> None:
    print(f"fitted network vs held-out data: occupancy TVD {c.get('occupancy_tvd', float('nan')):.3f} "
          f"(reference {c.get('occupancy_tvd_ref95', float('nan')):.3f}), unit-rate R^2 "
          f"{c.get('rate_r2', float('nan')):.3f}")


def _stage_start(args, command):
    """Run folder, configuration and seed of a stage command (checked before any work)."""
    from attractorfit import _stages

    if getattr(args, "jobs", 1) < 1:
        from attractorfit.errors import InputError

        raise InputError(f"--jobs: expected a whole number >= 1, got {args.jobs}")
    return _stages.open_run_folder(args.folder, command=command)


def _stage_data(args, folder, cfg, command, *, upto="states"):
    """Re-read the recording (hash-checked) and restore the stages up to ``upto``."""
    from attractorfit import _stages

    _stages.need(folder, _stages.MARKERS["states"], "states", command)
    if upto == "fit":
        _stages.need(folder, _stages.MARKERS["fit"], "fit", command)
    rec = _stages.reload_recording(folder, path=args.input, trials=args.trials,
                                   command=command)
    res = _stages.restore_states(folder, rec, cfg, command=command)
    if upto == "fit":
        _stages.restore_fit(folder, res, command=command)
    return res


def _fit(args) -> int:
    from attractorfit import _stages, pipeline

    folder, cfg, seed = _stage_start(args, "fit")
    res = _stage_data(args, folder, cfg, "fit")
    pipeline.fit_model(res, seed=seed, n_jobs=args.jobs, progress=not args.quiet)
    _stages.save_fit(folder, res)
    _write_log(folder, _notices(args))
    if not args.quiet:
        nf = res.network_fit
        print(f"fitted a rank-{nf.rank} network ({nf.rule} decoder, tau_s "
              f"{nf.tau_s * 1e3:.0f} ms); model.npz in {folder.path}")
    return 0


def _simulate(args) -> int:
    from attractorfit import _stages, pipeline

    folder, cfg, seed = _stage_start(args, "simulate")
    res = pipeline.RunResult(config=cfg, recording=None, binned=None, folder=folder)
    _stages.restore_fit(folder, res, command="simulate")
    pipeline.simulate_model(res, seed=seed, n=1, progress=not args.quiet)
    _stages.save_surrogate(folder, res)
    if not args.quiet:
        print(f"surrogate recording: {folder.file(_stages.MARKERS['simulate'])}")
    return 0


def _compare(args) -> int:
    from attractorfit import _stages, pipeline

    folder, cfg, seed = _stage_start(args, "compare")
    _check_cluster(args)
    res = _stage_data(args, folder, cfg, "compare", upto="fit")
    pipeline.simulate_model(res, seed=seed, n_jobs=args.jobs, progress=not args.quiet,
                            scheduler=args.scheduler, local_cluster=args.local_cluster)
    pipeline.compare_model(res, seed=seed, n_jobs=args.jobs, progress=not args.quiet)
    _stages.save_surrogate(folder, res, if_missing=True)  # what 'simulate' would write
    _stages.save_comparison(folder, res)
    if not _write_report(folder, res, _notices(args)):
        return 1
    if not args.quiet:
        _print_comparison(res.comparison.summary_block())
        print(f"report: {folder.file('report.html')}")
    return 0


def _report(args) -> int:
    import os

    from attractorfit import _stages

    folder, cfg, seed = _stage_start(args, "report")
    has_model = os.path.exists(folder.file(_stages.MARKERS["compare"]))
    res = _stage_data(args, folder, cfg, "report", upto="fit" if has_model else "states")
    title = "attractorfit: discrete states"
    if has_model:
        _stages.restore_comparison(folder, res, command="report")
        _stages.first_surrogate(folder, res, command="report")
        title = "attractorfit report"
    if not _write_report(folder, res, _notices(args), title=title):
        return 1
    if not args.quiet:
        print(f"report: {folder.file('report.html')}")
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
                          quiet=args.quiet, progress=not args.quiet, input_path=path,
                          load_options={}, notices=_notices(args))


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

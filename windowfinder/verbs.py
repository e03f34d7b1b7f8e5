"""The verbs of the command line: one ``cmd_*`` function per verb, each calling the Python API
(:class:`~windowfinder.study.Study` or a module below it) and printing a short summary; the parser and
``main`` are in :mod:`windowfinder.cli`. Results go to files under ``STUDY_DIR/out``.
"""

from __future__ import annotations

import json
import math
import sys
from pathlib import Path

from windowfinder.console import _levels, _print_cautions, _set_point, _warn, format_diagnostics
from windowfinder.errors import InputError


def _out(study, name: str) -> Path:
    from windowfinder.inputs.storage import ensure_folder

    return ensure_folder(study.out) / name


def _load(args):
    """The study, with the options that need no model checked first (no fit is wasted on a typo)."""
    from windowfinder.study import Study

    study = Study.load(args.study_dir)
    c = getattr(args, "confidence", None)
    if c is not None and not (math.isfinite(c) and 0.0 < c < 1.0):
        raise InputError(f"--confidence {c:g}: must lie strictly between 0 and 1, e.g. 0.95")
    if getattr(args, "fn", None) in _WRITES_OUT and study.out.exists() and not study.out.is_dir():
        raise InputError(f"{study.out}: exists but is not a folder; move it away so the output folder can "
                         "be created")
    return study


# -- verbs -----------------------------------------------------------------------------------------
def cmd_new(args):
    from windowfinder.template import create_study

    path = create_study(args.study_dir, example=args.example, name=args.name)
    print(f"created {path}")
    if (path.parent / "runs.csv").exists():
        print(f"with the example's runs.csv (simulated runs); next: 'windowfinder window {args.study_dir}'")
    else:
        print("next: edit the factors and responses, then 'windowfinder design "
              f"{args.study_dir} --method space-filling --runs 12'")


def cmd_check(args):
    study = _load(args)
    spec, runs = study.spec, study.runs
    _warn(runs.warnings)
    st = runs.status.value_counts()
    print(f"study: {spec.name}  ({study.dir / 'study.toml'})")
    print(f"factors ({spec.d}): " + ", ".join(
        (f"{f.name} [{' | '.join(f.levels)}]" if f.is_categorical else f"{f.name} [{f.low:g}, {f.high:g}] {f.unit}".rstrip())
        for f in spec.factors))
    for r in spec.responses:
        tag = " (safety)" if r.is_safety else ""
        print(f"response {r.name}: goal {r.goal}, limit {r.limit_text()}{tag}")
    for c in spec.constraints:
        print(f"constraint {c.name}: {c.text()}")
    print(f"runs: {len(runs)} in {runs.path.name if runs.path else 'runs.csv'} — "
          + ", ".join(f"{k} {st.get(k, 0)}" for k in ("done", "failed", "planned")))
    print("ok: study file and run table are valid")


def cmd_design(args):
    study = _load(args)
    frame = study.design(args.method, runs=args.runs, centre=args.centre, seed=args.seed,
                         blocks=args.blocks)
    from windowfinder.export.files import write_csv

    path = write_csv(_out(study, "design.csv"), frame)
    study.add_runs(frame)
    for note in frame.attrs.get("notes", []):
        print(f"note: {note}")
    print(f"{len(frame)} planned runs ({args.method}) appended to {study.runs_path}; copy in {path}")
    shown = ["run", *study.spec.factor_names, *(["block"] if "block" in frame else [])]
    print(frame[shown].to_string(index=False))


def cmd_fit(args):
    if args.model is not None:
        raise InputError(f"fit: --model is set per response in study.toml now, so that every verb uses "
                         f"it: add model = \"{args.model}\" (auto | gp | quadratic | linear) to each "
                         "[[response]]")
    study = _load(args)
    print(f"fitting {len(study.spec.responses)} models on {len(study.runs.completed())} runs ...",
          file=sys.stderr)
    res = study.fit(n_restarts=args.restarts)
    _warn(res.warnings)
    path = _out(study, "fit.json")
    from windowfinder.inputs.storage import write_atomic

    write_atomic(path, json.dumps(res.to_dict(), indent=2, allow_nan=False) + "\n")
    print(format_diagnostics(res, study.spec))
    print(f"diagnostics written to {path}")


def cmd_window(args):
    from windowfinder.answers.results import build_window, feasibility_of, fixed_levels
    from windowfinder.answers.windowchange import previous_note
    from windowfinder.export.files import window_document, window_table, write_window
    from windowfinder.export.provenance import provenance
    from windowfinder.export.record import compare, of_record, record_block

    study = _load(args)
    sp = _set_point(args.set_point, study.spec)
    levels = _levels(args.level, study.spec)
    fixed_levels(study.spec, sp, levels)   # a level given twice must agree: refused before the fit
    fit = study.fit()
    _warn(fit.warnings)
    print("searching for the largest window ...", file=sys.stderr)
    win = build_window(study.spec, fit, args.confidence, set_point=sp, mean_only=args.mean,
                       levels=levels)
    change = previous_note(study.spec, feasibility_of(study.spec, fit, args.mean),
                           _out(study, "window.json"), win, study.runs.done())
    prov = provenance(study, win.confidence, args.mean, fit)
    entry = of_record(study.out)
    cmp = None if entry is None else compare(entry, window_document(win, prov), study.spec)
    record = record_block(entry, window_document(win, prov), study.spec)
    paths = write_window(_out(study, ""), win, study.spec.name, prov, record)
    if entry is not None:
        print(f"window of record (verified {entry['verified_utc']}): {entry['verdict']}")
        print(cmp.text())
    print(window_table(win))
    if change:
        print(f"since the last window: {change}")
    if win.found:
        for p in win.predicted:
            print(f"  {p['response']:<16} predicted {p['low']:.4g} .. {p['high']:.4g} {p['unit']}"
                  f"  (95% PI {p['pi95_low']:.4g} .. {p['pi95_high']:.4g}; limit {p['limit']})")
    _print_cautions(win.cautions, win.safety)
    print("written: " + ", ".join(str(p) for p in paths))


def cmd_tradeoff(args):
    from windowfinder.answers.tradeofftable import build_tradeoff
    from windowfinder.export.files import write_csv
    from windowfinder.export.provenance import provenance, write_sidecar

    study = _load(args)
    fit = study.fit()
    _warn(fit.warnings)
    print("searching the trade-off front ...", file=sys.stderr)
    tr = build_tradeoff(study.spec, fit, args.confidence, mean_only=args.mean, pick=args.pick)
    path = write_csv(_out(study, "tradeoff.csv"), tr.frame)
    write_sidecar(path, provenance(study, tr.confidence, args.mean, fit))
    print(tr.message)
    pick = tr.pick
    if pick is not None:
        spec = study.spec
        print(f"balanced pick ({tr.pick_method}): " + ", ".join(
            (f"{f.name} = {pick[f.name]}" if f.is_categorical else f"{f.name} = {pick[f.name]:.4g} {f.unit}".rstrip())
            for f in spec.factors))
        for r in spec.responses:
            print(f"  {r.name:<16} {pick[r.name + '_pred']:.4g} {r.unit} (95% PI "
                  f"{pick[r.name + '_lo95']:.4g} .. {pick[r.name + '_hi95']:.4g})")
        print(f"  P(all limits met) = {pick['p_all_limits']:.3f}")
    _print_cautions(tr.cautions, study.spec.has_safety)
    print(f"written: {path} ({len(tr.frame)} settings)")


def cmd_suggest(args):
    from windowfinder.export.files import write_csv
    from windowfinder.export.provenance import provenance, write_sidecar

    study = _load(args)
    if args.count < 1:
        raise InputError(f"--count {args.count}: give at least 1")
    fit = study.fit()
    _warn(fit.warnings)
    print("choosing the next runs ...", file=sys.stderr)
    nxt = study.suggest(args.count, aim=args.aim, fit=fit, confidence=args.confidence)
    path = write_csv(_out(study, "next.csv"), nxt.frame)
    write_sidecar(path, provenance(study, args.confidence, False, fit))  # before the runs are appended
    study.add_runs(nxt.planned_rows(study.spec))
    cols = ["run", *study.spec.factor_names, "aim", "basis", "gain", "edge_score", "p_joint"]
    print(nxt.frame[cols].to_string(index=False, float_format=lambda v: f"{v:.4g}"))
    print(nxt.message)
    print(f"advice: {nxt.advice}")
    if study.spec.has_safety:
        from windowfinder.answers.results import CAUTION_SAFETY

        names = ", ".join(r.name for r in study.spec.limited if r.is_safety)
        print("CAUTION: " + CAUTION_SAFETY.format(names=names))
    print(f"written: {path}; {len(nxt.frame)} planned runs appended to {study.runs_path}")


def cmd_run(args):
    from windowfinder.campaign.commands import DEFAULT_RUN_TIMEOUT
    from windowfinder.campaign.loop import run_campaign

    if args.command is not None:
        limit = DEFAULT_RUN_TIMEOUT if args.run_timeout is None else args.run_timeout
        print("each run may take " + (f"up to {limit:g} s" if limit else "any time (no limit)")
              + " (--run-timeout S to change, 0 for no limit)", file=sys.stderr)
    res = run_campaign(args.study_dir, command=args.command, function=args.function, budget=args.budget,
                       initial=args.initial, batch=args.batch, workers=args.workers,
                       scheduler=args.scheduler, dask_local=args.dask_local, run_timeout=args.run_timeout,
                       aim=args.aim, progress=lambda line: print(line, file=sys.stderr, flush=True))
    print(f"{res.runs_done} completed runs of budget {res.budget} ({res.failed} failed) in "
          f"{res.batches} batches, {res.elapsed:.1f} s; {res.stopped}")
    for c in res.conflicts:
        print(f"note: {c}")
    print(f"next: 'windowfinder window {args.study_dir}' and 'windowfinder report {args.study_dir}'")


def cmd_report(args):
    import pandas as pd

    from windowfinder.answers.results import build_window
    from windowfinder.answers.tradeofftable import build_tradeoff
    from windowfinder.report import write_report

    study = _load(args)
    spec = study.spec
    fit = study.fit()
    _warn(fit.warnings)
    print("writing the report ...", file=sys.stderr)
    win = build_window(spec, fit, args.confidence) if spec.limited else None
    trade = build_tradeoff(spec, fit, args.confidence) if spec.goals else None
    nxt = study.out / "next.csv"
    suggestions = None
    if nxt.exists():
        planned = set(study.runs.planned()["run"])
        suggestions = pd.read_csv(nxt, dtype={"run": str})
        suggestions = suggestions[suggestions["run"].isin(planned)] if planned else None
    path = write_report(study, fit=fit, window=win, tradeoff=trade, suggestions=suggestions)
    if spec.has_safety and win is not None:
        print("CAUTION: " + win.cautions[0])
    print(f"report: {path}")


def _window_levels(study):
    """The levels out/window.json was fixed at (``window --level``), said on stderr; None if none."""
    try:
        fixed = json.loads((study.out / "window.json").read_text()).get("fixed_levels") or None
        _levels([f"{k}={v}" for k, v in fixed.items()], study.spec)   # still levels of this study
    except (OSError, ValueError, AttributeError, InputError):
        return None
    print("planning at " + ", ".join(f"{k}={v}" for k, v in fixed.items()) + " as out/window.json "
          "(window --level); give --level to plan elsewhere", file=sys.stderr)
    return fixed


def cmd_testplan(args):
    from windowfinder.answers.results import build_window
    from windowfinder.export.files import window_document, write_csv, write_json
    from windowfinder.export.provenance import provenance, write_sidecar
    from windowfinder.export.record import PLAN_WINDOW_FILE
    from windowfinder.answers.testplan import build_testplan

    study = _load(args)
    levels = _levels(args.level, study.spec) or _window_levels(study)
    fit = study.fit()
    win = build_window(study.spec, fit, args.confidence, levels=levels)
    if not win.supported:   # nothing to verify, and that is an answer, not bad input
        print(f"no test plan: {win.message}")
        _print_cautions(win.cautions[:1], study.spec.has_safety)
        return
    plan = build_testplan(study.spec, fit, win, study.runs.frame["run"], runs=args.runs)
    path = write_csv(_out(study, "testplan.csv"), plan.frame)
    prov = provenance(study, win.confidence, win.mean_only, fit)
    write_sidecar(path, prov)
    write_json(_out(study, PLAN_WINDOW_FILE), window_document(win, prov))
    print(plan.message)
    print(plan.frame[["run", "point", *study.spec.factor_names]].to_string(index=False))
    _print_cautions(win.cautions[:1], study.spec.has_safety)
    print(f"written: {path}; fill in the response columns, then 'windowfinder verify "
          f"{args.study_dir} {path}'")


def cmd_verify(args):
    from windowfinder.export.files import write_csv
    from windowfinder.export.record import PLAN_WINDOW_FILE, RECORD_FILE
    from windowfinder.answers.testplan import read_filled_plan, verify_plan

    study = _load(args)
    filled = read_filled_plan(args.file, study.spec)
    ver = verify_plan(study.spec, filled, study.runs.frame["run"])
    for c in ver.frame.to_dict("records"):
        flag = ("ok" if c["inside_interval"] else "outside 95% PI") + (
            "" if c["meets_limit"] else ", LIMIT BROKEN")
        print(f"{c['run']:<6} {c['response']:<16} {c['measured']:>10.4g}  "
              f"[{c['lo95']:.4g}, {c['hi95']:.4g}]  {flag}")
    path = write_csv(_out(study, "verification.csv"), ver.frame)
    entry = study.record_verification(ver, args.file)
    print(ver.verdict)
    if entry["window"] is None:
        print(f"note: no {PLAN_WINDOW_FILE} beside the plan or in out/, so no window was recorded; the "
              "verdict is in record.json and verification.csv")
    elif entry["confirmed"]:
        print(f"window of record: the verified window, frozen in {study.out / RECORD_FILE}; later refits "
              "are shown beside it")
    print(f"written: {path}; {len(ver.results)} runs appended to {study.runs_path}")


def cmd_record(args):
    study = _load(args)
    rec = study.record_file(args.file, replace=args.replace)
    _warn(study.runs.warnings)
    print(f"recorded {rec.values} values for {len(rec.runs)} runs ({rec.failed} failed) in "
          f"{study.runs_path}")
    left = len(study.runs.planned())
    print(f"{left} runs still planned" + ("" if left else f"; next: 'windowfinder fit {args.study_dir}'"))


def cmd_verified(args):
    from windowfinder.export.record import RECORD_FILE, read_record

    study = _load(args)
    rec = read_record(study.out)
    if rec is None:
        print(f"no window of record: nothing verified yet ('windowfinder testplan {args.study_dir}', run "
              f"the plan, then 'windowfinder verify {args.study_dir} FILE')")
        return
    entry = rec["of_record"]
    if entry is None:
        print("no window of record: no verification confirmed a window yet")
    else:
        w = entry["window"]
        print(f"window of record, verified {entry['verified_utc']} with {entry['runs']} runs "
              f"(plan {entry['plan']}, sha256 {entry['plan_sha256'][:12]}...): {entry['verdict']}")
        for f in w["factors"]:
            print(f"  {f['name']:<16} levels {', '.join(f['levels'])}" if "levels" in f else
                  f"  {f['name']:<16} {f['low']:.5g} .. {f['high']:.5g} {f['unit']}")
        print(f"  confidence {w['confidence']:g} for {w['provenance']['confidence_applies_to']}; "
              f"lowest P(all limits met) inside {w['min_probability']:.3f}")
    last = rec["history"][-1]
    if last is not entry and last != entry:
        print(f"latest verification ({last['verified_utc']}): {last['verdict']}")
    print(f"{len(rec['history'])} verification(s) in {study.out / RECORD_FILE}")


def cmd_controlplan(args):
    from windowfinder.export.controlplan import write_control_plan
    from windowfinder.export.provenance import provenance, write_sidecar

    study = _load(args)
    fit = study.fit()
    _warn(fit.warnings)
    frame, source = study.control_plan(fit, args.confidence)
    paths = write_control_plan(study.out, frame)
    write_sidecar(paths[0], {**provenance(study, args.confidence, False, fit), "window": source})
    print(f"control plan of the {source}")
    cols = ["name", "unit", "set_point", "low", "high", "tolerance", "guard_low", "guard_high"]
    print(frame.loc[frame["item"] == "factor", cols].to_string(index=False, float_format=lambda v: f"{v:.4g}"))
    cols = ["name", "limit_min", "limit_max", "predicted_low", "predicted_high", "ppm_out_at_set_point",
            "ppm_out_at_worst_point", "cpk_at_set_point", "ppk_at_set_point"]
    print(frame.loc[frame["item"] == "response", cols].to_string(index=False, na_rep="-",
                                                                 float_format=lambda v: f"{v:.4g}"))
    print("note: ppm and capability come from the models' predictive distribution, not from measured "
          "production data; confirm them with runs at scale")
    if study.spec.has_safety:
        from windowfinder.answers.results import CAUTION_SAFETY

        print("CAUTION: " + CAUTION_SAFETY.format(names=", ".join(r.name for r in study.spec.limited
                                                                 if r.is_safety)))
    print("written: " + ", ".join(str(p) for p in paths))


# verbs that write under out/: a file in its place is refused before any model is fitted
_WRITES_OUT = (cmd_design, cmd_fit, cmd_window, cmd_tradeoff, cmd_suggest, cmd_report, cmd_testplan, cmd_verify,
               cmd_controlplan)

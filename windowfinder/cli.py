"""Command line: ``windowfinder VERB STUDY_DIR [options]``, a thin shell over :class:`Study`.

This module builds the argument parser and runs a verb under the study lock; the verbs themselves
(``cmd_*``) are in :mod:`windowfinder.verbs`, their terminal helpers in :mod:`windowfinder.console`.

Exit codes: 0 success, 2 bad input (one line on stderr, nothing written), 1 internal error.
Results go to files under ``STUDY_DIR/out``; a short summary goes to stdout, progress to stderr.
"""

from __future__ import annotations

import argparse
import os
import sys

from windowfinder.errors import InputError
from windowfinder.verbs import (cmd_check, cmd_controlplan, cmd_design, cmd_fit, cmd_new, cmd_record,
                                cmd_report, cmd_run, cmd_suggest, cmd_testplan, cmd_tradeoff, cmd_verified,
                                cmd_verify, cmd_window)


class _Parser(argparse.ArgumentParser):
    def error(self, message):  # one line + exit 2, like every other bad input
        raise InputError(f"{self.prog}: {message} (see --help)")


# -- parser ----------------------------------------------------------------------------------------
def build_parser() -> argparse.ArgumentParser:
    from windowfinder.inputs.designs import METHODS

    p = _Parser(prog="windowfinder",
                description="Process windows with stated confidence from few, expensive runs.")
    sub = p.add_subparsers(dest="verb", required=True, parser_class=_Parser, metavar="VERB")

    def verb(name, fn, help_):
        s = sub.add_parser(name, help=help_, description=help_)
        s.add_argument("study_dir", metavar="STUDY_DIR", help="folder holding study.toml and runs.csv")
        s.set_defaults(fn=fn)
        return s

    s = verb("new", cmd_new, "create a study folder from a template or a bundled example")
    s.add_argument("--example", help="copy a bundled example case (reactor, spotweld, ...)")
    s.add_argument("--name", help="study name for the template")
    verb("check", cmd_check, "validate study.toml and runs.csv and summarise them")
    s = verb("design", cmd_design, "append an initial design of planned runs to runs.csv")
    s.add_argument("--method", default="space-filling", choices=METHODS)
    s.add_argument("--runs", type=int, help="number of runs (space-filling, sobol)")
    s.add_argument("--centre", type=int,
                   help="extra replicated centre runs (default 1 for box-behnken and rotatable ccd, else 0)")
    s.add_argument("--seed", type=int, help="random seed (default: the study's)")
    s.add_argument("--blocks", type=int,
                   help="spread the runs over this many blocks (days, lots): a block column B1, B2, ...")
    s = verb("fit", cmd_fit, "fit one model per response and print leave-one-out diagnostics")
    s.add_argument("--model", help=argparse.SUPPRESS)  # moved to study.toml; refused with a pointer
    s.add_argument("--restarts", type=int, default=5, help="optimizer restarts for the GP")
    s = verb("window", cmd_window, "find the largest window where every limit holds with confidence")
    s.add_argument("--confidence", type=float, help="default: the study's confidence")
    s.add_argument("--set-point", nargs="+", metavar="NAME=VALUE",
                   help="widest symmetric ranges around this set point (give every factor)")
    s.add_argument("--level", nargs="+", metavar="FACTOR=LEVEL",
                   help="fix a categorical factor's level (the window then holds at that level)")
    s.add_argument("--mean", action="store_true",
                   help="judge the process mean instead of each new run (excludes run-to-run noise)")
    s = verb("tradeoff", cmd_tradeoff, "find the best trade-off between the goals inside the limits")
    s.add_argument("--confidence", type=float, help="default: the study's confidence")
    s.add_argument("--pick", choices=("knee", "desirability"), default="knee",
                   help="how the balanced pick is chosen")
    s.add_argument("--mean", action="store_true", help="chance constraint on the process mean")
    s = verb("suggest", cmd_suggest, "propose the next batch of runs and append them as planned")
    s.add_argument("--count", type=int, default=4, help="runs in the batch (default 4)")
    s.add_argument("--aim", choices=("window", "tradeoff", "balanced"), default="balanced")
    s.add_argument("--confidence", type=float, help="default: the study's confidence")
    s = verb("run", cmd_run, "closed-loop campaign: suggest, evaluate, append, refit until the budget")
    g = s.add_mutually_exclusive_group(required=True)
    g.add_argument("--command", help='program run per batch, e.g. "python sim.py {in} {out}" (no shell)')
    g.add_argument("--function", help="Python callable module:function(settings) -> responses")
    s.add_argument("--budget", type=int, required=True, help="completed runs to end with")
    s.add_argument("--initial", type=int, help="space-filling runs first (default 10 per factor)")
    s.add_argument("--batch", type=int, default=1, help="runs proposed per batch")
    s.add_argument("--aim", choices=("window", "tradeoff", "balanced"), default="balanced")
    s.add_argument("--workers", type=int, help="local worker processes (default: cores)")
    s.add_argument("--scheduler", help="address of an existing Dask scheduler, tcp://host:port")
    s.add_argument("--dask-local", type=int, metavar="N", help="start a local Dask cluster of N workers")
    s.add_argument("--run-timeout", type=float, metavar="S",
                   help="seconds one command may run (default 3600; 0: no limit)")
    s = verb("report", cmd_report, "write one self-contained HTML report (out/report.html)")
    s.add_argument("--confidence", type=float, help="default: the study's confidence")
    s = verb("testplan", cmd_testplan, "plan verification runs inside the window")
    s.add_argument("--runs", type=int, help="number of runs (default: centre x3 + corners)")
    s.add_argument("--level", nargs="+", metavar="FACTOR=LEVEL",
                   help="plan at this level (default: the level window --level fixed in out/window.json)")
    s.add_argument("--confidence", type=float, help="default: the study's confidence")
    s = verb("verify", cmd_verify, "judge a filled-in test plan and append its runs to runs.csv")
    s.add_argument("file", metavar="FILE", help="the filled-in testplan.csv")
    s = verb("record", cmd_record, "merge measured results into their planned runs in runs.csv, by run id")
    s.add_argument("file", metavar="FILE", help="CSV with a run column and measured response columns "
                   "(optional status: done or failed, note)")
    s.add_argument("--replace", action="store_true",
                   help="allow overwriting a value or status already recorded in runs.csv")
    verb("verified", cmd_verified, "show the window of record (the last verified window) and its verdict")
    s = verb("controlplan", cmd_controlplan,
             "write out/controlplan.csv (+ .xlsx): set points, ranges, limits, ppm out, Cpk/Ppk")
    s.add_argument("--confidence", type=float, help="when no window is of record: default the study's")
    return p


def main(argv=None) -> int:
    try:
        args = build_parser().parse_args(argv)
        if args.verb in ("new", "check"):
            args.fn(args)
            return 0
        from windowfinder.inputs.lock import StudyLock

        with StudyLock(args.study_dir) as lock:
            if lock.stale_pid_:
                print(f"note: took over a stale lock of pid {lock.stale_pid_} (that process is gone)",
                      file=sys.stderr)
            args.fn(args)
        return 0
    except InputError as e:
        print(f"windowfinder: {e}", file=sys.stderr)
        return InputError.exit_code
    except KeyboardInterrupt:
        print("windowfinder: interrupted", file=sys.stderr)
        return 130
    except Exception as e:  # internal error: one line unless debugging
        if os.environ.get("WINDOWFINDER_DEBUG"):
            raise
        print(f"windowfinder: internal error: {type(e).__name__}: {e} "
              "(set WINDOWFINDER_DEBUG=1 for details)", file=sys.stderr)
        return 1


if __name__ == "__main__":
    sys.exit(main())

"""Evaluating a run with an external command: the file protocol, the supervisor and its cleanup.

A :class:`CommandEvaluator` is a picklable callable ``evaluator(run, settings, seed) -> RunOutcome``
(:mod:`windowfinder.campaign.evaluators`); it never raises for a run that goes wrong.

Command protocol
----------------
The command line is split with :func:`shlex.split` and run without a shell (a ``;`` or ``$(...)`` in it
is passed to the program as text, never executed). ``{in}`` and ``{out}`` in any argument are replaced by
the paths of two CSV files in a fresh temporary folder, which is also the working folder of the program:

* ``{in}`` holds a header and one or more rows: ``run`` and one column per factor (natural units).
  The campaign currently sends one run per call; a command should handle any number of rows.
* ``{out}`` must be written by the command: ``run`` and response columns, one row per input run, and
  optionally ``status`` (``done`` | ``failed``) and ``note`` so the program can report a failed run
  itself. A response column that is absent or a cell that is blank means "not measured"; a row with
  every response blank is a failed run. A column that is not a response of the study, a cell that is
  not a number, or a missing row makes the run failed with a note naming the problem.

An argument that names an existing file relative to the current folder (``python sim.py {in} {out}``)
is made absolute, because the program runs in its temporary folder.

Each command runs under a small supervisor process (plain Python, standard library only) at the head of
a process group of its own. When a run times out, or the campaign is aborted, the whole group is killed:
the command and anything it started. When the campaign process dies, even by SIGKILL, the supervisor
notices (Linux ``PR_SET_PDEATHSIG``, and a poll of its parent elsewhere) and kills the group, so no
simulator is left running whose result nobody would record. A run may take at most
:data:`DEFAULT_RUN_TIMEOUT` seconds unless ``timeout`` says otherwise (``0``: no limit). Temporary folders
are named ``windowfinder-run-<pid>-*``; folders of a campaign process that no longer exists are removed
when the next command evaluator starts.
"""

from __future__ import annotations

import csv
import io
import math
import os
import re
import shlex
import shutil
import signal
import subprocess
import sys
import tempfile
import threading
from collections.abc import Sequence
from pathlib import Path

from windowfinder.campaign.evaluators import RunOutcome, one_line, outcome_from_values
from windowfinder.errors import InputError
from windowfinder.inputs.lock import process_alive

# A run that takes longer than an hour is taken for a hung simulator unless --run-timeout says more
# (common practice, no source).
DEFAULT_RUN_TIMEOUT = 3600.0
FOLDER_PREFIX = "windowfinder-run-"
_EXTRA_OUT = ("run", "status", "note")


_ACTIVE: set = set()
_ACTIVE_LOCK = threading.Lock()


def stop_commands() -> None:
    """Kill the process groups of commands still running in this process (on an aborted campaign)."""
    with _ACTIVE_LOCK:
        procs = list(_ACTIVE)
    for proc in procs:
        _kill(proc)


def _kill(proc: subprocess.Popen) -> None:
    try:
        if hasattr(os, "killpg"):
            os.killpg(proc.pid, signal.SIGKILL)  # the command and anything it started
        else:  # pragma: no cover - Windows
            proc.kill()
    except (ProcessLookupError, PermissionError):
        pass


# The supervisor: started in a new session (its pid is the group id), it runs the command in its group,
# kills the group when its parent (the campaign) dies, and passes on the command's exit status.
SUPERVISOR = r"""
import ctypes, os, signal, subprocess, sys, threading, time
parent = int(sys.argv[1])
def end(*_):
    os.killpg(0, signal.SIGKILL)
signal.signal(signal.SIGTERM, end)
try:
    ctypes.CDLL(None, use_errno=True).prctl(1, signal.SIGTERM)  # PR_SET_PDEATHSIG
except Exception:
    pass
def watch():
    while os.getppid() == parent:
        time.sleep(0.5)
    end()
threading.Thread(target=watch, daemon=True).start()
if os.getppid() != parent:
    end()
code = subprocess.Popen(sys.argv[2:], stdin=subprocess.DEVNULL).wait()
if code < 0:
    signal.signal(-code, signal.SIG_DFL)
    os.kill(os.getpid(), -code)
sys.exit(code)
"""


def clean_stale_folders(root=None) -> int:
    """Remove ``windowfinder-run-<pid>-*`` temporary folders of campaign processes that are gone."""
    root = Path(root or tempfile.gettempdir())
    removed = 0
    try:
        entries = list(os.scandir(root))
    except OSError:
        return 0
    for e in entries:
        m = re.fullmatch(re.escape(FOLDER_PREFIX) + r"(\d+)-.*", e.name)
        if m and e.is_dir(follow_symlinks=False) and not process_alive(int(m.group(1))):
            shutil.rmtree(e.path, ignore_errors=True)
            removed += 1
    return removed


def _program_problem(program: str) -> str:
    """Why ``program`` cannot be started ('' when it can): not found, or not executable."""
    if shutil.which(program):
        return ""
    if os.sep in program and os.path.exists(program):
        return f"command: program '{program}' is not executable (permission denied)"
    return f"command: program '{program}' not found; check the path or install it"


def _absolute(arg: str, program: bool) -> str:
    """``arg`` made absolute when it names an existing relative path (a bare program name is kept)."""
    if "{in}" in arg or "{out}" in arg or os.path.isabs(arg) or (program and os.sep not in arg):
        return arg
    return str(Path(arg).resolve()) if Path(arg).exists() else arg


def _last_line(path: Path) -> str:
    try:
        lines = [ln for ln in path.read_text(errors="replace").splitlines() if ln.strip()]
    except OSError:
        return ""
    return one_line(lines[-1], 160) if lines else ""


class CommandEvaluator:
    """Evaluate runs with an external program (see the module docstring for the file protocol).

    Parameters
    ----------
    command : str
        Command line holding ``{in}`` and ``{out}``, split with :func:`shlex.split`, run without a shell.
    factors, responses : sequence of str
        Factor and response names of the study, in study order.
    timeout : float or None
        Seconds a run may take (default :data:`DEFAULT_RUN_TIMEOUT`; ``0`` for no limit); the command
        (its whole process group) is then stopped and the run recorded as failed.
    """

    def __init__(self, command: str, factors: Sequence[str], responses: Sequence[str],
                 timeout: float | None = None):
        try:
            argv = shlex.split(str(command))
        except ValueError as e:
            raise InputError(f"--command: cannot split '{command}' ({e}); check the quotes") from None
        if not argv:
            raise InputError("--command is empty; give a program and its arguments with {in} and {out}")
        text = " ".join(argv)
        for key in ("{in}", "{out}"):
            if key not in text:
                raise InputError(f"--command '{command}': {key} is missing; the program reads the settings "
                                 "from {in} and writes the responses to {out}")
        if timeout is None:
            timeout = DEFAULT_RUN_TIMEOUT
        if isinstance(timeout, bool) or not isinstance(timeout, (int, float)) or not (
                timeout >= 0 and math.isfinite(timeout)):
            raise InputError(f"--run-timeout {timeout}: must be a number of seconds > 0 (0: no limit)")
        clean_stale_folders()
        self.argv = [_absolute(a, program=(i == 0)) for i, a in enumerate(argv)]
        self.factors = list(factors)
        self.responses = list(responses)
        self.timeout = float(timeout) or None

    def __call__(self, run: str, settings: dict, seed: int | None = None) -> RunOutcome:
        with tempfile.TemporaryDirectory(prefix=f"{FOLDER_PREFIX}{os.getpid()}-") as tmp:
            folder = Path(tmp)
            inp, out = folder / "in.csv", folder / "out.csv"
            buf = io.StringIO()
            w = csv.writer(buf, lineterminator="\n")
            w.writerow(["run", *self.factors])
            w.writerow([run, *(settings[f] if isinstance(settings[f], str) else repr(float(settings[f]))
                               for f in self.factors)])   # a categorical factor by its level name
            inp.write_text(buf.getvalue(), encoding="utf-8")
            argv = [a.replace("{in}", str(inp)).replace("{out}", str(out)) for a in self.argv]
            failure = self._execute(argv, folder)
            if failure:
                return RunOutcome.failed(run, failure)
            return self.read_output(out, run)

    def _execute(self, argv: list[str], folder: Path) -> str:
        """Run the program; return '' on exit code 0, else the reason it failed."""
        err_path = folder / "stderr.txt"
        program = self.argv[0]
        problem = _program_problem(program)
        if problem:
            return problem
        with open(folder / "stdout.txt", "wb") as so, open(err_path, "wb") as se:
            try:
                proc = subprocess.Popen([sys.executable, "-I", "-c", SUPERVISOR, str(os.getpid()), *argv],
                                        stdin=subprocess.DEVNULL, stdout=so, stderr=se, cwd=folder,
                                        start_new_session=True)
            except OSError as e:
                return f"command: cannot start '{program}' ({e})"
            with _ACTIVE_LOCK:
                _ACTIVE.add(proc)
            try:
                code = proc.wait(timeout=self.timeout)
            except subprocess.TimeoutExpired:
                _kill(proc)
                proc.wait()
                return f"command timed out after {self.timeout:g} s and was stopped"
            finally:
                with _ACTIVE_LOCK:
                    _ACTIVE.discard(proc)
        if code != 0:
            last = _last_line(err_path)
            how = f"was killed by signal {-code}" if code < 0 else f"exited with code {code}"
            return f"command {how}" + (f": {last}" if last else " (no message on stderr)")
        return ""

    def read_output(self, path: Path, run: str) -> RunOutcome:
        """Parse the ``{out}`` file of one run."""
        if not path.exists():
            return RunOutcome.failed(run, "command exited 0 but wrote no output file {out}")
        try:
            text = path.read_bytes().decode("utf-8-sig")
            rows = [r for r in csv.reader(io.StringIO(text)) if any(c.strip() for c in r)]
        except (UnicodeDecodeError, csv.Error) as e:
            return RunOutcome.failed(run, f"command output is not a readable CSV ({type(e).__name__})")
        if not rows:
            return RunOutcome.failed(run, "command output is empty; expected a header and one row per run")
        header = [c.strip() for c in rows[0]]
        bad = [c for c in header if c not in self.responses and c not in _EXTRA_OUT]
        if "run" not in header or bad or len(set(header)) != len(header):
            what = (f"column '{bad[0]}' is not a response" if bad else
                    "no 'run' column" if "run" not in header else "a column appears twice")
            return RunOutcome.failed(run, f"command output is malformed: {what}; expected run and "
                                          f"response columns ({', '.join(self.responses)})")
        mine = [r for r in rows[1:] if len(r) > header.index("run") and r[header.index("run")].strip() == run]
        if len(mine) != 1:
            return RunOutcome.failed(run, f"command output is malformed: {len(mine)} rows for run {run} "
                                          "(expected one)")
        cells = mine[0]
        if len(cells) != len(header):
            return RunOutcome.failed(run, f"command output is malformed: {len(cells)} cells in the row of "
                                          f"run {run} but {len(header)} columns")
        rec = dict(zip(header, (c.strip() for c in cells)))
        status = rec.pop("status", "").lower() or "done"
        note = rec.pop("note", "")
        rec.pop("run")
        if status == "failed":
            return RunOutcome.failed(run, f"command reported failed: {note}" if note else
                                     "command reported failed")
        if status != "done":
            return RunOutcome.failed(run, f"command output is malformed: status '{status}' (use done or "
                                          "failed)")
        outcome = outcome_from_values(run, rec, self.responses, "command")
        if note and outcome.status == "done":
            return RunOutcome(outcome.run, "done", outcome.responses,
                              one_line("; ".join(filter(None, [note, outcome.note]))))
        return outcome


__all__ = ["DEFAULT_RUN_TIMEOUT", "FOLDER_PREFIX", "CommandEvaluator", "clean_stale_folders", "stop_commands"]

"""A new study folder: the commented study-file template, or a bundled case copied with its example runs.

:func:`create_study` (the ``new`` verb) never overwrites: an existing study.toml is refused.
"""

from __future__ import annotations

import os
from pathlib import Path

from windowfinder.errors import InputError
from windowfinder.inputs.names import toml_string
from windowfinder.inputs.storage import ensure_folder, readable_file, write_atomic
from windowfinder.study import RUNS_FILE, STUDY_FILE

TEMPLATE = """\
# windowfinder study file. Units live here, not in the run table's headers.
[study]
name = {name}
confidence = 0.95     # confidence for windows and feasibility
seed = 1              # same inputs + seed -> same outputs

[[factor]]            # one table per setting you control; order = column order everywhere
name = "temperature"
unit = "degC"
low = 40.0
high = 90.0
step = 0.5            # optional: settable resolution
tolerance = 1.0       # optional: +- how tightly operations hold it

[[factor]]
name = "time"
unit = "min"
low = 30.0
high = 180.0
step = 5.0

# [[factor]]          # a choice, not a number: two or more named levels, no low/high (runs.csv holds
# name = "solvent"    # the names); level combinations of all such factors at most 16 (docs/guide.md)
# levels = ["toluene", "heptane", "xylene"]

# [[constraint]]      # settings that must never be run: a linear limit on numeric factors, natural units
# name = "heat input"
# terms = {{ temperature = 1.0, time = 0.2 }}   # 1.0 * temperature + 0.2 * time
# max = 110.0         # min and/or max

[[response]]          # one table per measured result
name = "yield"
unit = "%"
goal = "maximize"     # maximize | minimize | target | none
min = 80.0            # optional lower limit
kind = "quality"      # quality | safety

[[response]]
name = "impurity"
unit = "%"
goal = "minimize"
max = 2.0
transform = "log"     # none | log | logit (logit needs bounds = [low, high])
"""



def create_study(directory, example: str | None = None, name: str | None = None) -> Path:
    """Create a study folder from the template or a bundled example (never overwrites).

    An example brings its study.toml, README.md and example runs.csv (12 simulated space-filling runs).
    """
    directory = Path(directory)
    target = directory / STUDY_FILE
    if os.path.lexists(target) or readable_file(target, "study file"):
        raise InputError(f"{target}: already exists; choose a new folder (nothing was changed)")
    if example is not None:
        from windowfinder import cases

        names = cases.list_cases()
        if example not in names:
            raise InputError(f"--example '{example}' unknown; bundled examples: {', '.join(names)}")
        src = cases.case_dir(example)
        ensure_folder(directory, "study folder")
        write_atomic(target, (src / STUDY_FILE).read_text(encoding="utf-8"))
        for extra in ("README.md", RUNS_FILE):  # the scenario and its example runs (a space-filling start)
            if (src / extra).exists() and not os.path.lexists(directory / extra):
                write_atomic(directory / extra, (src / extra).read_text(encoding="utf-8"))
        return target
    ensure_folder(directory, "study folder")
    write_atomic(target, TEMPLATE.format(name=toml_string(name or directory.name)))
    return target

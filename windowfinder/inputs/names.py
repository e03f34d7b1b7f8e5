"""Which factor and response names are allowed, and how text is written into a TOML file.

A name becomes a column header in every table the tool writes (runs.csv, design.csv, next.csv,
tradeoff.csv, testplan.csv, verification.csv), a key in window.json, a cell of window.md and a label in the
report. So that every accepted name round-trips through all of them, a name must be

* printable on one line: no newline, tab or other control or format character (``str.isprintable``);
* without leading or trailing spaces: CSV readers and spreadsheets commonly trim them, so such a name
  would not come back as written;
* free of a leading ``= + - @``: a spreadsheet would take such a header for a formula
  (OWASP "CSV Injection"); the tables would have to alter it;
* not one of the columns the tool adds (:data:`RESERVED`), nor end with a suffix the tool appends to a
  response name (:data:`RESERVED_SUFFIXES`, e.g. ``yield_pred``), compared without regard to case.

Commas, quotes, ``$``, ``<``, spaces inside and any printable Unicode are fine: the csv module quotes
them, HTML and Markdown are escaped, figure labels are drawn as plain text.
"""

from __future__ import annotations

# Columns the tool writes besides factor and response names, in any file (runs.csv: run, status, note,
# block; next.csv; tradeoff.csv; testplan.csv; verification.csv).
RESERVED = ("run", "status", "failed_limit", "note", "block", "point", "aim", "basis", "gain", "edge_score",
            "p_joint", "replicate", "repeats", "p_all_limits", "balanced_pick", "response", "measured", "lo95", "hi95",
            "inside_interval", "meets_limit")
RESERVED_SUFFIXES = ("_pred", "_predicted", "_lo95", "_hi95")
FORMULA_START = ("=", "+", "-", "@")
MAX_NAME = 80  # longest name: a column header and a figure label (common practice, no source)


def name_problem(name: str) -> str | None:
    """Why ``name`` cannot be a factor or response name, or None when it can (see the module doc)."""
    if not name.isprintable():
        bad = next(c for c in name if not c.isprintable())
        return (f"name {name!r} holds the control character {bad!r} (U+{ord(bad):04X}); names must be "
                "printable text on one line")
    if name != name.strip():
        return (f"name {name!r} begins or ends with a space, which tables and spreadsheets trim; remove "
                "the space")
    if len(name) > MAX_NAME:
        return f"name {name[:20]!r}... is {len(name)} characters long; keep names to {MAX_NAME}"
    if name.startswith(FORMULA_START):
        return (f"name '{name}' starts with '{name[0]}', which spreadsheets read as a formula; start it "
                "with a letter or digit")
    low = name.lower()
    if low in RESERVED:
        return (f"name '{name}' is reserved for a column the tool writes (reserved: "
                + ", ".join(RESERVED) + "); choose another")
    for suffix in RESERVED_SUFFIXES:
        if low.endswith(suffix):
            return (f"name '{name}' ends in '{suffix}', which the tool appends to response names in its "
                    "tables; choose another")
    return None


def toml_string(text: str) -> str:
    """``text`` as a TOML basic string, quotes included (TOML v1.0.0, "String": backslash, quote and
    every control character escaped, the latter as ``\\uXXXX``)."""
    out = []
    for c in str(text):
        if c == "\\":
            out.append("\\\\")
        elif c == '"':
            out.append('\\"')
        elif ord(c) < 0x20 or ord(c) == 0x7F:
            out.append(f"\\u{ord(c):04X}")
        else:
            out.append(c)
    return '"' + "".join(out) + '"'


__all__ = ["FORMULA_START", "RESERVED", "RESERVED_SUFFIXES", "name_problem", "toml_string"]

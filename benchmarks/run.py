"""``make bench``: run every benchmark section and write docs/benchmarks.md.

Each section module has ``main(quick: bool) -> str`` returning Markdown (and printing its figures as it
goes). ``--quick`` runs reduced sizes for a smoke check; the published tables come from the full run.
Usage: ``python -m benchmarks.run [--quick] [--only NAME ...]``.
"""

from __future__ import annotations

import windowfinder  # noqa: F401  (first: it holds BLAS to one thread before numpy loads)

import argparse
import importlib
import platform
import sys
import time
from pathlib import Path

SECTIONS = ("speed", "sample_efficiency", "window_rules", "noise", "model_choice", "scale", "failures",
            "window_search", "calibration")


def main(argv=None) -> int:
    p = argparse.ArgumentParser(prog="python -m benchmarks.run")
    p.add_argument("--quick", action="store_true", help="reduced sizes (smoke check)")
    p.add_argument("--only", nargs="+", choices=SECTIONS)
    p.add_argument("--out", default="docs/benchmarks.md")
    args = p.parse_args(argv)
    import numpy, scipy, sklearn  # noqa: E401 - versions for the record

    head = [
        "# Benchmarks",
        "",
        "Written by `make bench` (`python -m benchmarks.run`); every figure below was measured in that run.",
        f"Machine: {platform.machine()}, {platform.processor() or 'cpu'}, Python {platform.python_version()}, "
        f"numpy {numpy.__version__}, scipy {scipy.__version__}, scikit-learn {sklearn.__version__}"
        f"{' (quick mode: reduced sizes)' if args.quick else ''}.",
        "",
    ]
    parts = []
    for name in args.only or SECTIONS:
        t0 = time.perf_counter()
        print(f"== {name}", file=sys.stderr, flush=True)
        mod = importlib.import_module(f"benchmarks.{name}")
        parts.append(mod.main(quick=args.quick))
        print(f"== {name} done in {time.perf_counter() - t0:.0f} s", file=sys.stderr, flush=True)
    out = Path(args.out)
    if args.only and out.exists():  # keep the other sections of an earlier full run
        text = out.read_text()
        for name, part in zip(args.only, parts):
            start, end = f"<!-- section:{name} -->", f"<!-- /section:{name} -->"
            if start in text:
                a, b = text.index(start), text.index(end) + len(end)
                text = text[:a] + f"{start}\n{part}\n{end}" + text[b:]
            else:
                text += f"\n{start}\n{part}\n{end}\n"
    else:
        text = "\n".join(head) + "".join(
            f"\n<!-- section:{n} -->\n{part}\n<!-- /section:{n} -->\n"
            for n, part in zip(args.only or SECTIONS, parts))
    out.write_text(text)
    print(f"written {out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())

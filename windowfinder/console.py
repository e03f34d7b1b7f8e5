"""What the verbs read from and print to the terminal: ``NAME=VALUE`` options, the diagnostics table,
warnings and cautions (one line each). Used by :mod:`windowfinder.verbs`; no files, no fits.
"""

from __future__ import annotations

import math
import sys

from windowfinder.errors import InputError


def _warn(lines):
    for w in lines:
        print(f"warning: {w}", file=sys.stderr)


def _level_text(res, d, f) -> str:
    """How strongly the levels of categorical factor ``f`` correlate at equal numeric settings.

    Two levels (one 0/1 column, length scale l): the kernel's Matern at distance ``1 / l``; more levels
    (one-hot columns, one length scale per level): for levels a, b the Matern at
    ``sqrt(1/l_a^2 + 1/l_b^2)`` (the restricted level correlations of Qian, Wu & Wu 2008, Technometrics
    50(3), section 2; docs/methods.md, categorical factors). Noted when every level's length scale sits
    at the length-scale prior's mode: then the prior, not the runs, set the figure.
    """
    import itertools

    import numpy as np

    from windowfinder.models.gp import LENGTH_PRIOR, LENGTH_PRIOR_MAX_RUNS
    from windowfinder.models.likelihood import matern_and_slope

    nu = getattr(res.surrogates.models[d.response], "nu", 2.5)

    def corr(r):
        return float(matern_and_slope(np.array([r]), nu, slope=False)[0][0])

    if len(f.levels) == 2:
        scales = [d.length_scales[f.name]]
        text = f"{f.name}: levels correlate {corr(1.0 / scales[0]):.2f}"
    else:
        ls = {v: d.length_scales[f"{f.name}[{v}]"] for v in f.levels}
        scales = list(ls.values())
        text = f"{f.name}: levels correlate " + ", ".join(
            f"{a}~{b} {corr(float(np.hypot(1.0 / ls[a], 1.0 / ls[b]))):.2f}"
            for a, b in itertools.combinations(f.levels, 2))
    mode = (LENGTH_PRIOR[0] - 1.0) / LENGTH_PRIOR[1]      # Gamma(a, b): mode (a - 1) / b
    if d.n <= LENGTH_PRIOR_MAX_RUNS and all(abs(v - mode) <= 0.02 * mode for v in scales):
        text += f" (length scale{'s' if len(scales) > 1 else ''} at the prior's mode {mode:.3g}: the runs " \
                "did not decide)"
    return text


def format_diagnostics(res, spec) -> str:
    """Plain-text diagnostics table: one line per response."""
    from windowfinder.models.choice import ModelChoice

    lines = ["Q2 and RMSE on the model's scale (log / logit of a transformed response), RMSE in natural "
             "units beside",
             f"{'response':<16} {'model':<9} {'scale':<7} {'n':>3} {'LOO Q2':>7} {'LOO RMSE':>9} "
             f"{'natural RMSE':>16} {'cover95':>8}  length scales (factor units)"]
    cats = {spec.factors[j].name: spec.factors[j] for j in spec.categorical}
    for d in res.diagnostics:
        unit = spec.response(d.response).unit
        owner = {k: k.partition("[")[0] for k in d.length_scales}   # flux[chloride] -> flux
        ls = ", ".join([f"{k}={v:.3g}" for k, v in d.length_scales.items() if owner[k] not in cats]
                       + [_level_text(res, d, f) for name, f in cats.items()
                          if name in owner.values()]) or "-"
        lines.append(f"{d.response:<16} {d.model:<9} {d.scale:<7} {d.n:>3} {d.loo_q2:>7.2f} "
                     f"{d.loo_rmse:>9.3g} {d.loo_rmse_natural:>12.3g} {unit:<3} {d.coverage95:>8.0%}  {ls}")
    for d in res.diagnostics:
        if d.block_offsets:
            lines.append(f"{d.response}: block offsets ({spec.response(d.response).unit}, sd {d.block_sd:.3g}): "
                         + ", ".join(f"{k} {v:+.3g}" for k, v in d.block_offsets.items()))
        if d.choice:
            lines.append(f"{d.response}: " + ModelChoice.from_dict(d.choice).text())
        if d.terms:
            lines.append(f"  {'term':<24} {'coefficient':>12} {'std error':>10} {'t':>8} {'p':>8}"
                         "   (latent scale, coded units: low/high at -1/+1)")
            lines += [f"  {t['term']:<24} {t['coefficient']:>12.4g} {t['std_error']:>10.3g} "
                      f"{t['t']:>8.2f} {t['p_value']:>8.3g}" for t in d.terms]
    return "\n".join(lines)


def _pairs(items, option: str, example: str):
    """``NAME=VALUE`` items of an option as ``(item, name, value)``; one line for a malformed item."""
    out = []
    for it in items:
        name, sep, value = it.partition("=")
        if not sep:
            raise InputError(f"{option} '{it}': write NAME=VALUE, e.g. {example}")
        out.append((it, name.strip(), value))
    return out


def _set_point(items, spec):
    if not items:
        return None
    out = {}
    for it, name, value in _pairs(items, "--set-point", f"{spec.factor_names[0]}=50"):
        f = spec.factor(name)
        if f.is_categorical:   # a level name
            out[f.name] = f.levels[f.index_of(value.strip())]
            continue
        try:
            out[name] = float(value)
        except ValueError:
            raise InputError(f"--set-point '{it}': '{value}' is not a number") from None
        if not math.isfinite(out[name]):
            raise InputError(f"--set-point '{it}': '{value}' is not a finite number")
    return out


def _levels(items, spec):
    """``--level FACTOR=LEVEL``: ``{factor: level}`` of categorical factors, checked before any fit."""
    from windowfinder.answers.levelwindow import allowed_combinations

    if not items:
        return None
    cat = [spec.factors[j] for j in spec.categorical]
    example = f"{cat[0].name}={cat[0].levels[-1]}" if cat else "FACTOR=LEVEL"   # this study's names
    out = {}
    for _, name, value in _pairs(items, "--level", example):
        if name in out and out[name] != value.strip():
            raise InputError(f"--level {name}={out[name]} and --level {name}={value.strip()} disagree; "
                             f"give one level of '{name}'")
        out[name] = value.strip()
    try:   # names and levels checked here, one line each
        allowed_combinations(spec, out)
    except InputError as err:
        msg = str(err)
        raise InputError(msg if msg.startswith("--level") else f"--level: {msg}") from None
    return out


def _print_cautions(cautions, safety: bool):
    for c in cautions:
        print(("CAUTION: " if safety and c is cautions[0] else "note: ") + c)

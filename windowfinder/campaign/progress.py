"""Progress of a campaign: the figures shown after every batch and the default proposer that shares
their model fit (:class:`ModelProgress`: window volume and front hypervolume from one ``study.fit()``
per batch), with how a figure is written (a share of the factor space in percent; a missing one in
words). Used by :mod:`windowfinder.campaign.loop`.
"""

from __future__ import annotations

import numpy as np
import pandas as pd

from windowfinder.answers.window import volume_text
from windowfinder.study import Study

# progress figures that are a share of the factor space: shown in percent, as every window volume is
VOLUME_METRICS = {"window volume": lambda v: volume_text(v).replace(" of the studied factor space", "") + (
    " (searched: no window reaches the confidence yet)" if v == 0 else "")}
# what a progress figure without a value means, in words (was "n/a" for all of them)
MISSING_TEXT = {"window volume": "not searched yet (no model fit before the start design is done)",
                "front hypervolume": "none yet (fewer than 2 runs with every goal measured)"}


class ModelProgress:
    """Default proposer and progress figures sharing one model fit per batch.

    ``window volume`` is the window's share of the studied factor space at the study's confidence (the
    figure of ``window`` and window.json's ``volume_share``, shown in percent), and ``front
    hypervolume`` the hypervolume of the measured goal values of the runs that met every limit
    (minimisation form, reference point fixed at the first batch: the nadir of the measured values plus
    10 % of their range). Both come from a fit on every run completed so far, the same fit as ``window``
    on the same runs (``study.fit()``, seeded); the next proposal reuses it, so each batch costs one fit.
    """

    def __init__(self):
        self.fit_ = None
        self.fitted_on_ = None   # the completed runs self.fit_ was fitted on (their csv text)
        self.ref_ = None
        self.window_ = None  # (volume, coded guard box, run ids) at the last batch

    def fit(self, study: Study):
        """``study.fit()`` on the runs completed now, refitted only when they changed."""
        state = study.runs.completed().to_csv(index=False)
        if self.fit_ is None or state != self.fitted_on_:
            self.fit_, self.fitted_on_ = study.fit(), state
        return self.fit_

    def propose(self, study: Study, count: int, aim: str) -> pd.DataFrame:
        return study.suggest(count, aim=aim, fit=self.fit(study)).frame

    def metrics(self) -> dict:
        return {"window volume": self.window_volume, "front hypervolume": self.front_hypervolume}

    def window_volume(self, study: Study):
        """The window's volume (as in ``window`` and the report); with a one-line reason when it shrank
        since the last batch (:func:`windowfinder.answers.windowchange.shrink_note`)."""
        spec = study.spec
        if self.fit_ is None or not spec.limited:   # still on the start design: no fit yet (n/a)
            return None
        from windowfinder.answers.results import feasibility_of, search_window
        from windowfinder.answers.windowchange import shrink_note

        feas = feasibility_of(spec, self.fit(study))
        res = search_window(spec, feas, spec.confidence)
        vol = float(res.volume) if res.found else 0.0
        done = study.runs.done()
        note = None
        if self.window_ is not None:
            old_vol, old_guard, seen = self.window_
            latest = done[~done["run"].astype(str).isin(seen)]
            note = shrink_note(spec, feas, old_vol, old_guard, vol, latest, seed=spec.seed)
        if res.found:
            self.window_ = (vol, (res.guard_lower, res.guard_upper), set(done["run"].astype(str)))
        elif self.window_ is not None:
            self.window_ = (0.0, self.window_[1], set(done["run"].astype(str)))
        return (vol, note) if note else vol

    def front_hypervolume(self, study: Study):
        from windowfinder.answers.hypervolume import hypervolume

        spec = study.spec
        if not spec.goals:
            return None
        done = study.runs.done()
        Y = np.column_stack([-done[r.name] if r.goal == "maximize" else done[r.name] if r.goal == "minimize"
                             else (done[r.name] - r.target).abs() for r in spec.goals]).astype(float)
        met = np.all([r.margin(done[r.name].to_numpy(float)) >= 0 for r in spec.limited], axis=0) \
            if spec.limited else np.ones(len(done), bool)
        ok = np.isfinite(Y).all(axis=1)
        if self.ref_ is None:
            if ok.sum() < 2:
                return None
            lo, hi = Y[ok].min(axis=0), Y[ok].max(axis=0)
            self.ref_ = hi + 0.1 * np.where(hi > lo, hi - lo, 1.0)
        front = Y[ok & met]
        front = front[(front < self.ref_).all(axis=1)]
        return float(hypervolume(front, self.ref_)) if len(front) else 0.0

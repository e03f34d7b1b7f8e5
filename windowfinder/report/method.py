"""Method notes at the end of the report: what the numbers mean and where the methods come from."""

from __future__ import annotations

from windowfinder.report.page import bullets, esc, para

REFERENCES = [
    "Rasmussen, C. E. and Williams, C. K. I. (2006). Gaussian Processes for Machine Learning. MIT Press "
    "(ch. 2 and 4: regression and the Matérn class; ch. 5 and §5.4.2: marginal likelihood and "
    "leave-one-out predictions).",
    "Hurvich, C. M. and Tsai, C.-L. (1989). Regression and time series model selection in small samples. "
    "Biometrika 76(2), 297-307.",
    "Deb, K., Pratap, A., Agarwal, S. and Meyarivan, T. (2002). A fast and elitist multiobjective genetic "
    "algorithm: NSGA-II. IEEE Transactions on Evolutionary Computation 6(2), 182-197.",
    "Deb, K. and Jain, H. (2014). An evolutionary many-objective optimization algorithm using "
    "reference-point-based nondominated sorting approach, part I (NSGA-III). IEEE Transactions on "
    "Evolutionary Computation 18(4), 577-601.",
    "Blank, J. and Deb, K. (2020). pymoo: Multi-objective optimization in Python. IEEE Access 8, "
    "89497-89509.",
    "Derringer, G. and Suich, R. (1980). Simultaneous optimization of several response variables. Journal "
    "of Quality Technology 12(4), 214-219.",
    "Nelder, J. A. and Mead, R. (1965). A simplex method for function minimization. The Computer Journal "
    "7(4), 308-313.",
    "Sobol', I. M. (1993). Sensitivity estimates for nonlinear mathematical models. Mathematical Modeling "
    "and Computational Experiment 1, 407-414.",
    "Saltelli, A. (2002). Making best use of model evaluations to compute sensitivity indices. Computer "
    "Physics Communications 145, 280-297.",
    "Saltelli, A., Annoni, P., Azzini, I., Campolongo, F., Ratto, M. and Tarantola, S. (2010). Variance "
    "based sensitivity analysis of model output. Design and estimator for the total sensitivity index. "
    "Computer Physics Communications 181, 259-270.",
    "Jansen, M. J. W. (1999). Analysis of variance designs for model output. Computer Physics "
    "Communications 117, 35-43.",
    "Montgomery, D. C. (2013). Design and Analysis of Experiments, 8th ed. Wiley (§2.4.1 pooled variance; "
    "§10.4-10.6 coefficient tests, mean and prediction intervals; §10.7 PRESS).",
    "Nuñez, J. R., Anderton, C. R. and Renslow, R. S. (2018). Optimizing colormaps with consideration for "
    "color vision deficiency (cividis). PLoS ONE 13(7), e0199239.",
]


def method_notes(spec, window=None) -> str:
    """HTML of the method notes, with the probability basis of this report stated first."""
    mean_only = bool(getattr(window, "mean_only", False))
    conf = window.confidence if window is not None else spec.confidence
    basis = ("Probabilities in this report are for the process MEAN (--mean): model uncertainty only. "
             "Run-to-run scatter can still take a single batch past a limit."
             if mean_only else
             "Probabilities in this report are for a NEW RUN: the predictive distribution includes the "
             "model's uncertainty and the run-to-run scatter (noise), because limits apply to every "
             "batch made. With --mean they would describe the process mean instead and be higher.")
    items = [
        basis,
        "P(all limits met) is the product of the probabilities of meeting each limit (times the "
        "probability that the process works, when runs failed). This assumes the responses' prediction "
        "errors are independent at given settings: the models are fitted separately. Positively "
        "correlated responses make the true joint probability higher than the product, negatively "
        "correlated ones lower.",
        "Models: one Gaussian process per response (Rasmussen & Williams 2006) with a constant × Matérn "
        "ν = 5/2 kernel with one length scale per factor (automatic relevance determination) plus a "
        "white-noise term; factors coded to [0, 1], responses standardised (optionally on a log or "
        "logit scale), hyperparameters by maximum marginal likelihood with several seeded restarts. "
        "Failed runs feed a Gaussian-process classifier of P(process works) (probit, expectation "
        "propagation; Rasmussen & Williams 2006, ch. 3) whose prior mean is the observed success rate, so "
        "far from every run P(works) is that rate; failed runs that name the limit they broke enter that "
        "response's model as censored values instead (Schmee & Hahn 1979).",
        "Model choice: with model = \"auto\" (the default) each response's Gaussian process is compared "
        "with the full quadratic polynomial and a reduced one (hierarchical backward elimination by AICc, "
        "Hurvich & Tsai 1989) by the leave-one-out predictive log density; a polynomial is used only where "
        "it scores higher. Polynomials are fitted by least squares; their intervals and probabilities use "
        "Student t with n - p degrees of freedom, their term tables give coefficient, standard error, t "
        "and p-value in coded units (Montgomery 2013, §10.4-10.6).",
        "Leave-one-out checks use the closed form at fixed hyperparameters (Rasmussen & Williams 2006, "
        "§5.4.2); they are slightly optimistic for very small data sets. Warning thresholds (Q² below "
        "0.5, coverage below 80 % with 10 or more runs) are common practice, not from a source.",
        f"Window search: the largest axis-aligned box of settings whose lowest joint probability, with "
        f"each factor widened by its tolerance, is at least the confidence {conf:g}; candidate boxes on "
        "a scrambled Sobol' set, shape optimised with the Nelder-Mead simplex (1965), then verified by an "
        "adversarial search for its lowest-probability point. 'Untrusted' marks settings farther from "
        "every run than the runs typically are from each other, or where a model's own spread is large "
        "against its limit.",
        "Trade-off: constrained multi-objective search on the models' predicted medians with pymoo "
        "(Blank & Deb 2020): NSGA-II (Deb et al. 2002) for two goals, NSGA-III (Deb & Jain 2014) for "
        "three or more, keeping only settings whose joint probability reaches the confidence. The "
        "balanced pick is the knee of the front, or the highest Derringer & Suich (1980) desirability.",
        "Factor influence: Sobol' (1993) indices of each model's predicted median, on the sampling scheme "
        "of Saltelli (2002), first-order estimator of Saltelli et al. (2010, Table 2 b), total-effect "
        "estimator of Jansen (1999); 95 % intervals by bootstrap over the base samples.",
        "Colours: viridis and cividis (Nuñez et al. 2018) are readable with the common colour-vision "
        "deficiencies and in greyscale; markers also differ in shape.",
    ]
    return (bullets(items) + "<h3>References</h3><ol class=\"refs\">"
            + "".join(f"<li>{esc(r)}</li>" for r in REFERENCES) + "</ol>"
            + para("A window is a statistical estimate from limited tests, not a safety assessment; the "
                   "site's hazard review, verification runs at scale, local codes and a qualified, "
                   "licensed engineer decide."))

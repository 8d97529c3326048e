"""Arm values from adaptively collected data: naive, IPW, self-normalised IPW, doubly robust, model.

Estimand
--------
The value of arm ``k`` is the mean over participants of the mean over their
analysed decisions of the expected reward had arm ``k`` been given, in the
contexts that occurred:

.. math::

    V_k = \\frac{1}{N} \\sum_i \\frac{1}{m_i} \\sum_{t \\in D_i} \\mu_{ik}(x_{it}),

with ``D_i`` participant ``i``'s decisions with an observed reward
(``m_i`` of them; missed sessions are treated as missing completely at random
among decisions and dropped) and ``mu_ik(x)`` the expected reward of arm
``k`` for participant ``i`` in context ``x``.

Estimators (``p_it`` the logged propensity of the chosen arm ``A_it``,
``muhat`` an outcome model's prediction):

* ``naive``: the mean of observed rewards on arm ``k``. Under adaptive
  assignment it is biased: arms that did badly early are sampled less, so
  their early bad luck is never averaged away (negative bias, Nie et al.
  2018), and participants who do well on an arm get it more often.
* ``ipw``: the inverse-propensity-weighted (Horvitz-Thompson) mean
  ``(1/N) sum_i (1/m_i) sum_t 1{A_it = k} Y_it / p_it``. Unbiased whenever
  every propensity is the exact probability used and arm ``k`` had positive
  probability at every decision, however adaptive the policy was, because
  every term has conditional mean ``mu_ik(x_it)`` given the past.
* ``hajek``: the self-normalised version, the same sum divided by
  ``(1/N) sum_i (1/m_i) sum_t 1{A_it = k} / p_it`` (Hajek): slightly biased,
  usually less variable.
* ``dr``: the doubly robust (augmented IPW) mean of
  ``muhat_k(x) + 1{A = k} (Y - muhat_k(x)) / p`` (Robins, Rotnitzky and Zhao
  1994; Dudik, Langford and Li 2011). The outcome model is fitted on the same
  data (no cross-fitting), so its exact unbiasedness is not guaranteed.
* ``model``: the outcome model's own estimate ``(1/N) sum_i (1/m_i) sum_t
  muhat_ik(x_it)`` with its posterior interval when the model has draws.

Standard errors respect clustering by participant (see
:func:`poolbandit.analysis._prepare.ratio_estimate`). Intervals are normal
intervals; Hadad et al. (2021) show that with propensities that shrink
towards 0 they can undercover, which probability clipping prevents.

References
----------
.. [1] Horvitz, D. G. and Thompson, D. J. (1952). A generalization of
   sampling without replacement from a finite universe. *Journal of the
   American Statistical Association* 47, 663-685. doi:10.1080/01621459.1952.10483446
.. [2] Hajek, J. (1971). Comment on "An essay on the logical foundations of
   survey sampling" by D. Basu. In *Foundations of Statistical Inference*,
   Holt, Rinehart and Winston, p. 236 (citation details from memory).
.. [3] Robins, J. M., Rotnitzky, A. and Zhao, L. P. (1994). Estimation of
   regression coefficients when some regressors are not always observed.
   *Journal of the American Statistical Association* 89, 846-866.
   doi:10.1080/01621459.1994.10476818
.. [4] Dudik, M., Langford, J. and Li, L. (2011). Doubly robust policy
   evaluation and learning. *Proceedings of the 28th International
   Conference on Machine Learning*, 1097-1104.
.. [5] Nie, X., Tian, X., Taylor, J. and Zou, J. (2018). Why adaptively
   collected data have negative bias and how to correct for it. *Proceedings
   of the 21st International Conference on Artificial Intelligence and
   Statistics (AISTATS)*, PMLR 84, 1261-1269.
.. [6] Hadad, V., Hirshberg, D. A., Zhan, R., Wager, S. and Athey, S. (2021).
   Confidence intervals for policy evaluation in adaptive experiments.
   *Proceedings of the National Academy of Sciences* 118(15), e2014602118.
   doi:10.1073/pnas.2014602118
"""

from __future__ import annotations


import numpy as np
import pandas as pd

from .._random import RngLike, as_generator, spawn
from ..errors import LogError, format_value
from ._prepare import Prepared, SeMethod, prepare, ratio_estimate
from .outcome_models import OutcomeModel, OutcomePredictions, as_predictions

__all__ = ["arm_values", "ESTIMATORS", "ESTIMATOR_LABELS", "ARM_VALUE_COLUMNS", "category_map",
           "outcome_predictions", "model_summary"]

#: Estimators of :func:`arm_values`, in report order.
ESTIMATORS = ["naive", "ipw", "hajek", "dr", "model"]

#: Plain-language label of every estimator.
ESTIMATOR_LABELS = {
    "naive": "naive mean of observed rewards (biased under adaptive assignment)",
    "ipw": "inverse-propensity weighted (Horvitz-Thompson)",
    "hajek": "self-normalised inverse-propensity weighted (Hajek)",
    "dr": "doubly robust (augmented IPW)",
    "model": "outcome model alone",
    "snipw": "self-normalised inverse-propensity weighted",
    "observed": "observed mean reward under the logged policy",
}

#: Columns of the table :func:`arm_values` returns.
ARM_VALUE_COLUMNS = ["group", "arm", "estimator", "label", "estimate", "se", "lower", "upper", "participants",
                     "decisions", "arm_decisions", "status", "note"]


def category_map(categories, *, source: str | None = None) -> pd.Series:
    """Turn a participant -> category mapping (dict, Series or DataFrame) into a Series of str.

    A DataFrame needs a ``participant`` column and a ``category`` (or ``label``) column.

    Raises
    ------
    LogError
        If the table lacks those columns, repeats a participant, or has an empty category.
    """
    if isinstance(categories, pd.DataFrame):
        # "label" first: the classification table has one row per participant and category, with the label
        col = next((c for c in ("label", "category") if c in categories.columns), None)
        if "participant" not in categories.columns or col is None:
            raise LogError([f"expected columns participant and category (or label); columns present: "
                            f"{', '.join(map(str, categories.columns))}"], source=source)
        part = categories["participant"].astype(str).to_numpy()
        value = categories[col]
        empty = value.isna().to_numpy() | (value.astype(str).str.strip() == "").to_numpy()
        problems = [f"row {j + 1}, column {col}: expected a category name, got \"\"" for j in np.flatnonzero(empty)[:20]]
        table = pd.DataFrame({"participant": part, "value": value.astype(str).to_numpy()})
        first = table.drop_duplicates("participant").set_index("participant")["value"]
        clash = table["value"].to_numpy() != first.reindex(part).to_numpy()
        problems += [f"row {j + 1}, column {col}: participant {format_value(part[j])} already has category "
                     f"{format_value(first[part[j]])}, got {format_value(table['value'].iat[j])}"
                     for j in np.flatnonzero(clash & ~empty)[:20]]
        if problems:
            raise LogError(problems, source=source)
        series = first
    else:
        series = pd.Series(dict(categories), dtype=object).astype(str)
        series.index = series.index.astype(str)
    return series


def outcome_predictions(log: pd.DataFrame, design, outcome_model: OutcomeModel | OutcomePredictions | None
                        ) -> OutcomePredictions | None:
    """Run (or check) an outcome model on the whole log."""
    if outcome_model is None:
        return None
    value = outcome_model if isinstance(outcome_model, (OutcomePredictions, np.ndarray)) \
        else outcome_model(log, design)
    return as_predictions(value, len(log), design.n_arms)


def arm_values(log: pd.DataFrame, design, *, outcome_model: OutcomeModel | OutcomePredictions | None = None,
               categories=None, level: float = 0.95, se: SeMethod = "sandwich", n_boot: int = 1000,
               rng: RngLike = None) -> pd.DataFrame:
    """Estimate the value of every arm, overall and within each category of participants.

    Parameters
    ----------
    log : DataFrame
        A validated StudyLog (:func:`poolbandit.read_log`); its propensity
        column may be entirely empty (then weighted estimates are refused).
    design : DesignSpec
    outcome_model : callable or OutcomePredictions, optional
        ``model(log, design) -> OutcomePredictions | (n, K) array`` (see
        :mod:`poolbandit.analysis.outcome_models`), or predictions already
        made. Without one, the ``dr`` and ``model`` rows are refused.
    categories : mapping, Series or DataFrame, optional
        Participant -> category. Each category gets its own rows (group =
        the category name) besides the overall rows (group = ``all``).
    level : float, default=0.95
        Interval coverage.
    se : {"sandwich", "bootstrap"}, default="sandwich"
        Cluster sandwich or participant bootstrap standard errors.
    n_boot : int, default=1000
    rng : Generator, int or None
        Seeds the bootstrap.

    Returns
    -------
    DataFrame
        Columns :data:`ARM_VALUE_COLUMNS`. ``status`` is ``ok``, ``refused``
        (the estimate cannot be made from this log; ``note`` says why) or
        ``unavailable`` (no outcome model); ``note`` also carries caveats.

    Notes
    -----
    Estimand and estimators: see the module docstring. Category rows are
    conditional on a grouping that is usually derived from the same data
    (the classification posterior), so they describe the participants as
    grouped, not a pre-registered subgroup.

    References
    ----------
    Horvitz and Thompson (1952); Robins, Rotnitzky and Zhao (1994); Dudik,
    Langford and Li (2011); Nie, Tian, Taylor and Zou (2018); Hadad,
    Hirshberg, Zhan, Wager and Athey (2021). Full citations in the module
    docstring.
    """
    prep = prepare(log, design)
    pred = outcome_predictions(log, design, outcome_model)
    groups: list[tuple[str, Prepared]] = [("all", prep)]
    if categories is not None:
        cmap = category_map(categories).reindex([str(p) for p in prep.ids])
        for name in sorted(pd.unique(cmap.dropna())):
            groups.append((name, prep.subset((cmap == name).to_numpy())))
    streams = spawn(rng, len(groups)) if se == "bootstrap" else [None] * len(groups)
    tables = [_group_rows(name, sub, design, pred, level=level, se=se, n_boot=n_boot, rng=g)
              for (name, sub), g in zip(groups, streams)]
    out = pd.DataFrame([r for t in tables for r in t], columns=ARM_VALUE_COLUMNS)
    return out.astype({"participants": np.int64, "decisions": np.int64, "arm_decisions": np.int64})


def _group_rows(group: str, prep: Prepared, design, pred: OutcomePredictions | None, *, level, se, n_boot,
                rng) -> list[dict]:
    rows = []
    mu = None if pred is None else pred.mean[prep.rows]
    g = as_generator(rng) if se == "bootstrap" else None
    for k, arm in enumerate(design.arms):
        on = (prep.arm == k).astype(float)
        base = {"group": group, "arm": arm, "participants": prep.n_participants, "decisions": len(prep.y),
                "arm_decisions": int(on.sum())}

        def row(est, values=None, status="ok", note=""):
            v = values or dict.fromkeys(["estimate", "se", "lower", "upper"], np.nan)
            return {**base, "estimator": est, "label": ESTIMATOR_LABELS[est], **v, "status": status, "note": note}

        opts = {"level": level, "se": se, "n_boot": n_boot, "rng": g}
        # naive: decision-weighted mean of observed rewards on the arm
        if on.sum() > 0:
            rows.append(row("naive", ratio_estimate(prep.per_participant_sum(on * prep.y),
                                                    prep.per_participant_sum(on), **opts),
                            note="ignores how arms were assigned; biased under adaptive assignment"))
        else:
            rows.append(row("naive", status="refused", note=f"arm {arm} was never observed"))
        # weighted estimators
        refusal = _weighting_refusal(prep, k, arm)
        if refusal:
            for est in ("ipw", "hajek"):
                rows.append(row(est, status="refused", note=refusal))
        else:
            w = np.where(prep.arm == k, 1.0 / np.where(prep.arm == k, prep.chosen, 1.0), 0.0)
            caveat = _positivity_caveat(prep, k)
            rows.append(row("ipw", ratio_estimate(prep.per_participant(w * prep.y), None, **opts), note=caveat))
            rows.append(row("hajek", ratio_estimate(prep.per_participant(w * prep.y), prep.per_participant(w),
                                                    **opts), note=caveat))
        # doubly robust and model
        if mu is None:
            rows.append(row("dr", status="unavailable" if not refusal else "refused",
                            note=refusal or "no outcome model"))
            rows.append(row("model", status="unavailable", note="no outcome model"))
            continue
        if refusal:
            rows.append(row("dr", status="refused", note=refusal))
        else:
            score = mu[:, k] + w * (prep.y - mu[:, k])
            rows.append(row("dr", ratio_estimate(prep.per_participant(score), None, **opts),
                            note=f"{pred.name} fitted on the same data (no cross-fitting)"))
        rows.append(row("model", _model_estimate(prep, pred, k, level),
                        note=pred.name + ("" if pred.draws is not None else "; no posterior draws, no interval")))
    return rows


def _model_estimate(prep: Prepared, pred: OutcomePredictions, k: int, level: float) -> dict[str, float]:
    draws = None if pred.draws is None else pred.draws[:, prep.rows, k]
    return model_summary(prep, pred.mean[prep.rows, k], draws, level)


def model_summary(prep: Prepared, mean: np.ndarray, draws: np.ndarray | None, level: float) -> dict[str, float]:
    """Participant-balanced average of per-decision model values, with a posterior interval from draws.

    ``mean`` has shape (n,) over the analysed decisions and ``draws`` (S, n);
    the interval is the equal-tailed ``level`` quantile interval of the
    averages of the draws, and ``se`` their sd. Without draws only the
    estimate is given.
    """
    est = float(prep.per_participant(mean).mean())
    if draws is None:
        return {"estimate": est, "se": np.nan, "lower": np.nan, "upper": np.nan}
    per = np.zeros((draws.shape[0], prep.n_participants))
    np.add.at(per.T, prep.participant, (prep.balance[:, None] * draws.T))
    values = per.mean(axis=1)
    lo, hi = np.quantile(values, [0.5 - level / 2, 0.5 + level / 2])
    return {"estimate": est, "se": float(values.std(ddof=1)), "lower": float(lo), "upper": float(hi)}


def _weighting_refusal(prep: Prepared, k: int, arm: str) -> str:
    """Why weighted estimates of arm ``k`` cannot be made (empty string: they can)."""
    if prep.table is None:
        return "the log has no propensities, so no weighted estimate can be made"
    zero = prep.table[:, k] == 0
    if zero.any():
        n = len(zero)
        return (f"positivity fails: arm {arm} had probability 0 at {int(zero.sum())} of {n} analysed decisions "
                f"({zero.mean():.0%}; a deterministic rule), so its value there is not identified by weighting")
    return ""


def _positivity_caveat(prep: Prepared, k: int) -> str:
    unknown = np.isnan(prep.table[:, k])
    if unknown.any():
        return (f"positivity assumed at {int(unknown.sum())} decisions where the arm's probability is not "
                "logged (no prob_ columns)")
    return ""

"""Off-policy values of other policies on the same log: IPW, self-normalised IPW, doubly robust.

The value of a target policy ``pi`` is the mean over participants of the
mean over their analysed decisions of the expected reward had the arm been
drawn from ``pi(. | x_it)`` in the contexts that occurred:

.. math::

    V(\\pi) = \\frac{1}{N} \\sum_i \\frac{1}{m_i} \\sum_t \\sum_k \\pi_k(x_{it}) \\mu_{ik}(x_{it}).

With weights ``w_it = pi(A_it | x_it) / p_it`` the estimators are

* ``ipw``: ``(1/N) sum_i (1/m_i) sum_t w_it Y_it`` (Horvitz and Thompson 1952);
* ``snipw``: the same divided by the participant-balanced mean weight;
* ``dr``: ``(1/N) sum_i (1/m_i) sum_t [sum_k pi_k muhat_k + w_it (Y_it - muhat_{A_it})]``
  (Robins, Rotnitzky and Zhao 1994; Dudik, Langford and Li 2011);
* ``model``: the direct method ``(1/N) sum_i (1/m_i) sum_t sum_k pi_k muhat_k``.

Weights are summarised by Kish's effective sample size
``(sum w)^2 / sum w^2`` and the share of decisions whose weight exceeds a
stated bound; :class:`~poolbandit.errors.OverlapWarning` is raised when
overlap is too thin.

Target policies: uniform random, "always arm k", each participant's
posterior-best arm in the decision's context (from the outcome model; it is
chosen on the same data, so its estimated value is optimistic), any table
given by the caller, and every policy of the design that can report its
probabilities, replayed on the log (:func:`replay_probabilities`).

References
----------
.. [1] Horvitz, D. G. and Thompson, D. J. (1952). A generalization of
   sampling without replacement from a finite universe. *JASA* 47, 663-685.
.. [2] Robins, J. M., Rotnitzky, A. and Zhao, L. P. (1994). Estimation of
   regression coefficients when some regressors are not always observed.
   *JASA* 89, 846-866.
.. [3] Dudik, M., Langford, J. and Li, L. (2011). Doubly robust policy
   evaluation and learning. *ICML 2011*, 1097-1104.
.. [4] Kish, L. (1965). *Survey Sampling*. Wiley (the effective sample size
   of a weighted sample).
.. [5] Hadad, V., Hirshberg, D. A., Zhan, R., Wager, S. and Athey, S. (2021).
   Confidence intervals for policy evaluation in adaptive experiments.
   *PNAS* 118(15), e2014602118.
"""

from __future__ import annotations

import warnings
from typing import Mapping

import numpy as np
import pandas as pd

from .._random import RngLike, as_generator, spawn
from ..errors import OverlapWarning
from ..policies._catalogue import KINDS
from ..policies._probability import argmax_ties
from ..policies.base import Batch
from ..policies.registry import make_policy
from ._prepare import Prepared, SeMethod, prepare, ratio_estimate
from .arm_values import ESTIMATOR_LABELS, model_summary, outcome_predictions
from .outcome_models import OutcomeModel, OutcomePredictions

__all__ = ["policy_values", "replay_probabilities", "builtin_policies", "POLICY_VALUE_COLUMNS",
           "POLICY_ESTIMATORS"]

#: Estimators of :func:`policy_values`, in report order.
POLICY_ESTIMATORS = ["ipw", "snipw", "dr", "model"]

#: Columns of the table :func:`policy_values` returns.
POLICY_VALUE_COLUMNS = ["policy", "source", "estimator", "label", "estimate", "se", "lower", "upper", "ess",
                        "ess_share", "max_weight", "share_above_bound", "weight_bound", "decisions", "status",
                        "note"]

_REPLAY_CAVEAT = ("replayed on the logged history: at each decision it sees what actually happened before, "
                  "not the history it would have produced itself")


def builtin_policies(design, pred: OutcomePredictions | None, n_rows: int) -> dict[str, tuple[np.ndarray, str]]:
    """Uniform random, always-arm-k and posterior-best tables over all rows of a log."""
    k = design.n_arms
    out = {"uniform-random": (np.full((n_rows, k), 1.0 / k), "every arm with probability 1/K")}
    for j, arm in enumerate(design.arms):
        t = np.zeros((n_rows, k))
        t[:, j] = 1.0
        out[f"always-{arm}"] = (t, f"always {arm}")
    if pred is not None:
        out["posterior-best"] = (argmax_ties(pred.mean),
                                 "each participant's best arm in the decision's context by the outcome model "
                                 "(chosen on the same data: optimistic)")
    return out


def replay_probabilities(log: pd.DataFrame, design, policy: str, *, rng: RngLike = None) -> np.ndarray:
    """Probabilities a design policy would have used at every logged decision.

    The policy is built from the design (:func:`poolbandit.policies.registry.make_policy`),
    started on the log's roster and driven through the log's steps: before
    each step it observes every reward logged at earlier steps, it reports its
    randomisation table for the decisions of the step, and it is told the arms
    that were actually logged (``note_assigned``). It therefore sees the
    logged history, not the history it would have produced itself.

    Parameters
    ----------
    log : DataFrame
        A validated StudyLog. Without a ``step`` column the decision index is
        used as the step (all participants in lockstep).
    design : DesignSpec
    policy : str
        A policy name of the design.
    rng : Generator, int or None
        For policies whose probabilities are Monte Carlo estimates (the
        pooled policies' Gibbs draws): their replayed table is then one
        realisation of the policy's randomised rule, not the logged one.

    Returns
    -------
    ndarray of shape (n, K)

    Raises
    ------
    ValueError
        If the kind reads the simulated truth or is not implemented.
    """
    spec = design.policy(policy)
    if KINDS[spec.kind].simulation_only:
        raise ValueError(f"policy {policy!r} (kind {spec.kind}) reads the simulated truth")
    g = as_generator(rng)
    pol = make_policy(spec, design)
    ids = list(pd.unique(log["participant"]))
    pos = pd.Index(ids).get_indexer(log["participant"])
    if design.covariates:
        cov = log.drop_duplicates("participant").set_index("participant")[list(design.covariates)]
        cov = cov.reindex(ids).to_numpy(dtype=float)
    else:
        cov = np.zeros((len(ids), 0))
    pol.start(cov)
    step = log["step"].to_numpy() if "step" in log.columns else log["decision"].to_numpy() - 1
    decision = log["decision"].to_numpy()
    arm = pd.Index(design.arms).get_indexer(log["arm"]).astype(np.int64)
    ctx = log[list(design.features)].to_numpy(dtype=float) if design.features else np.zeros((len(log), 0))
    y = log[design.study.reward].to_numpy(dtype=float)
    out = np.empty((len(log), design.n_arms))
    order = np.argsort(step, kind="stable")
    bounds = np.flatnonzero(np.diff(step[order])) + 1
    pending: np.ndarray | None = None
    for rows in np.split(order, bounds):
        if pending is not None:
            pol.observe(pos[pending], arm[pending], ctx[pending], y[pending])
        batch = Batch(pos[rows], decision[rows], ctx[rows], int(step[rows[0]]))
        out[rows] = pol.probabilities(batch, g)
        pol.note_assigned(pos[rows], arm[rows], decision[rows])
        pending = rows
    return out


def policy_values(log: pd.DataFrame, design, *, outcome_model: OutcomeModel | OutcomePredictions | None = None,
                  policies: Mapping[str, np.ndarray] | None = None, design_policies: bool = True,
                  level: float = 0.95, se: SeMethod = "sandwich", n_boot: int = 1000, weight_bound: float = 20.0,
                  min_ess_share: float = 0.05, max_share_above: float = 0.01, rng: RngLike = None,
                  progress: bool = False) -> pd.DataFrame:
    """Off-policy estimates of the value of other policies on the same log.

    Parameters
    ----------
    log : DataFrame
        A validated StudyLog (propensity column may be entirely empty).
    design : DesignSpec
    outcome_model : callable or OutcomePredictions, optional
        For ``dr``, ``model`` and the posterior-best policy.
    policies : mapping of str to ndarray (n, K), optional
        Extra target policies: probability tables over all rows of ``log``.
    design_policies : bool, default=True
        Also replay every policy of the design (see :func:`replay_probabilities`).
    level : float, default=0.95
    se : {"sandwich", "bootstrap"}, default="sandwich"
    n_boot : int, default=1000
    weight_bound : float, default=20.0
        A weight above this bound means one logged decision stands for more
        than ``weight_bound`` decisions of the target policy.
    min_ess_share, max_share_above : float, default=0.05 and 0.01
        Overlap is "thin" (OverlapWarning) when Kish's effective sample size is
        below ``min_ess_share`` of the analysed decisions or more than
        ``max_share_above`` of them have a weight above ``weight_bound``.
    rng : Generator, int or None
        Seeds the replays and the bootstrap.
    progress : bool, default=False
        Show a progress bar over the replayed policies.

    Returns
    -------
    DataFrame
        Columns :data:`POLICY_VALUE_COLUMNS`; ``source`` is ``logged``,
        ``builtin``, ``given`` or ``design``; ``status`` is ``ok``, ``refused``
        or ``unavailable`` with the reason in ``note``.

    Warns
    -----
    OverlapWarning
        For every target policy whose overlap with the logging policy is thin.
    """
    prep = prepare(log, design)
    pred = outcome_predictions(log, design, outcome_model)
    g_replay, g_boot = spawn(rng, 2)
    opts = {"level": level, "se": se, "n_boot": n_boot, "rng": g_boot}
    rows = [_logged_row(prep, opts)]
    targets: list[tuple[str, str, np.ndarray | None, str]] = []
    for name, (table, note) in builtin_policies(design, pred, len(log)).items():
        targets.append((name, "builtin", table, note))
    if pred is None:
        targets.append(("posterior-best", "builtin", None, "no outcome model"))
    for name, table in (policies or {}).items():
        table = np.asarray(table, dtype=float)
        if table.shape != (len(log), design.n_arms):
            raise ValueError(f"policy {name!r}: expected a table of shape ({len(log)}, {design.n_arms}), "
                             f"got {table.shape}")
        targets.append((name, "given", table, ""))
    if design_policies:
        names = list(design.policies)
        it = names
        if progress and names:
            from tqdm import tqdm

            it = tqdm(names, desc="replaying policies", leave=False)
        for name, gp in zip(it, g_replay.spawn(max(len(names), 1))):
            try:
                targets.append((name, "design", replay_probabilities(log, design, name, rng=gp), _REPLAY_CAVEAT))
            except (ValueError, ImportError) as err:
                targets.append((name, "design", None, f"cannot replay: {err}"))
    for name, source, table, note in targets:
        rows += _policy_rows(name, source, table, note, prep, pred, opts, weight_bound=weight_bound,
                             min_ess_share=min_ess_share, max_share_above=max_share_above)
    return pd.DataFrame(rows, columns=POLICY_VALUE_COLUMNS).astype({"decisions": np.int64})


def _empty(**kw) -> dict:
    base = dict.fromkeys(POLICY_VALUE_COLUMNS, np.nan)
    base.update(kw)
    return base


def _logged_row(prep: Prepared, opts: dict) -> dict:
    values = ratio_estimate(prep.per_participant(prep.y), None, **opts)
    return _empty(policy="logged", source="logged", estimator="observed", label=ESTIMATOR_LABELS["observed"],
                  **values, decisions=len(prep.y), status="ok",
                  note="participant-balanced mean of observed rewards; no weighting needed")


def _policy_rows(name, source, table, note, prep: Prepared, pred, opts, *, weight_bound, min_ess_share,
                 max_share_above) -> list[dict]:
    base = {"policy": name, "source": source, "decisions": len(prep.y), "weight_bound": weight_bound}
    out = []

    def row(est, status="ok", why="", values=None, diag=None):
        return _empty(**base, estimator=est, label=ESTIMATOR_LABELS[est], **(values or {}), **(diag or {}),
                      status=status, note="; ".join(s for s in (why, note) if s))

    if table is None:
        return [row(est, status="unavailable") for est in POLICY_ESTIMATORS]
    pi = table[prep.rows]
    mu = None if pred is None else pred.mean[prep.rows]
    refusal, w, caveat = _weights(prep, pi)
    note = "; ".join(s for s in (caveat, note) if s)
    diag = {}
    if not refusal:
        ess = float(w.sum() ** 2 / np.sum(w**2)) if np.sum(w**2) > 0 else 0.0
        above = float(np.mean(w > weight_bound))
        diag = {"ess": ess, "ess_share": ess / len(w), "max_weight": float(w.max()), "share_above_bound": above}
        thin = ess < min_ess_share * len(w) or above > max_share_above
        if thin:
            warnings.warn(f"policy {name!r}: thin overlap with the logging policy (Kish effective sample size "
                          f"{ess:.1f} of {len(w)} decisions, threshold {min_ess_share:.0%}; {above:.1%} of weights "
                          f"above {weight_bound:g}, threshold {max_share_above:.0%})", OverlapWarning, stacklevel=3)
        caution = "thin overlap: weighted estimates are unreliable" if thin else ""
        out.append(row("ipw", why=caution, values=ratio_estimate(prep.per_participant(w * prep.y), None, **opts),
                       diag=diag))
        out.append(row("snipw", why=caution, values=ratio_estimate(prep.per_participant(w * prep.y),
                                                                    prep.per_participant(w), **opts), diag=diag))
    else:
        out += [row(est, status="refused", why=refusal) for est in ("ipw", "snipw")]
    if mu is None:
        out.append(row("dr", status="refused" if refusal else "unavailable", why=refusal or "no outcome model"))
        out.append(row("model", status="unavailable", why="no outcome model"))
        return out
    direct = np.sum(pi * mu, axis=1)
    if refusal:
        out.append(row("dr", status="refused", why=refusal))
    else:
        score = direct + w * (prep.y - mu[np.arange(len(w)), prep.arm])
        out.append(row("dr", why=f"{pred.name} fitted on the same data (no cross-fitting)",
                       values=ratio_estimate(prep.per_participant(score), None, **opts), diag=diag))
    draws = None if pred.draws is None else np.einsum("snk,nk->sn", pred.draws[:, prep.rows], pi)
    why = f"direct method with the {pred.name}" + ("" if draws is not None else "; no posterior draws, no interval")
    out.append(row("model", why=why, values=model_summary(prep, direct, draws, opts["level"])))
    return out


def _weights(prep: Prepared, pi: np.ndarray) -> tuple[str, np.ndarray | None, str]:
    """Importance weights ``pi(A) / p(A)`` and a caveat, or the reason they cannot be formed."""
    if prep.table is None:
        return "the log has no propensities, so no weighted estimate can be made", None, ""
    miss = (pi > 0) & (prep.table == 0)
    bad = miss.any(axis=1)
    if bad.any():
        return (f"positivity fails: the target policy gives probability to arms the logging policy could not "
                f"choose at {int(bad.sum())} of {len(bad)} analysed decisions"), None, ""
    unknown = ((pi > 0) & np.isnan(prep.table)).any(axis=1)
    w = pi[np.arange(len(pi)), prep.arm] / prep.chosen
    if unknown.any():
        return "", w, (f"positivity assumed at {int(unknown.sum())} decisions where the logging probabilities "
                       "of the target's arms are not logged (no prob_ columns)")
    return "", w, ""

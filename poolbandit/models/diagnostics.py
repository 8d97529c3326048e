"""Convergence diagnostics of a posterior, one row per scalar parameter.

Every number comes from ArviZ on the draws as they are: the posterior mean and
sd, the highest-density interval (:func:`arviz.hdi`), the rank-normalised
split R-hat (:func:`arviz.rhat`) and the bulk and tail effective sample sizes
(:func:`arviz.ess`) of Vehtari et al. [1]_, and the Monte Carlo standard error
of the mean (:func:`arviz.mcse`). A parameter is flagged when its R-hat
exceeds ``rhat_max`` or either ESS falls below ``ess_min`` (the thresholds
recommended in [1]_: 1.01 and 100 per chain, i.e. 400 for four chains). The
number of divergent transitions (NUTS) is reported once, as the table's last
row, and flagged when it is not zero.

References
----------
.. [1] Vehtari, A., Gelman, A., Simpson, D., Carpenter, B. and Burkner, P.-C.
   (2021). Rank-normalization, folding, and localization: an improved R-hat for
   assessing convergence of MCMC. *Bayesian Analysis* 16(2), 667-718.
   https://doi.org/10.1214/20-BA1221
"""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd

from ..errors import ConvergenceWarning

__all__ = ["diagnostics_table", "flagged_summary", "PARAMETERS", "COLUMNS"]

#: Posterior variables the table covers, in this order (those present).
PARAMETERS = ("beta", "gamma", "tau", "sigma", "theta")
#: Columns of the table, in this order.
COLUMNS = ("parameter", "variable", "mean", "sd", "hdi_low", "hdi_high", "mcse_mean", "r_hat", "ess_bulk",
           "ess_tail", "flagged")


def diagnostics_table(
    idata,
    *,
    rhat_max: float = 1.01,
    ess_min: float = 400,
    hdi_prob: float = 0.9,
    var_names: tuple[str, ...] | list[str] | None = None,
    warn: bool = True,
) -> pd.DataFrame:
    """Summary and convergence diagnostics of a posterior.

    Parameters
    ----------
    idata : arviz.InferenceData
        A posterior from either engine (``posterior`` group; ``sample_stats``
        with ``diverging`` when the sampler reports divergences).
    rhat_max : float, default=1.01
        Flag a parameter whose R-hat exceeds this.
    ess_min : float, default=400
        Flag a parameter whose bulk or tail ESS is below this.
    hdi_prob : float, default=0.9
        Probability mass of the highest-density interval.
    var_names : sequence of str, optional
        Variables to cover; default :data:`PARAMETERS` (those present).
    warn : bool, default=True
        Emit a :class:`~poolbandit.errors.ConvergenceWarning` when anything is flagged.

    Returns
    -------
    pandas.DataFrame
        One row per scalar parameter, with columns ``parameter`` (str, e.g.
        ``theta[p001, drill]``), ``variable`` (str), ``mean``, ``sd``,
        ``hdi_low``, ``hdi_high``, ``mcse_mean``, ``r_hat``, ``ess_bulk``,
        ``ess_tail`` (float) and ``flagged`` (bool); then one last row with
        ``parameter = variable = "divergences"``, the number of divergent
        transitions in ``mean`` (0 for samplers without divergences; the
        other numeric columns NaN) and ``flagged`` true when it is positive. Elements that are
        constant over every draw (``tau`` of a shared coefficient, fixed at 0)
        have NaN diagnostics and are not flagged; any other NaN R-hat or ESS
        is flagged. ``attrs`` holds ``divergences``, ``rhat_max``,
        ``ess_min``, ``hdi_prob``, ``chains`` and ``draws``.

    Warns
    -----
    ConvergenceWarning
        When a parameter or the divergence count is flagged.
    """
    import arviz as az

    post = idata.posterior
    names = [v for v in (var_names or PARAMETERS) if v in post.data_vars]
    if not names:
        raise ValueError(f"the posterior holds none of {list(var_names or PARAMETERS)}; "
                         f"its variables are {list(post.data_vars)}")
    ds = post[names]
    with warnings.catch_warnings():
        # constant elements (tau of shared coefficients) divide 0 by 0 inside R-hat
        warnings.filterwarnings("ignore", "invalid value encountered", RuntimeWarning)
        stats = {
            "mean": ds.mean(("chain", "draw")),
            "sd": ds.std(("chain", "draw"), ddof=1),
            "mcse_mean": az.mcse(ds, method="mean"),
            "r_hat": az.rhat(ds),
            "ess_bulk": az.ess(ds, method="bulk"),
            "ess_tail": az.ess(ds, method="tail"),
        }
        hdi = az.hdi(ds, hdi_prob=hdi_prob)
    blocks = []
    for name in names:
        da = ds[name]
        dims = [d for d in da.dims if d not in ("chain", "draw")]
        labels = _labels(name, da, dims)
        cols = {"parameter": labels, "variable": np.full(len(labels), name, dtype=object)}
        for key, value in stats.items():
            cols[key] = _flat(value[name], dims)
        cols["hdi_low"] = _flat(hdi[name].sel(hdi="lower"), dims)
        cols["hdi_high"] = _flat(hdi[name].sel(hdi="higher"), dims)
        values = da.transpose("chain", "draw", *dims).to_numpy().reshape(da.sizes["chain"] * da.sizes["draw"], -1)
        cols["_constant"] = (values == values[:1]).all(axis=0)
        blocks.append(pd.DataFrame(cols))
    table = pd.concat(blocks, ignore_index=True)
    constant = table.pop("_constant").to_numpy(dtype=bool)
    rhat, bulk, tail = (table[c].to_numpy(dtype=float) for c in ("r_hat", "ess_bulk", "ess_tail"))
    with np.errstate(invalid="ignore"):
        bad = ~(rhat <= rhat_max) | ~(bulk >= ess_min) | ~(tail >= ess_min)
    table["flagged"] = bad & ~constant

    divergences = _divergences(idata)
    table = pd.concat([table, pd.DataFrame([{
        "parameter": "divergences", "variable": "divergences", "mean": float(divergences),
        "flagged": bool(divergences > 0),
    }])], ignore_index=True)
    table = table[list(COLUMNS)]
    for col in COLUMNS[2:-1]:
        table[col] = table[col].astype(float)
    table["flagged"] = table["flagged"].fillna(False).astype(bool)
    table["parameter"] = table["parameter"].astype(str)
    table["variable"] = table["variable"].astype(str)
    table.attrs.update({"divergences": divergences, "rhat_max": rhat_max, "ess_min": ess_min, "hdi_prob": hdi_prob,
                        "chains": int(post.sizes["chain"]), "draws": int(post.sizes["draw"])})
    if warn and table["flagged"].any():
        warnings.warn(_message(table, rhat_max, ess_min), ConvergenceWarning, stacklevel=2)
    return table


def flagged_summary(table: pd.DataFrame, *, limit: int = 10) -> str:
    """One line about the flagged rows of a :func:`diagnostics_table` ("" when none)."""
    return _message(table, table.attrs.get("rhat_max", 1.01), table.attrs.get("ess_min", 400), limit=limit) \
        if table["flagged"].any() else ""


def _message(table: pd.DataFrame, rhat_max: float, ess_min: float, *, limit: int = 10) -> str:
    params = table[table["flagged"] & (table["variable"] != "divergences")]
    parts = []
    if len(params):
        shown = ", ".join(
            f"{r.parameter} (R-hat {r.r_hat:.3f}, ESS bulk {r.ess_bulk:.0f}, tail {r.ess_tail:.0f})"
            for r in params.head(limit).itertuples()
        )
        more = f" and {len(params) - limit} more" if len(params) > limit else ""
        n_param = int((table["variable"] != "divergences").sum())
        parts.append(f"{len(params)} of {n_param} parameters have R-hat > {rhat_max} or ESS < {ess_min:g}: "
                     f"{shown}{more}")
    div = table.loc[table["variable"] == "divergences", "mean"]
    if len(div) and div.iloc[0] > 0:
        parts.append(f"{int(div.iloc[0])} divergent transitions (threshold 0); the posterior may be biased")
    return "; ".join(parts)


def _divergences(idata) -> int:
    stats = getattr(idata, "sample_stats", None)
    if stats is None or "diverging" not in stats:
        return 0
    return int(np.asarray(stats["diverging"]).sum())


def _flat(da, dims: list[str]) -> np.ndarray:
    return np.asarray(da.transpose(*dims).to_numpy(), dtype=float).reshape(-1)


def _labels(name: str, da, dims: list[str]) -> list[str]:
    if not dims:
        return [name]
    grids = np.meshgrid(*[da[d].to_numpy() for d in dims], indexing="ij")
    flat = [g.reshape(-1) for g in grids]
    return [f"{name}[{', '.join(str(f[j]) for f in flat)}]" for j in range(flat[0].size)]

"""``poolbandit fit LOG --design DESIGN [--engine fast|full] [--out DIR]``: posterior of the hierarchical model.

Writes ``posterior.nc`` (ArviZ InferenceData as NetCDF, readable with
``arviz.from_netcdf``) and ``diagnostics.csv`` (one row per scalar parameter:
mean, sd, HDI, MCSE, R-hat, bulk and tail ESS, flagged; then the divergence
count), and prints a short summary with any flagged parameters.
"""

from __future__ import annotations

import argparse
import sys
import time
import warnings

from ..errors import ConvergenceWarning, InputError
from ..log import read_log
from ..models.diagnostics import diagnostics_table, flagged_summary
from ..models.fit import ENGINES, fit
from ._common import atomic_path, design_from, output_dir, show_progress

__all__ = ["register", "run"]


def register(sub: argparse._SubParsersAction) -> None:
    p = sub.add_parser("fit", help="fit the hierarchical model to a study log; writes posterior.nc and diagnostics.csv",
                       description="Fit the hierarchical model (population means, heterogeneity, participant "
                                   "coefficients) to a study log with the fast Gibbs engine or PyMC's NUTS, and "
                                   "write the posterior and its convergence diagnostics.")
    p.add_argument("log", help="study log (CSV)")
    p.add_argument("--design", required=True, help="design file (TOML) the log belongs to")
    p.add_argument("--engine", choices=list(ENGINES), default="fast",
                   help="fast: vectorised Gibbs sampler; full: PyMC NUTS (default: fast)")
    p.add_argument("--chains", type=int, default=4, help="independent chains (default: 4)")
    p.add_argument("--draws", type=int, default=1000, help="kept draws per chain (default: 1000)")
    p.add_argument("--tune", type=int, default=None,
                   help="warm-up iterations per chain (default: 500 fast, 1000 full)")
    p.add_argument("--seed", type=int, default=None, help="seed (default: the design's study.seed)")
    p.add_argument("--out", default="fit", help="output folder (default: ./fit)")
    p.set_defaults(run=run)


def run(args: argparse.Namespace) -> int:
    for name, low in (("chains", 1), ("draws", 1), ("tune", 0)):
        value = getattr(args, name)
        if value is not None and value < low:
            raise InputError(f"--{name}: expected an integer >= {low}, got {value}")
    design = design_from(args.design)
    log = read_log(args.log, design)
    seed = args.seed if args.seed is not None else design.study.seed
    out = output_dir(args.out)
    start = time.perf_counter()
    idata = fit(log, design, engine=args.engine, chains=args.chains, draws=args.draws, tune=args.tune, rng=seed,
                progress=show_progress())
    seconds = time.perf_counter() - start
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)  # reported below instead
        table = diagnostics_table(idata)
    for key in ("source_log", "source_design", "design_sha256"):
        idata.posterior.attrs.pop(key, None)
    idata.posterior.attrs.update({"source_log": str(args.log), "source_design": str(args.design),
                                  "design_sha256": design.sha256, "seed": "" if seed is None else str(seed)})
    with atomic_path(out / "posterior.nc") as tmp:
        idata.to_netcdf(str(tmp), engine="h5netcdf")
    with atomic_path(out / "diagnostics.csv") as tmp:
        table.to_csv(tmp, index=False, lineterminator="\n", float_format="%.6g")

    post = idata.posterior
    n_obs = int(idata.observed_data["y"].size) if "observed_data" in idata.groups() else len(log)
    print(f"{args.engine} engine: {post.sizes['participant']} participants, {n_obs} observed rewards, "
          f"{post.sizes['chain']} chains x {post.sizes['draw']} draws in {seconds:.1f} s")
    params = table[table["variable"].isin(["beta", "tau", "sigma"])]
    for r in params.itertuples():
        print(f"  {r.parameter:<28} {r.mean:8.3f}  sd {r.sd:6.3f}  "
              f"{int(round(100 * table.attrs['hdi_prob']))}% HDI [{r.hdi_low:7.3f}, {r.hdi_high:7.3f}]")
    message = flagged_summary(table)
    if message:
        print(f"warning: {message}", file=sys.stderr)
    else:
        print(f"all {int((table['variable'] != 'divergences').sum())} parameters pass R-hat <= "
              f"{table.attrs['rhat_max']} and ESS >= {table.attrs['ess_min']:g}; "
              f"{table.attrs['divergences']} divergences")
    print(f"wrote {out / 'posterior.nc'} and {out / 'diagnostics.csv'}")
    return 0

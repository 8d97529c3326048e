"""Write the tour notebooks from the Python source below, with empty outputs (nbformat v4).

Edit the cells here, then run::

    .venv/bin/python notebooks/_build.py

and commit both this file and the notebooks. ``tests/test_notebooks.py``
executes every notebook from a clean kernel.
"""

from __future__ import annotations

import textwrap
from pathlib import Path

import nbformat
from nbformat.v4 import new_code_cell, new_markdown_cell, new_notebook

__all__ = ["NOTEBOOKS", "build", "main"]

HERE = Path(__file__).resolve().parent


def _md(text: str):
    return new_markdown_cell(textwrap.dedent(text).strip("\n"))


def _code(text: str):
    return new_code_cell(textwrap.dedent(text).strip("\n"))


# ---------------------------------------------------------------------------
# 01: design a study by simulation
# ---------------------------------------------------------------------------
DESIGN = [
    _md("""
    # 1. Design: which assignment policy, and how many learners?

    A language-learning app wants to learn which daily practice format suits each adult learner:
    a five-minute vocabulary **drill**, a short graded **story**, or a scripted **roleplay**.
    Every day, for 28 days, each learner gets one format; the reward is the minutes practised the
    next day, on a log scale (`log_minutes`). The scenario and all its numbers are invented.

    Before anyone is enrolled we compare candidate assignment policies on simulated learners:

    1. load the embedded design and adjust it;
    2. run every policy on the **same** simulated learners (common random numbers);
    3. look at regret over the study, with bands;
    4. weigh regret against how well each policy's data classify learners;
    5. tune one policy with a sweep;
    6. decide, then check the power of a two-group study (adaptive against random control).

    **Run time.** The settings in the next cell are small so that the notebook runs in under a
    minute on a 2-core laptop. For a real decision raise `REPLICATES` to 100 or more,
    `LEARNERS` to the design's 80 and `POWER_REPLICATES` to 500; the same code then runs for
    tens of minutes on a laptop, or on a Dask cluster with `compare(..., scheduler="tcp://host:8786")`.
    Results are identical for the same seed whatever the number of workers.
    """),
    _code("""
    %matplotlib inline
    import time
    from pathlib import Path

    import matplotlib.pyplot as plt
    import numpy as np
    import pandas as pd
    from IPython.display import display
    from statsmodels.stats.power import TTestIndPower

    import poolbandit as pb
    from poolbandit.compare import compare
    from poolbandit.compare.report import (differences_figure, frontier_figure, power_figure,
                                           regret_curves_figure, sweep_figure)
    from poolbandit.compare.scoring import tradeoff_table

    SEED = 20261201        # root seed: the same seed gives the same tables on any machine
    REPLICATES = 6         # simulated studies per policy (100+ for a real decision)
    LEARNERS = 40          # learners per simulated study (the design says 80)
    POWER_SIZES = [40, 80] # two-group study sizes, both groups together
    POWER_REPLICATES = 16  # simulated two-group studies per size (500 for a real plan)
    WORKERS = None         # local worker processes; None uses every core

    pd.set_option("display.precision", 3)
    pd.set_option("display.width", 160)
    plt.rcParams["figure.dpi"] = 90
    """),
    _md("""
    ## The design

    The package ships the scenario as a design file. Its `[population]` table says how we imagine
    the learners: four latent types (drill-, story- and roleplay-leaning, and no clear preference)
    in equal shares, a between-learner spread around each type, sessions that happen with
    probability 0.85, and four weekly enrolment waves.
    """),
    _code("""
    base = pb.default_design()
    pop = base.population
    print(base.study.title)
    print(f"arms {base.arms}, {base.study.horizon} decisions per learner, {pop.size} learners in "
          f"{pop.waves} waves, sessions happen with probability {pop.adherence}, noise sd {pop.noise_sd}")
    types = pd.DataFrame([{"type": t.name, "share": t.share, **dict(zip(base.arms, t.arm_means))}
                          for t in pop.types]).set_index("type")
    means = sorted(pop.types[0].arm_means)
    gap = means[-1] - means[-2]
    print(f"a leaning type's favourite format is {gap:g} log-minutes better than the others: "
          f"{gap / pop.noise_sd:.2f} noise standard deviations")
    types
    """),
    _md("""
    The scenario chose a type effect of about one noise standard deviation so that a pooled design
    can label about half of the learners confidently by day 28 (half that effect would label fewer
    than one in ten); the comparison below shows how close each policy gets.

    We adjust the design in two ways and save it as our own file:

    * add a **complete-pooling** Thompson policy (`everyone`: one set of format effects shared by all
      learners), so that Thompson sampling with no pooling, partial pooling and complete pooling all
      appear side by side (the cell prints which policy is which);
    * replace the shipped tuning sweep with one that matters for our analysis: the **probability
      floor** of per-learner Thompson sampling (`clip`). A higher floor explores more, costs reward,
      and gives the end-of-study analysis better data.
    """),
    _code("""
    def named(design, kind):  # the name of the design's first policy of this kind
        return next(name for name, spec in design.policies.items() if spec.kind == kind)


    SOLO = named(base, "thompson")
    text = base.source_text
    assert "[[sweeps]]" in text
    text = text.split("[[sweeps]]")[0] + f'''
    [policies.everyone]
    kind = "complete-pooling-thompson"
    prior_mean = 2.4
    prior_sd = 1.0
    noise_sd = 0.8
    clip = [0.05, 0.9]

    [[sweeps]]
    name = "solo-floor"
    policy = "{SOLO}"
    grid = {{ clip = [[0.02, 0.96], [0.05, 0.9], [0.1, 0.8], [0.2, 0.6]] }}
    '''
    path = Path("practice-formats-adjusted.toml")
    path.write_text(text, encoding="utf-8")
    design = pb.load_design(path)   # a mistake here raises DesignError naming the key path
    CONTROL, POOLED, EVERYONE = (named(design, k) for k in ("random", "pooled-thompson", "complete-pooling-thompson"))
    print(f"control: {CONTROL}; no pooling: {SOLO}; partial pooling: {POOLED}; complete pooling: {EVERYONE}")

    pd.DataFrame([{"policy": name, "kind": spec.kind,
                   "settings": ", ".join(f"{k}={v}" for k, v in spec.params.items() if v not in (None, 0))}
                  for name, spec in design.policies.items()]).set_index("policy")
    """),
    _md("""
    ## Compare the policies with common random numbers

    Each replicate draws one population of learners and pre-draws everything random about them
    (their noise, missed sessions, context). Every policy then meets exactly the same learners and
    the same luck, so the difference between two policies is measured replicate by replicate
    (paired), which needs far fewer replicates than independent runs.

    Besides regret and reward, `compare` scores how well each policy's data classify learners at
    the end: the Brier score of the category probabilities (lower is better), the share labelled,
    and the accuracy of the labels against the simulated truth. Policies with a posterior of their
    own (Thompson sampling, the pooled kinds) are scored with it; the others with each learner's own
    conjugate posterior
    (pass `scorer=ClassificationScorer(fit="fast")` to analyse every log with the hierarchical model,
    which is slower).
    """),
    _code("""
    t0 = time.perf_counter()
    comparison = compare(design, replicates=REPLICATES, size=LEARNERS, rng=SEED, workers=WORKERS, reference=POOLED)
    print(f"{REPLICATES} replicates x {len(comparison.replicates)} policy runs in "
          f"{time.perf_counter() - t0:.0f} s on {comparison.info['executor']}")
    cols = ["kind", "regret", "regret_se", "gain", "gain_se", "best_arm_share", "brier", "label_share", "accuracy"]
    comparison.summary.set_index("policy")[cols]
    """),
    _md("""
    `regret` is the reward lost per learner over the study compared with always giving each learner
    their truly best format; `gain` is the paired difference in mean expected reward against the
    uniform random control (`_se`: Monte Carlo standard errors over replicates).

    ## Regret over the study

    Lines are the mean cumulative regret per learner; bands are 95% Monte Carlo intervals of that
    mean. Random assignment loses reward at a constant rate; a policy that learns bends away from it.
    """),
    _code("""
    display(regret_curves_figure(comparison.curves, reference=comparison.info["reference"]))
    """),
    _md("""
    The band says how well we know the *average* curve. Behind the average, each replicate is one
    simulated study; below, each grey line is one replicate's regret at the end of the study, across
    the policies. The lines run roughly parallel: a population of learners that is hard for one policy
    is hard for all of them, and pairing removes that shared part from every comparison.
    """),
    _code("""
    runs = comparison.replicates[comparison.replicates["group"] == "policies"]
    wide = runs.pivot(index="replicate", columns="policy", values="regret")
    wide = wide[comparison.summary.sort_values("regret")["policy"]]
    fig, ax = plt.subplots(figsize=(11, 3.6))
    x = np.arange(wide.shape[1])
    for _, row in wide.iterrows():
        ax.plot(x, row.to_numpy(), color="0.6", lw=1, marker="o", ms=3)
    ax.plot(x, wide.mean().to_numpy(), color="tab:red", lw=2, marker="o", label="mean over replicates")
    ax.set_xticks(x, wide.columns, rotation=20, ha="right")
    ax.set_ylabel("regret per learner at the end")
    ax.legend(frameon=False)
    ax.grid(alpha=0.3)
    fig.tight_layout()
    """),
    _md("""
    ## Paired differences

    Every policy against pooled Thompson sampling. Thick bars: 95% intervals from the paired standard error;
    thin grey bars: what independent runs of the same size would give. The gap between the two is
    what common random numbers buy.
    """),
    _code("""
    display(differences_figure(comparison.differences))
    """),
    _md("""
    ## Regret against classification

    A policy that exploits quickly loses little reward but collects lopsided data, so at the end we
    know less about the formats it stopped giving. Each point below is a policy or a sweep point;
    circled points are not beaten on both regret and Brier score at once; the star is the best
    equal-weight compromise. Complete pooling shows why per-learner estimates matter: with one
    shared set of effects it cannot tell learners apart at all, and its Brier score is far off the
    chart, so we leave it out of the picture and rank the rest.
    """),
    _code("""
    print(comparison.frontier.set_index("policy").loc[EVERYONE, ["regret", "brier", "label_share"]].to_dict())
    rest = comparison.frontier[comparison.frontier["policy"] != EVERYONE]
    rest = tradeoff_table(rest.drop(columns=["pareto", "score", "chosen"]), weight=0.5)
    display(frontier_figure(rest))
    """),
    _md("""
    ## Tune one policy: the probability floor of per-learner Thompson sampling

    The sweep runs per-learner Thompson sampling with four floors on the same simulated learners. Points within two paired
    standard errors of the best cannot be told apart from it with this many replicates.
    """),
    _code("""
    display(sweep_figure(comparison.sweep, rank_by="regret"))
    comparison.sweep[["policy", "regret", "regret_se", "brier", "label_share", "rank", "near_best"]]
    """),
    _md("""
    ## Decide

    We fix the rule before looking at the numbers:

    1. **Analysable.** The end-of-study analysis weights every reward by one over the probability of
       its arm, so every arm must keep a probability of at least 0.02 at every adaptive decision
       (weights of at most 50). Forced exploration at the start (each format once, in random order)
       is excluded from this check; the analysis handles it separately. We check the rule on one
       simulated study per policy.
    2. **Useful.** The gain over random control must be more than two standard errors above zero.
    3. **Informative.** The Brier score must beat knowing nothing about a learner: forecasting each
       of the four categories with probability 1/4 scores 0.75.
    4. **Balanced.** Among the rest, pick the best equal-weight compromise of regret and Brier score
       (`tradeoff_table`, both rescaled to [0, 1] over the candidates).
    """),
    _code("""
    floors = {}
    for j, name in enumerate(design.policies):
        spec = design.policies[name]
        run = pb.simulate(design, name, rng=np.random.default_rng([SEED, j]), size=LEARNERS)
        adaptive = run.log[run.log["decision"] > spec.explore_first]
        floors[name] = adaptive[[f"prob_{a}" for a in design.arms]].to_numpy().min()

    table = comparison.summary.set_index("policy")
    table["lowest_probability"] = pd.Series(floors)
    table["analysable"] = table["lowest_probability"].round(9) >= 0.02   # a floor of exactly 0.02 passes
    table["useful"] = table["gain"] > 2 * table["gain_se"]
    no_information = 1 - 1 / len(design.categories)   # Brier score of probability 1/C on each of C categories
    table["informative"] = table["brier"] < no_information
    table[["kind", "lowest_probability", "analysable", "gain", "gain_se", "useful", "brier", "informative", "regret"]]
    """),
    _code("""
    eligible = table[table["analysable"] & table["useful"] & table["informative"]].reset_index()
    ranked = tradeoff_table(eligible[["policy", "regret", "regret_se", "brier", "brier_se", "label_share"]],
                            weight=0.5).sort_values("score")
    chosen = ranked.loc[ranked["chosen"], "policy"].iat[0]
    def why_not(n):
        if n == CONTROL:
            return "the control itself"
        if not table.at[n, "analysable"]:
            return "probability floor below 0.02"
        return "no clear gain over control" if not table.at[n, "useful"] else "Brier score no better than no information"


    excluded = {n: why_not(n) for n in table.index if n not in set(eligible["policy"])}
    print("excluded:", "; ".join(f"{n} ({why})" for n, why in excluded.items()))
    row = table.loc[chosen]
    print(f"chosen: {chosen} ({row['kind']}): regret {row['regret']:.2f} +- {row['regret_se']:.2f} per learner, "
          f"gain over control {row['gain']:.3f} +- {row['gain_se']:.3f}, Brier {row['brier']:.3f}, "
          f"labelled {row['label_share']:.0%}, lowest probability {row['lowest_probability']:.3f}")
    ranked[["policy", "regret", "brier", "label_share", "pareto", "score"]]
    """),
    _md("""
    ## Power of a two-group study

    Should the study also randomise some learners to uniform random control, to show that the
    adaptive app beats it? We simulate two-group studies: half the learners get the chosen policy,
    half random control; each learner's mean reward is compared between groups with Welch's t-test.
    Because the adaptive group's benefit depends on how fast the policy learns, simulation is the
    honest way to get the power; with few replicates the estimate is rough (binomial error bars).
    """),
    _code("""
    t0 = time.perf_counter()
    two_group = compare(design, policies=[chosen, CONTROL], sweeps=False, replicates=2, size=LEARNERS,
                        rng=SEED, scorer=None, power_sizes=POWER_SIZES, power_policy=chosen,
                        power_replicates=POWER_REPLICATES, workers=WORKERS)
    print(f"{len(two_group.power_studies)} simulated two-group studies in {time.perf_counter() - t0:.0f} s")
    display(power_figure(two_group.power))
    two_group.power[["size", "adaptive", "control", "replicates", "power", "power_se", "difference",
                     "difference_low", "difference_high"]]
    """),
    _md("""
    To look beyond the simulated sizes we turn each simulated study's t statistic into a
    standardised effect size and use the closed form of the two-sample t-test (statsmodels). This
    treats the effect as fixed, which the adaptive condition is not quite, so the simulated points
    stay the reference.
    """),
    _code("""
    studies = two_group.power_studies
    d = studies["statistic"] * np.sqrt(1 / studies["n_adaptive"] + 1 / studies["n_control"])
    effect = float(d.mean())
    analytic = TTestIndPower()
    sizes = np.arange(20, 201, 10)
    closed = [analytic.power(effect_size=effect, nobs1=n / 2, ratio=1.0, alpha=0.05) for n in sizes]
    needed = 2 * int(np.ceil(analytic.solve_power(effect_size=effect, power=0.8, ratio=1.0, alpha=0.05)))

    fig, ax = plt.subplots(figsize=(7, 3.6))
    ax.plot(sizes, closed, color="0.4", label=f"closed form, effect size d = {effect:.2f}")
    p = two_group.power
    ax.errorbar(p["size"], p["power"], yerr=1.96 * p["power_se"], fmt="o", color="tab:red", capsize=3,
                label=f"simulated ({POWER_REPLICATES} studies per size)")
    ax.axhline(0.8, ls="--", lw=0.8, color="0.5")
    ax.axvline(needed, ls=":", color="tab:red")
    ax.set_xlabel("learners in the study (both groups)")
    ax.set_ylabel("power")
    ax.set_ylim(0, 1.02)
    ax.legend(frameon=False, loc="lower right")
    ax.grid(alpha=0.3)
    fig.tight_layout()
    print(f"about {needed} learners in total for 80% power (closed form at the simulated effect size)")
    """),
    _md("""
    ## The decision

    The cell below states the decision from the numbers above. With the small settings of this
    notebook the numbers move from seed to seed; rerun with the scaled-up settings before you
    commit to a design. The same comparison runs from the command line:

    ```
    poolbandit compare practice-formats-adjusted.toml --replicates 200 --power-sizes 40,80,120 --out comparison
    ```
    """),
    _code("""
    power80 = two_group.power.set_index("size")["power"]
    lines = [
        f"Run the study with '{chosen}' ({design.policies[chosen].kind}).",
        f"Why: among the policies whose logged probabilities stay usable for the end-of-study analysis, that "
        f"clearly beat random control and that classify learners better than no information, it has the best "
        f"balance of regret ({row['regret']:.2f} per learner, control {table.at[CONTROL, 'regret']:.2f}) and "
        f"classification (Brier {row['brier']:.3f}, {row['label_share']:.0%} of learners labelled).",
        f"A two-group study (half on random control) of {max(POWER_SIZES)} learners has power "
        f"{power80.loc[max(POWER_SIZES)]:.2f} by simulation; about {needed} learners give 80%.",
    ]
    print("\\n".join(lines))
    """),
]


# ---------------------------------------------------------------------------
# 02: run a study through the study store
# ---------------------------------------------------------------------------
STUDY = [
    _md("""
    # 2. Run a study day by day

    This notebook runs a study exactly as a live one would run, through the study database:

    * `init_study` stores the design (with its hash), the policy and the study seed;
    * `enroll` adds each weekly wave of learners, with a share randomised to a random-control group;
    * every day `status` says who is due, the app supplies the decision-time context in a CSV file,
      `assign` draws today's formats and logs the exact probability of each, and `record` stores
      the outcomes the app reports;
    * at the end `export` writes the study log and `verify` re-derives every assignment.

    Only the outcomes are simulated: a simulated population of learners stands in for the app's
    users. The study is a pilot (24 learners in two waves, 14 days each) so that the notebook runs in
    well under a minute; the same loop runs the full design (80 learners, 28 days).

    Every command has a command-line twin (`poolbandit study init|enroll|assign|record|status|export|verify
    --db PATH`) that takes the same CSV files.
    """),
    _code("""
    %matplotlib inline
    import hashlib
    import sqlite3
    import tempfile
    from pathlib import Path

    import matplotlib.pyplot as plt
    import numpy as np
    import pandas as pd
    from IPython.display import display
    from matplotlib.colors import ListedColormap
    from matplotlib.patches import Patch

    import poolbandit as pb
    from poolbandit import study

    SEED = 20261201
    pd.set_option("display.precision", 3)
    plt.rcParams["figure.dpi"] = 90

    work = Path(tempfile.mkdtemp(prefix="poolbandit-study-"))
    print("study folder:", work)
    """),
    _md("""
    ## Set up the study

    We take the embedded practice-formats design and shorten it to a pilot. The design file is what
    the study stores; any later change to it would show as a different hash.
    """),
    _code("""
    text = pb.default_design().source_text
    for old, new in [("horizon = 28", "horizon = 14"), ("size = 80", "size = 24"), ("waves = 4", "waves = 2")]:
        assert old in text, old
        text = text.replace(old, new)
    design_path = work / "design.toml"
    design_path.write_text(text, encoding="utf-8")
    design = pb.load_design(design_path)

    db = work / "study.sqlite"
    pooled = next(name for name, spec in design.policies.items() if spec.kind == "pooled-thompson")
    info = study.init_study(design_path, db, policy=pooled)   # pooled Thompson sampling runs the adaptive group
    spec = design.policies[pooled]
    print(f"adaptive group: {pooled} ({spec.kind}), forced exploration for the first {spec.explore_first} "
          f"decisions, probabilities clipped to {spec.clip}")
    info
    """),
    _md("""
    The simulated learners: their true effects stay hidden from the study. Only their self-rated
    proficiency (standardised) goes into the enrolment files.
    """),
    _code("""
    rng = np.random.default_rng(SEED)
    g_population, g_outcomes = rng.spawn(2)
    truth = pb.draw_population(design, g_population)
    roster = {pid: i for i, pid in enumerate(truth.ids)}
    print(f"{truth.size} learners; first decision on study day {sorted(set(truth.enrol_step.tolist()))}")
    truth.truth_table().pivot(index="participant", columns="arm", values="mean").join(
        pd.Series(truth.types, index=truth.ids, name="type")).head()
    """),
    _md("""
    ## The daily routine

    Three small helpers play the app's part: the enrolment file of a wave, the context file of a
    day (weekend or not; yesterday's standardised log minutes, 0 when there was no session), and the
    outcomes file (a session happens with probability 0.85; a missed session leaves the reward cell empty).
    Study day 0 is a Monday.
    """),
    _code("""
    yesterday_scale = design.population.features["yesterday"]
    last_reward = {}   # what the app knows: each learner's latest recorded reward


    def write(df, name):
        path = work / name
        df.to_csv(path, index=False)
        return path


    def enrolment_file(day):
        wave = np.flatnonzero(truth.enrol_step == day)
        return write(pd.DataFrame({"participant": np.asarray(truth.ids)[wave],
                                   "proficiency": truth.covariates[wave, 0].round(3)}), f"wave-day{day}.csv")


    def context_file(day, due):
        previous = np.array([last_reward.get(p, np.nan) for p in due])
        yesterday = np.where(np.isfinite(previous),
                             (previous - yesterday_scale.center) / yesterday_scale.scale, 0.0)
        table = pd.DataFrame({"participant": due, "weekend": float(day % 7 >= 5), "yesterday": yesterday.round(4)})
        return write(table, f"context-day{day}.csv"), table


    def outcomes(assigned, context):
        who = assigned["participant"].map(roster).to_numpy()
        arm = pd.Index(design.arms).get_indexer(assigned["arm"])
        mean = truth.expected(who, context[list(design.features)].to_numpy())[np.arange(len(who)), arm]
        reward = mean + design.population.noise_sd * g_outcomes.standard_normal(len(who))
        attended = g_outcomes.random(len(who)) < design.population.adherence
        return assigned[["participant", "decision"]].assign(log_minutes=np.where(attended, reward.round(3), np.nan))


    def run_day(day, *, record=True):
        if (truth.enrol_step == day).any():
            r = study.enroll(db, enrolment_file(day), control_ratio=0.25)
            print(f"day {day}: enrolled {r.enrolled} ({r.n_adaptive} adaptive, {r.n_control} control)")
        due = study.status(db).due
        ctx_path, ctx = context_file(day, due)
        assigned = study.assign(db, context=ctx_path)
        result = outcomes(assigned, ctx.set_index("participant").loc[assigned["participant"]].reset_index())
        if record:
            study.record(db, write(result, f"outcomes-day{day}.csv"))
            last_reward.update(result.dropna().set_index("participant")["log_minutes"].to_dict())
        return assigned, result
    """),
    _md("""
    The first three days, and what `assign` returned on day 2: the arm, the exact probability with
    which it was drawn, and the condition. The pooled policy starts with forced exploration, each
    format once in random order, so on the third day the remaining format is given with probability 1;
    control learners always get each format with probability 1/3.
    """),
    _code("""
    for day in range(2):
        run_day(day)
    assigned, result = run_day(2)
    assigned.head(8)
    """),
    _md("""
    ## Mistakes in an outcomes file

    On day 3 the app's export goes wrong in three ways: a participant id that was never enrolled, a
    reward typed as text, and a row sent twice. `record` checks the whole file first and refuses it,
    naming every problem by row, column and value; nothing is written.
    """),
    _code("""
    assigned, result = run_day(3, record=False)
    bad = result.astype({"log_minutes": object}).copy()
    bad.loc[0, "participant"] = "p999"                  # unknown participant
    bad.loc[1, "log_minutes"] = "twelve"               # non-numeric reward
    bad = pd.concat([bad, bad.iloc[[2]]], ignore_index=True)  # the same row twice
    bad_path = write(bad, "outcomes-day3-bad.csv")


    def fingerprint(path):
        with sqlite3.connect(path) as conn:
            return hashlib.sha256("\\n".join(conn.iterdump()).encode()).hexdigest()


    before, outcomes_before = fingerprint(db), study.status(db).outcomes
    try:
        study.record(db, bad_path)
    except pb.InputError as err:   # LogError, a subclass of InputError; the command line exits with status 2
        print(f"{type(err).__name__}: {err}")
    print("database unchanged:", fingerprint(db) == before and study.status(db).outcomes == outcomes_before)
    """),
    _md("""
    The corrected file goes in as usual; recording the same file again changes nothing (rows already
    stored with the same value are skipped), and a different value for an outcome already stored
    would need `correct=True`, which keeps the old value in the database.
    """),
    _code("""
    good_path = write(result, "outcomes-day3.csv")
    print(study.record(db, good_path))
    print(study.record(db, good_path))
    last_reward.update(result.dropna().set_index("participant")["log_minutes"].to_dict())
    """),
    _md("""
    ## The rest of the study

    The second wave enrols on day 7. `status` shows the state at any time: who is due next, decisions
    without an outcome, decisions per condition and format, and the pooled policy's latest posterior
    summary.
    """),
    _code("""
    last_day = int(truth.enrol_step.max()) + design.study.horizon - 1
    for day in range(4, 10):
        run_day(day)
    s = study.status(db)
    print(f"after step {s.last_step}: {s.decisions} decisions, {s.outcomes} with an outcome, "
          f"{len(s.due)} learners due at step {s.next_step}, {s.finished} finished")
    snapshot = pd.DataFrame({"population mean": s.snapshot["beta"], "between-learner sd": s.snapshot["tau"]},
                            index=s.snapshot["coef"])
    display(s.arm_counts)
    snapshot
    """),
    _code("""
    for day in range(10, last_day + 1):
        run_day(day)
    s = study.status(db)
    print(f"last step {s.last_step}: {s.finished} of {sum(s.enrolled.values())} learners finished, "
          f"{len(s.missing)} decisions missing an outcome")
    s.arm_counts
    """),
    _md("""
    ## Export and verify

    `export` writes the study log, one row per decision with the latest outcome, in the format that
    fitting, classification and analysis read. `verify` replays every day from the data recorded
    before it and the study seed, and checks that each stored arm, probability table and
    randomisation is reproduced exactly.
    """),
    _code("""
    log = study.export(db, work / "log.csv", design_out=work / "design-from-study.toml")
    report = study.verify(db)
    print(f"verify: {'OK' if report.ok else 'MISMATCHES'}; {report.steps} steps, {report.decisions} decisions, "
          f"{report.randomisations} enrolment randomisations re-derived")
    for line in report.mismatches[:10]:
        print("  ", line)
    table = log[[f"prob_{a}" for a in design.arms]].to_numpy()
    exact = (table[np.arange(len(log)), pd.Index(design.arms).get_indexer(log["arm"])] == log["propensity"]).all()
    print("every logged propensity is its probability table's entry for the chosen arm:", bool(exact))
    log.head()
    """),
    _md("""
    Each row below is a learner, each cell a study day, coloured by the format given (pale: the
    session was missed). The second wave starts a week later; random-control learners are at the
    bottom. The right panel shows the logged probability of each chosen format: after its forced
    exploration the pooled policy stays inside its clip band (dashed lines); control stays at 1/3.
    """),
    _code("""
    order = log.drop_duplicates("participant").sort_values(["condition", "step"])["participant"].tolist()
    grid = np.full((len(order), int(log["step"].max()) + 1), np.nan)
    missed = np.zeros_like(grid, dtype=bool)
    row_of = {p: i for i, p in enumerate(order)}
    rows = log["participant"].map(row_of).to_numpy()
    grid[rows, log["step"]] = pd.Index(design.arms).get_indexer(log["arm"])
    missed[rows, log["step"]] = log["log_minutes"].isna().to_numpy()

    colors = ["#1f77b4", "#2ca02c", "#d62728"]
    fig, (a, b) = plt.subplots(1, 2, figsize=(13, 5.2), gridspec_kw={"width_ratios": [1.5, 1]})
    a.imshow(grid, cmap=ListedColormap(colors), aspect="auto", interpolation="none", vmin=0, vmax=2)
    a.imshow(np.where(missed, 1.0, np.nan), cmap=ListedColormap(["white"]), alpha=0.6, aspect="auto",
             interpolation="none")
    a.set_yticks(range(len(order)), order, fontsize=7)
    n_control = int((log.drop_duplicates("participant")["condition"] == "control").sum())
    a.axhline(len(order) - n_control - 0.5, color="k", lw=1)
    a.set_xticks(range(0, grid.shape[1], 7))
    a.set_xticks(range(grid.shape[1]), minor=True)
    a.set_xlabel("study day (day 0 is a Monday)")
    a.set_title("format given (pale: session missed); control learners below the line")
    a.legend(handles=[Patch(color=c, label=arm) for c, arm in zip(colors, design.arms)], ncol=3,
             loc="upper center", bbox_to_anchor=(0.5, -0.1), frameon=False)

    for cond, marker in [("adaptive", "o"), ("control", "s")]:
        part = log[log["condition"] == cond]
        jitter = np.random.default_rng(SEED).uniform(-0.25, 0.25, len(part))
        b.scatter(part["decision"] + jitter, part["propensity"], s=10, alpha=0.5, marker=marker, label=cond)
    for y in spec.clip or ():
        b.axhline(y, ls="--", lw=0.8, color="0.4")
    b.set_xlabel("decision")
    b.set_ylabel("probability of the format given")
    b.set_ylim(0, 1.05)
    b.legend(frameon=False, loc="upper center", bbox_to_anchor=(0.5, -0.12), ncol=2)
    b.grid(alpha=0.3)
    fig.tight_layout()
    """),
    _md("""
    The exported `log.csv` and `design-from-study.toml` are all the next notebook needs: fit the
    hierarchical model, classify each learner and analyse the study (`03-report.ipynb`, which uses a
    simulated log so that it can also check the answers against the truth).
    On the command line the whole day is:

    ```
    poolbandit study assign --db study.sqlite --context context.csv --out arms.csv
    poolbandit study record --db study.sqlite outcomes.csv
    ```
    """),
]


# ---------------------------------------------------------------------------
# 03: fit, classify, report, analyse
# ---------------------------------------------------------------------------
REPORT = [
    _md("""
    # 3. Report: who is which kind of learner, and what did the study show?

    From a study log to the report:

    1. fit the full hierarchical model with PyMC's NUTS and check the diagnostics;
    2. classify every learner (drill-, story-, roleplay-leaning or no clear preference) with honest
       uncertainty, and estimate how common each kind is;
    3. compare the labels with an intake questionnaire;
    4. check the model against the data (posterior predictive check);
    5. the end-of-study analysis of the formats, with the cautions that adaptively collected data need.

    The log here is simulated with pooled Thompson sampling, so every answer can be checked against
    the simulated truth. For a real study, read the export of notebook 2 instead:
    `log = pb.read_log("log.csv", pb.load_design("design-from-study.toml"))`.

    **Run time.** 40 learners and 2 chains x 500 draws keep the notebook under a minute on 2 cores
    (most of it PyMC compiling and sampling). For a report, use the design's 80 learners and
    4 chains x 1000 draws (`LEARNERS`, `CHAINS`, `DRAWS` below).
    """),
    _code("""
    %matplotlib inline
    import time
    import warnings

    import arviz as az
    import matplotlib.pyplot as plt
    import numpy as np
    import pandas as pd
    import xarray as xr
    from IPython.display import display

    import poolbandit as pb
    from poolbandit.analysis import ADAPTIVE_CAUTION, ESTIMAND_TEXT, OutcomePredictions, analyse
    from poolbandit.analysis.report import arm_value_figure
    from poolbandit.classify import (agreement, calibrate, classify, describe_rule, population_effects,
                                     true_categories, true_effects)
    from poolbandit.models import ModelData, arm_effects, diagnostics_table, fit
    from poolbandit.models.design_matrix import arm_rows
    from poolbandit.report import (confusion_heatmap, forest_plot, prevalence_plot, probability_bars,
                                   reliability_diagram)

    # a notice printed by ArviZ itself on import, not about our data
    warnings.filterwarnings("ignore", message=".*ArviZ is undergoing a major refactor.*", category=FutureWarning)

    SEED = 20261201
    LEARNERS = 40
    CHAINS, DRAWS, TUNE = 2, 500, 500
    g_study, g_fit, g_population, g_intake, g_ppc, g_analysis = np.random.default_rng(SEED).spawn(6)
    pd.set_option("display.precision", 3)
    plt.rcParams["figure.dpi"] = 90
    """),
    _md("""
    ## The study log

    One simulated study of the practice-formats design with the pooled Thompson policy. The log is
    written and read back as a live export would be (`read_log` validates it against the design).
    """),
    _code("""
    design = pb.default_design()
    pooled = next(name for name, spec in design.policies.items() if spec.kind == "pooled-thompson")
    study = pb.simulate(design, pooled, g_study, size=LEARNERS)
    pb.write_log(study.log, "log.csv")
    log = pb.read_log("log.csv", design)
    reward = design.study.reward
    print(f"{log['participant'].nunique()} learners, {len(log)} decisions, "
          f"{log[reward].notna().mean():.0%} with a session")
    log.head()
    """),
    _md("""
    ## Fit the hierarchical model

    Every learner has their own effect of each format (and of weekends and yesterday's practice),
    drawn from a population distribution whose mean and spread are estimated too: learners with
    little data borrow strength from the others. NUTS samples it in PyMC; the first fit in a session
    pays for compiling the model.
    """),
    _code("""
    t0 = time.perf_counter()
    idata = fit(log, design, engine="full", chains=CHAINS, draws=DRAWS, tune=TUNE, rng=g_fit)
    print(f"{CHAINS} chains x {DRAWS} draws after {TUNE} tuning steps in {time.perf_counter() - t0:.0f} s")
    idata
    """),
    _md("""
    ## Diagnostics

    One row per parameter: R-hat (should be at most 1.01) and the bulk and tail effective sample
    sizes (at least 100 per chain), and the count of divergent transitions (should be 0). With
    hundreds of parameters and a short run, a few R-hat values just above 1.01 are common; they
    disappear with longer chains. The histograms show all parameters at once.
    """),
    _code("""
    diag = diagnostics_table(idata, ess_min=100 * CHAINS, warn=False)
    params = diag[diag["variable"] != "divergences"]
    print(f"divergent transitions: {diag.attrs['divergences']}; flagged parameters: "
          f"{int(params['flagged'].sum())} of {len(params)}")
    display(params.groupby("variable").agg(n=("parameter", "size"), r_hat_max=("r_hat", "max"),
                                           ess_bulk_min=("ess_bulk", "min"), ess_tail_min=("ess_tail", "min"),
                                           flagged=("flagged", "sum")))
    fig, axes = plt.subplots(1, 3, figsize=(13, 3))
    axes[0].hist(params["r_hat"].dropna(), bins=40, color="tab:blue")
    axes[0].axvline(1.01, color="tab:red", ls="--")
    axes[0].set_xlabel("R-hat")
    for ax, col in zip(axes[1:], ["ess_bulk", "ess_tail"]):
        ax.hist(params[col].dropna(), bins=40, color="tab:blue")
        ax.axvline(100 * CHAINS, color="tab:red", ls="--")
        ax.set_xlabel(col.replace("_", " "))
    axes[0].set_ylabel("parameters")
    fig.tight_layout()
    """),
    _code("""
    fig, axes = plt.subplots(1, 2, figsize=(12, 4.2))
    az.plot_forest(idata, var_names=["beta"], combined=True, hdi_prob=0.9, ax=axes[0], textsize=9)
    az.plot_forest(idata, var_names=["tau"], combined=True, hdi_prob=0.9, ax=axes[1], textsize=9)
    axes[0].set_title("population mean of each coefficient (beta)", fontsize=10)
    axes[1].set_title("between-learner sd of each coefficient (tau)", fontsize=10)
    fig.tight_layout()
    """),
    _md("""
    ## Classify the learners

    For every posterior draw each learner's format effects (on a weekday, with an average yesterday)
    fall into the first of the design's categories whose rule they meet (the rules are printed
    below), or into none. A learner's probability of a category is the share of draws in it; they get a
    label only when that probability reaches 0.8, otherwise "undetermined".
    """),
    _code("""
    effect = arm_effects(idata, design.arms, design.features)
    covariates = ModelData.from_log(log, design).W
    new_learners = population_effects(idata, design.arms, design.features, covariates=covariates,
                                      rng=g_population)
    classification = classify(effect, design.categories, population_effect=new_learners)
    for rule in design.categories:
        print(f"{rule.name}: {describe_rule(rule)}")
    print("\\n".join(classification.summary_lines()))
    classification.label_counts().to_frame("learners")
    """),
    _md("""
    Each learner's format effects with 90% intervals, sorted and coloured by their label:
    """),
    _code("""
    display(forest_plot(classification))
    """),
    _md("""
    The same learners' category probabilities; the dashed line is the labelling threshold.
    """),
    _code("""
    display(probability_bars(classification))
    """),
    _md("""
    ## How common is each kind of learner?

    Two estimates with 90% intervals: the share among the studied learners, and the share expected
    for a new learner drawn from the fitted population. Crosses mark the shares among the studied
    learners in the simulated truth.
    """),
    _code("""
    truth_categories = true_categories(true_effects(study.population), design.categories)
    true_share = truth_categories["category"].value_counts(normalize=True)
    fig = prevalence_plot(classification.prevalence, mass=classification.mass)
    ax = fig.axes[0]
    cats = [t.get_text() for t in ax.get_yticklabels()]
    ax.scatter([true_share.get(c, 0.0) for c in cats], ax.get_yticks(), marker="x", s=80, color="k",
               zorder=5, label="simulated truth (studied learners)")
    ax.legend(loc="best", fontsize=8)
    display(fig)
    """),
    _md("""
    Because the truth is known here, we can also ask how trustworthy the probabilities are: the
    share labelled, how many labels are right, the Brier score, and a reliability diagram (when the
    model says 70%, is it right 70% of the time?). With 40 learners the bins are small.
    """),
    _code("""
    calibration = calibrate(classification, true_effects(study.population))
    print({k: round(float(v), 3) for k, v in calibration.summary().items()})
    display(reliability_diagram(calibration.reliability(), title="category probabilities against the truth"))
    """),
    _md("""
    ## Agreement with an intake questionnaire

    Suppose learners also said at intake which format they expect to like. We simulate a noisy
    questionnaire: 60% of learners name their true category, the rest pick another at random (a
    learner whose true effects fit no category also picks at random). Cohen's
    kappa is computed over the labelled learners; the posterior kappa also carries the uncertainty of
    the categories themselves.
    """),
    _code("""
    names = [c.name for c in design.categories]
    true_cat = truth_categories.set_index("participant")["category"]
    honest = (g_intake.random(len(true_cat)) < 0.6) & true_cat.isin(names).to_numpy()
    other = [g_intake.choice([n for n in names if n != c]) for c in true_cat]
    intake = pd.Series(np.where(honest, true_cat.to_numpy(), other), index=true_cat.index, name="intake")

    agree = agreement(classification, intake)
    k = agree.kappa
    print(f"labelled learners: kappa {k.kappa:.2f} [{k.low:.2f}, {k.high:.2f}] over {k.n} learners "
          f"({agree.n_undetermined} undetermined)")
    pk = agree.posterior_kappa
    print(f"all learners, draw by draw: kappa {pk['mean']:.2f} [{pk['low']:.2f}, {pk['high']:.2f}]")
    display(confusion_heatmap(agree.table, title="posterior label against intake answer"))
    """),
    _md("""
    ## Posterior predictive check

    Does the fitted model produce data like ours? The engines return the posterior, not replicated
    data, so we build the replicates here: for each draw, every observed decision's mean from that
    learner's coefficients plus Gaussian noise with that draw's sigma. ArviZ then overlays the
    density of the observed rewards on those of the replicates.
    """),
    _code("""
    data = ModelData.from_log(log, design)
    post = idata.posterior
    theta = post["theta"].transpose("chain", "draw", "participant", "coef").to_numpy()
    mean = np.einsum("np,cdnp->cdn", data.X, theta[:, :, data.group, :])
    sigma = post["sigma"].to_numpy()[..., None]
    y_rep = mean + sigma * g_ppc.standard_normal(mean.shape)
    idata.add_groups(posterior_predictive=xr.Dataset(
        {"y": (("chain", "draw", "obs"), y_rep)},
        coords={"chain": post["chain"], "draw": post["draw"], "obs": np.arange(len(data.y))}))

    fig, axes = plt.subplots(1, 2, figsize=(13, 3.8))
    az.plot_ppc(idata, var_names=["y"], num_pp_samples=100, random_seed=SEED, ax=axes[0])
    axes[0].set_xlabel(reward)

    # a check the density cannot make: the spread of the learners' own mean rewards
    onehot = np.eye(data.n_participants)[data.group]          # (observation, learner)
    counts = onehot.sum(axis=0)
    observed_spread = (data.y @ onehot / counts).std(ddof=1)
    flat = y_rep.reshape(-1, y_rep.shape[-1])[:: max(1, CHAINS * DRAWS // 400)]
    replicated = (flat @ onehot / counts).std(axis=1, ddof=1)
    axes[1].hist(replicated, bins=30, color="tab:blue", alpha=0.6, label="replicated data")
    axes[1].axvline(observed_spread, color="k", lw=2, label="observed")
    axes[1].set_xlabel("sd of the learners' mean rewards")
    axes[1].legend(frameon=False)
    fig.tight_layout()
    print(f"posterior predictive p-value of that spread: {(replicated >= observed_spread).mean():.2f} "
          "(values near 0 or 1 would point at a misfit)")
    """),
    _md("""
    ## End-of-study analysis

    Which format is best on average? The answer needs care, because the data were collected
    adaptively. The package says why:
    """),
    _code("""
    print(ADAPTIVE_CAUTION)
    print()
    print(ESTIMAND_TEXT)
    """),
    _md("""
    The doubly robust estimate needs an outcome model. We plug in the model we already fitted: its
    prediction of every format at every logged decision, one value per posterior draw. Because the
    log is simulated, the true value of each format (the average over learners of their true
    expected reward in the contexts that occurred) is known and shown as a black bar.
    """),
    _code("""
    draws = post["theta"].stack(sample=("chain", "draw")).transpose("sample", "participant", "coef")
    draws = draws.isel(sample=slice(None, None, max(1, CHAINS * DRAWS // 200))).to_numpy()
    code = pd.Index(post["participant"].to_numpy()).get_indexer(log["participant"])
    rows = arm_rows(log[list(design.features)].to_numpy(dtype=float), design.n_arms)  # (decision, arm, coef)
    predicted = np.einsum("nkp,snp->snk", rows, draws[:, code, :])
    model = OutcomePredictions(predicted.mean(axis=0), predicted, "hierarchical model (PyMC NUTS)")

    labels = classification.labels.set_index("participant")["label"]
    result = analyse(log, design, outcome_model=model, outcome_note="outcome model: the NUTS fit above",
                     categories=labels, design_policies=False, rng=g_analysis)

    observed = log[log[reward].notna()]
    who = observed["participant"].map({p: i for i, p in enumerate(study.population.ids)}).to_numpy()
    expected = study.population.expected(who, observed[list(design.features)].to_numpy(dtype=float))
    true_value = pd.DataFrame(expected, columns=design.arms).groupby(who).mean().mean()

    fig = arm_value_figure(result.arm_values)
    ax = fig.axes[0]
    ax.scatter(true_value[list(design.arms)].to_numpy(), np.arange(design.n_arms)[::-1], marker="|", s=900,
               color="k", zorder=6, label="simulated truth")
    fig.set_size_inches(9, 3.4)
    ax.legend(loc="center left", bbox_to_anchor=(1.01, 0.5), fontsize="small", frameon=False)
    fig.subplots_adjust(left=0.12, right=0.8, bottom=0.18)
    display(fig)
    overall = result.arm_values[result.arm_values["group"] == "all"]
    overall.pivot(index="arm", columns="estimator", values="estimate").reindex(design.arms).assign(
        truth=true_value)
    """),
    _md("""
    The notes the analysis attaches to its tables, and the arm values within each label group
    (these describe the learners as grouped by this same data, not a pre-registered subgroup):
    """),
    _code("""
    for note in result.notes + result.warnings:
        print("-", note)
    by_label = result.arm_values[(result.arm_values["group"] != "all") & (result.arm_values["estimator"] == "dr")]
    by_label.pivot(index="group", columns="arm", values="estimate")[list(design.arms)]
    """),
    _md("""
    Adaptive against control needs a study with a randomised control group, like the one of notebook 2
    (its export has a `condition` column); this simulated log has none, so the comparison says so:
    """),
    _code("""
    result.conditions[["outcome", "method", "status", "note"]]
    """),
    _md("""
    The command line writes the same results as files and an HTML report:

    ```
    poolbandit fit log.csv --design design.toml --engine full --out fit
    poolbandit classify log.csv --design design.toml --out classification
    ```
    """),
]

#: Notebook file name -> cells.
NOTEBOOKS = {"01-design.ipynb": DESIGN, "02-run-a-study.ipynb": STUDY, "03-report.ipynb": REPORT}


def build(cells) -> nbformat.NotebookNode:
    """A v4 notebook of ``cells`` with no outputs, for the Python 3 kernel."""
    nb = new_notebook(cells=cells)
    nb.metadata["kernelspec"] = {"name": "python3", "display_name": "Python 3", "language": "python"}
    nb.metadata["language_info"] = {"name": "python"}
    nbformat.validate(nb)
    return nb


def main() -> None:
    for name, cells in NOTEBOOKS.items():
        for j, cell in enumerate(cells):  # stable ids keep diffs small
            cell["id"] = f"{name.split('-')[0]}-{j:02d}"
        nbformat.write(build(cells), HERE / name)
        print("wrote", HERE / name)


if __name__ == "__main__":
    main()

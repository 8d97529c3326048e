"""Read and validate a study design (``design.toml``) into frozen dataclasses.

A design names the arms, the horizon, the outcome, the context features and
participant covariates, the population assumptions used in simulation, the
policies to run and the categories to report. Every mistake raises
:class:`~poolbandit.errors.DesignError` whose message names the key path and
the offending value, for example::

    policies.ucb.c: expected a number >= 0, got "two"
"""

from __future__ import annotations

import hashlib
import math
import tomllib
from dataclasses import dataclass, field
from importlib import resources
from pathlib import Path
from types import MappingProxyType
from typing import Any, Literal, Mapping

from .errors import DesignError, format_value
from .policies._catalogue import COMMON, KINDS, Choice, Constraint, Number

__all__ = [
    "DesignSpec",
    "StudySpec",
    "PopulationSpec",
    "LatentType",
    "FeatureSim",
    "PolicySpec",
    "CategorySpec",
    "PriorSpec",
    "SweepSpec",
    "load_design",
    "parse_design",
    "default_design",
    "DEFAULT_DESIGN_NAME",
]

DEFAULT_DESIGN_NAME = "practice-formats.toml"
Outcome = Literal["gaussian", "bernoulli"]


# --------------------------------------------------------------------------
# The dataclasses
# --------------------------------------------------------------------------
@dataclass(frozen=True)
class StudySpec:
    """The ``[study]`` table."""

    arms: tuple[str, ...]
    horizon: int
    outcome: Outcome = "gaussian"
    reward: str = "reward"
    seed: int | None = None
    title: str = ""


@dataclass(frozen=True)
class FeatureSim:
    """How a context feature is simulated.

    ``kind`` is one of ``weekend`` (1 on two days of every seven, counted from
    each participant's enrolment weekday), ``bernoulli`` (independent 0/1 with
    probability ``p``), ``normal`` (independent standard normal) or
    ``previous-reward`` (the participant's previous reward, centred and scaled
    by ``center`` and ``scale``, 0 when missing).
    """

    kind: Literal["weekend", "bernoulli", "normal", "previous-reward"] = "normal"
    p: float = 0.5
    center: float = 0.0
    scale: float = 1.0


@dataclass(frozen=True)
class LatentType:
    """A named latent type of participant with its own arm means and share."""

    name: str
    share: float
    arm_means: tuple[float, ...]


@dataclass(frozen=True)
class PopulationSpec:
    """The ``[population]`` table: assumptions for simulation only.

    Participant ``i``'s coefficient for arm ``k`` at the reference context is
    ``arm_means[k]`` (or its latent type's mean) plus
    ``covariate_effects[k] @ w_i`` plus ``arm_sd[k] * z_ik`` with standard
    normal ``z``. Its interaction with feature ``f`` is
    ``context_effects[k][f]``.
    """

    size: int = 60
    arm_means: tuple[float, ...] = ()
    arm_sd: tuple[float, ...] = ()
    noise_sd: float = 1.0
    adherence: float = 1.0
    dropout: float = 0.0
    waves: int = 1
    wave_gap: int = 7
    types: tuple[LatentType, ...] = ()
    context_effects: tuple[tuple[float, ...], ...] = ()
    covariate_effects: tuple[tuple[float, ...], ...] = ()
    features: Mapping[str, FeatureSim] = field(default_factory=lambda: MappingProxyType({}))


@dataclass(frozen=True)
class PolicySpec:
    """One named policy: its kind and validated parameters (defaults filled)."""

    name: str
    kind: str
    params: Mapping[str, Any]

    @property
    def explore_first(self) -> int:
        return int(self.params.get("explore_first", 0))

    @property
    def clip(self) -> tuple[float, float] | None:
        return self.params.get("clip")


@dataclass(frozen=True)
class CategorySpec:
    """A named category rule over one participant's arm effects.

    Exactly one form applies:

    * ``best = A`` (optional ``margin``): arm A beats every other arm by more
      than ``margin``;
    * ``beats = A``, ``over = B``, ``delta``: arm A beats arm B by more than
      ``delta``;
    * ``within = delta``: every pairwise difference lies inside ``[-delta, delta]``.
    """

    name: str
    form: Literal["best", "beats", "within"]
    arm: str | None = None
    other: str | None = None
    threshold: float = 0.0


@dataclass(frozen=True)
class PriorSpec:
    """Overrides of the hierarchical model's weakly informative priors.

    ``beta_sd``: sd of the normal prior on population coefficients;
    ``gamma_sd``: sd of the normal prior on covariate effects;
    ``tau_scale``: scale of the prior on heterogeneity scales;
    ``tau_family``: ``half-normal`` (default) or ``half-cauchy`` for that prior;
    ``sigma_scale``: scale of the half-normal prior on the noise sd;
    ``covariance``: ``diagonal`` or ``full`` (LKJ with ``lkj_eta``);
    ``population``: ``normal`` (default: ``theta_i ~ N(beta + Gamma w_i,
    Sigma)``) or ``mixture`` (a finite mixture of ``components`` normal
    populations sharing ``Sigma``, ``theta_i ~ N(mu_{z_i} + Gamma w_i,
    Sigma)``, ``z_i ~ Categorical(pi)``, ``pi ~ Dirichlet(mixture_concentration)``,
    ``mu_c`` with the prior of ``beta``; ``beta`` is then ``sum_c pi_c mu_c``);
    ``components``: the number of components of a mixture (integer >= 2);
    ``mixture_concentration``: the Dirichlet concentration of the weights.
    """

    beta_sd: float = 1.0
    gamma_sd: float = 0.5
    tau_scale: float = 0.5
    tau_family: Literal["half-normal", "half-cauchy"] = "half-normal"
    sigma_scale: float = 1.0
    covariance: Literal["diagonal", "full"] = "diagonal"
    lkj_eta: float = 2.0
    population: Literal["normal", "mixture"] = "normal"
    components: int = 4
    mixture_concentration: float = 1.0


@dataclass(frozen=True)
class SweepSpec:
    """A tuning sweep: one policy and a grid of parameter values."""

    name: str
    policy: str
    grid: Mapping[str, tuple[Any, ...]]


@dataclass(frozen=True)
class DesignSpec:
    """A whole validated design."""

    study: StudySpec
    features: tuple[str, ...] = ()
    covariates: tuple[str, ...] = ()
    population: PopulationSpec = field(default_factory=PopulationSpec)
    policies: Mapping[str, PolicySpec] = field(default_factory=lambda: MappingProxyType({}))
    categories: tuple[CategorySpec, ...] = ()
    priors: PriorSpec = field(default_factory=PriorSpec)
    sweeps: tuple[SweepSpec, ...] = ()
    source_text: str = ""
    source: str | None = None

    @property
    def arms(self) -> tuple[str, ...]:
        return self.study.arms

    @property
    def n_arms(self) -> int:
        return len(self.study.arms)

    @property
    def sha256(self) -> str:
        """Hash of the design text as submitted (empty text for built designs)."""
        return hashlib.sha256(self.source_text.encode("utf-8")).hexdigest()

    def policy(self, name: str) -> PolicySpec:
        """Return the named policy or raise a DesignError listing the names."""
        try:
            return self.policies[name]
        except KeyError:
            known = ", ".join(self.policies) or "(none)"
            raise DesignError(
                "policies", f"no policy named {format_value(name)}; known: {known}", source=self.source
            ) from None


# --------------------------------------------------------------------------
# Loading
# --------------------------------------------------------------------------
def load_design(path: str | Path) -> DesignSpec:
    """Read and validate a design file.

    Raises
    ------
    DesignError
        If the file is missing, is not valid TOML, or breaks a rule.
    """
    path = Path(path)
    try:
        text = path.read_text(encoding="utf-8")
    except FileNotFoundError:
        raise DesignError("", "file not found", source=str(path)) from None
    except (OSError, UnicodeDecodeError) as err:
        raise DesignError("", f"cannot read file ({err})", source=str(path)) from None
    return parse_design(text, source=str(path))


def default_design() -> DesignSpec:
    """The embedded demo design (the practice-formats scenario)."""
    text = resources.files("poolbandit.data").joinpath(DEFAULT_DESIGN_NAME).read_text("utf-8")
    return parse_design(text, source=f"<embedded {DEFAULT_DESIGN_NAME}>")


def parse_design(text: str, *, source: str | None = None) -> DesignSpec:
    """Validate the text of a design file (see :func:`load_design`)."""
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as err:
        raise DesignError("", f"not valid TOML ({err})", source=source) from None
    return _Parser(source).design(raw, text)


# --------------------------------------------------------------------------
# The parser: one small method per table, one error shape
# --------------------------------------------------------------------------
_TOP_KEYS = {"study", "context", "participants", "population", "policies", "categories", "priors", "sweeps"}


class _Parser:
    def __init__(self, source: str | None):
        self.source = source

    # -- helpers ------------------------------------------------------------
    def fail(self, path: str, message: str) -> DesignError:
        return DesignError(path, message, source=self.source)

    def expect(self, path: str, what: str, value: Any) -> DesignError:
        return self.fail(path, f"expected {what}, got {format_value(value)}")

    def table(self, raw: Any, path: str, allowed: set[str], required: set[str] = frozenset()) -> dict:
        if not isinstance(raw, dict):
            raise self.expect(path, "a table", raw)
        for key in raw:
            if key not in allowed:
                hint = ", ".join(sorted(allowed))
                raise self.fail(f"{path}.{key}" if path else key, f"unknown key (allowed: {hint})")
        for key in sorted(required):
            if key not in raw:
                raise self.fail(f"{path}.{key}" if path else key, "required key is missing")
        return raw

    def check(self, constraint: Constraint, value: Any, path: str) -> Any:
        try:
            return constraint.check(value)
        except ValueError as err:
            raise self.expect(path, str(err), value) from None

    def name(self, value: Any, path: str) -> str:
        if not isinstance(value, str) or not value.strip():
            raise self.expect(path, "a non-empty string", value)
        if value != value.strip() or any(c in value for c in ",\n\r\t\""):
            raise self.expect(path, "a name without surrounding spaces, commas, quotes or tabs", value)
        return value

    def names(self, value: Any, path: str, *, allow_empty: bool = True) -> tuple[str, ...]:
        if not isinstance(value, list):
            raise self.expect(path, "a list of names", value)
        if not value and not allow_empty:
            raise self.expect(path, "a non-empty list of names", value)
        out = tuple(self.name(v, f"{path}[{i}]") for i, v in enumerate(value))
        seen: set[str] = set()
        for i, v in enumerate(out):
            if v in seen:
                raise self.fail(f"{path}[{i}]", f"duplicate name {format_value(v)}")
            seen.add(v)
        return out

    def numbers(self, value: Any, path: str, n: int, constraint: Constraint = Number()) -> tuple[float, ...]:
        if not isinstance(value, list):
            raise self.expect(path, f"a list of {n} numbers", value)
        if len(value) != n:
            raise self.fail(path, f"expected {n} values (one per arm), got {len(value)}")
        return tuple(float(self.check(constraint, v, f"{path}[{i}]")) for i, v in enumerate(value))

    def matrix(self, value: Any, path: str, rows: int, cols: int) -> tuple[tuple[float, ...], ...]:
        if not isinstance(value, list) or len(value) != rows:
            raise self.expect(path, f"a list of {rows} rows (one per arm) of {cols} numbers", value)
        return tuple(self.numbers(r, f"{path}[{i}]", cols) for i, r in enumerate(value))

    # -- tables -------------------------------------------------------------
    def design(self, raw: dict, text: str) -> DesignSpec:
        self.table(raw, "", _TOP_KEYS, {"study"})
        study = self.study(raw["study"])
        features = self.names(self.table(raw.get("context", {}), "context", {"features"}).get("features", []),
                              "context.features")
        covariates = self.names(
            self.table(raw.get("participants", {}), "participants", {"covariates"}).get("covariates", []),
            "participants.covariates",
        )
        for i, name in enumerate(features + covariates):
            if name in _RESERVED_COLUMNS or name == study.reward or name.startswith("prob_"):
                where = f"context.features[{i}]" if i < len(features) else f"participants.covariates[{i - len(features)}]"
                raise self.fail(where, f"name {format_value(name)} clashes with a study log column")
        if set(features) & set(covariates):
            clash = sorted(set(features) & set(covariates))[0]
            raise self.fail("participants.covariates", f"duplicate name {format_value(clash)} (also a context feature)")
        population = self.population(raw.get("population", {}), study, features, covariates)
        policies = self.policies(raw.get("policies", {}), study)
        categories = self.categories(raw.get("categories", []), study)
        priors = self.priors(raw.get("priors", {}))
        sweeps = self.sweeps(raw.get("sweeps", []), policies)
        return DesignSpec(
            study=study,
            features=features,
            covariates=covariates,
            population=population,
            policies=MappingProxyType(policies),
            categories=categories,
            priors=priors,
            sweeps=sweeps,
            source_text=text,
            source=self.source,
        )

    def study(self, raw: Any) -> StudySpec:
        t = self.table(raw, "study", {"arms", "horizon", "outcome", "reward", "seed", "title"}, {"arms", "horizon"})
        arms = self.names(t["arms"], "study.arms", allow_empty=False)
        if len(arms) < 2:
            raise self.expect("study.arms", "at least two arms", t["arms"])
        horizon = self.check(Number(1, 10_000, integer=True), t["horizon"], "study.horizon")
        outcome = self.check(Choice(("gaussian", "bernoulli")), t.get("outcome", "gaussian"), "study.outcome")
        reward = self.name(t.get("reward", "reward"), "study.reward")
        if reward in _RESERVED_COLUMNS:
            raise self.fail("study.reward", f"name {format_value(reward)} clashes with a study log column")
        seed = t.get("seed")
        if seed is not None:
            seed = self.check(Number(0, 2**63 - 1, integer=True), seed, "study.seed")
        title = t.get("title", "")
        if not isinstance(title, str):
            raise self.expect("study.title", "a string", title)
        return StudySpec(arms, horizon, outcome, reward, seed, title)

    def population(self, raw: Any, study: StudySpec, features: tuple[str, ...], covariates: tuple[str, ...]):
        allowed = {"size", "arm_means", "arm_sd", "noise_sd", "adherence", "dropout", "waves", "wave_gap",
                   "types", "context_effects", "covariate_effects", "features"}
        t = self.table(raw, "population", allowed)
        k = len(study.arms)
        size = self.check(Number(1, 10_000_000, integer=True), t.get("size", 60), "population.size")
        arm_means = self.numbers(t.get("arm_means", [0.0] * k), "population.arm_means", k)
        arm_sd = self.numbers(t.get("arm_sd", [0.5] * k), "population.arm_sd", k, Number(0))
        noise_sd = self.check(Number(0, low_open=True), t.get("noise_sd", 1.0), "population.noise_sd")
        adherence = self.check(Number(0, 1, low_open=True), t.get("adherence", 1.0), "population.adherence")
        dropout = self.check(Number(0, 1, high_open=True), t.get("dropout", 0.0), "population.dropout")
        waves = self.check(Number(1, integer=True), t.get("waves", 1), "population.waves")
        if waves > size:
            raise self.fail("population.waves", f"expected at most population.size = {size} waves, got {waves}")
        wave_gap = self.check(Number(1, integer=True), t.get("wave_gap", 7), "population.wave_gap")
        types = self.types(t.get("types", []), k)
        ctx = self.matrix(t.get("context_effects", [[0.0] * len(features)] * k), "population.context_effects",
                          k, len(features))
        cov = self.matrix(t.get("covariate_effects", [[0.0] * len(covariates)] * k),
                          "population.covariate_effects", k, len(covariates))
        sims = self.feature_sims(t.get("features", {}), features)
        return PopulationSpec(size, arm_means, arm_sd, noise_sd, adherence, dropout, waves, wave_gap, types,
                              ctx, cov, MappingProxyType(sims))

    def types(self, raw: Any, k: int) -> tuple[LatentType, ...]:
        if not isinstance(raw, list):
            raise self.expect("population.types", "an array of tables [[population.types]]", raw)
        out, seen = [], set()
        for i, item in enumerate(raw):
            p = f"population.types[{i}]"
            t = self.table(item, p, {"name", "share", "arm_means"}, {"name", "share", "arm_means"})
            name = self.name(t["name"], f"{p}.name")
            if name in seen:
                raise self.fail(f"{p}.name", f"duplicate name {format_value(name)}")
            seen.add(name)
            share = self.check(Number(0, 1, low_open=True), t["share"], f"{p}.share")
            out.append(LatentType(name, share, self.numbers(t["arm_means"], f"{p}.arm_means", k)))
        if out and not math.isclose(sum(x.share for x in out), 1.0, abs_tol=1e-9):
            total = sum(x.share for x in out)
            raise self.fail("population.types", f"expected shares that sum to 1, got {total!r}")
        return tuple(out)

    def feature_sims(self, raw: Any, features: tuple[str, ...]) -> dict[str, FeatureSim]:
        t = self.table(raw, "population.features", set(features))
        sims = {}
        for name in features:
            p = f"population.features.{name}"
            item = self.table(t.get(name, {}), p, {"kind", "p", "center", "scale"})
            kind = self.check(Choice(("weekend", "bernoulli", "normal", "previous-reward")),
                              item.get("kind", "normal"), f"{p}.kind")
            prob = self.check(Number(0, 1), item.get("p", 0.5), f"{p}.p")
            center = self.check(Number(), item.get("center", 0.0), f"{p}.center")
            scale = self.check(Number(0, low_open=True), item.get("scale", 1.0), f"{p}.scale")
            sims[name] = FeatureSim(kind, prob, center, scale)
        return sims

    def policies(self, raw: Any, study: StudySpec) -> dict[str, PolicySpec]:
        if not isinstance(raw, dict):
            raise self.expect("policies", "a table of named policies", raw)
        out = {}
        for name, item in raw.items():
            p = f"policies.{name}"
            self.name(name, p)
            if not isinstance(item, dict):
                raise self.expect(p, "a table", item)
            if "kind" not in item:
                raise self.fail(f"{p}.kind", "required key is missing")
            kind = item["kind"]
            if kind not in KINDS:
                raise self.expect(f"{p}.kind", "one of " + ", ".join(f'"{k}"' for k in KINDS), kind)
            spec = {**COMMON, **KINDS[kind].params}
            self.table(item, p, set(spec) | {"kind"})
            params = {}
            for key, (constraint, default) in spec.items():
                params[key] = self.check(constraint, item[key], f"{p}.{key}") if key in item else default
            clip = params.get("clip")
            if clip is not None:
                k = len(study.arms)
                if clip[0] > 1 / k or clip[1] < 1 / k:
                    raise self.fail(f"{p}.clip", f"expected a band that contains 1/K = {1 / k:.4g}, got "
                                                 f"{[clip[0], clip[1]]!r}")
            if params.get("explore_first", 0) > study.horizon:
                raise self.fail(f"{p}.explore_first", f"expected at most study.horizon = {study.horizon}, "
                                                      f"got {params['explore_first']!r}")
            out[name] = PolicySpec(name, kind, MappingProxyType(params))
        return out

    def categories(self, raw: Any, study: StudySpec) -> tuple[CategorySpec, ...]:
        if not isinstance(raw, list):
            raise self.expect("categories", "an array of tables [[categories]]", raw)
        out, seen = [], set()
        arm = Choice(study.arms)
        for i, item in enumerate(raw):
            p = f"categories[{i}]"
            t = self.table(item, p, {"name", "best", "margin", "beats", "over", "delta", "within"}, {"name"})
            name = self.name(t["name"], f"{p}.name")
            if name in seen:
                raise self.fail(f"{p}.name", f"duplicate name {format_value(name)}")
            if name == "undetermined":
                raise self.fail(f"{p}.name", 'the name "undetermined" is reserved for unlabelled participants')
            seen.add(name)
            forms = [f for f in ("best", "beats", "within") if f in t]
            if len(forms) != 1:
                raise self.fail(p, "expected exactly one of best, beats or within")
            form = forms[0]
            extra = {"best": {"margin"}, "beats": {"over", "delta"}, "within": set()}[form]
            for key in {"margin", "over", "delta"} - extra:
                if key in t:
                    raise self.fail(f"{p}.{key}", f"not allowed with {form}")
            if form == "best":
                a = self.check(arm, t["best"], f"{p}.best")
                m = self.check(Number(0), t.get("margin", 0.0), f"{p}.margin")
                out.append(CategorySpec(name, "best", a, None, m))
            elif form == "beats":
                a = self.check(arm, t["beats"], f"{p}.beats")
                if "over" not in t:
                    raise self.fail(f"{p}.over", "required key is missing")
                b = self.check(arm, t["over"], f"{p}.over")
                if a == b:
                    raise self.fail(f"{p}.over", f"expected an arm other than {format_value(a)}, got {format_value(b)}")
                d = self.check(Number(0), t.get("delta", 0.0), f"{p}.delta")
                out.append(CategorySpec(name, "beats", a, b, d))
            else:
                d = self.check(Number(0, low_open=True), t["within"], f"{p}.within")
                out.append(CategorySpec(name, "within", None, None, d))
        return tuple(out)

    def priors(self, raw: Any) -> PriorSpec:
        t = self.table(raw, "priors", {"beta_sd", "gamma_sd", "tau_scale", "tau_family", "sigma_scale", "covariance",
                                       "lkj_eta", "population", "components", "mixture_concentration"})
        pos = Number(0, low_open=True)
        population = self.check(Choice(("normal", "mixture")), t.get("population", "normal"), "priors.population")
        if population != "mixture":
            for key in ("components", "mixture_concentration"):
                if key in t:
                    raise self.fail(f"priors.{key}", f'applies only with priors.population = "mixture", got '
                                                     f'{format_value(t[key])} with population = "{population}"')
        return PriorSpec(
            population=population,
            components=self.check(Number(2, 1000, integer=True), t.get("components", 4), "priors.components"),
            mixture_concentration=self.check(pos, t.get("mixture_concentration", 1.0),
                                             "priors.mixture_concentration"),
            beta_sd=self.check(pos, t.get("beta_sd", 1.0), "priors.beta_sd"),
            gamma_sd=self.check(pos, t.get("gamma_sd", 0.5), "priors.gamma_sd"),
            tau_scale=self.check(pos, t.get("tau_scale", 0.5), "priors.tau_scale"),
            tau_family=self.check(Choice(("half-normal", "half-cauchy")), t.get("tau_family", "half-normal"),
                                  "priors.tau_family"),
            sigma_scale=self.check(pos, t.get("sigma_scale", 1.0), "priors.sigma_scale"),
            covariance=self.check(Choice(("diagonal", "full")), t.get("covariance", "diagonal"), "priors.covariance"),
            lkj_eta=self.check(pos, t.get("lkj_eta", 2.0), "priors.lkj_eta"),
        )

    def sweeps(self, raw: Any, policies: dict[str, PolicySpec]) -> tuple[SweepSpec, ...]:
        if not isinstance(raw, list):
            raise self.expect("sweeps", "an array of tables [[sweeps]]", raw)
        out, seen = [], set()
        for i, item in enumerate(raw):
            p = f"sweeps[{i}]"
            t = self.table(item, p, {"name", "policy", "grid"}, {"policy", "grid"})
            pol = t["policy"]
            if pol not in policies:
                raise self.expect(f"{p}.policy", "the name of a policy in [policies]", pol)
            name = self.name(t.get("name", pol), f"{p}.name")
            if name in seen:
                raise self.fail(f"{p}.name", f"duplicate name {format_value(name)}")
            seen.add(name)
            kind = policies[pol].kind
            spec = {**COMMON, **KINDS[kind].params}
            grid_raw = self.table(t["grid"], f"{p}.grid", set(spec))
            if not grid_raw:
                raise self.expect(f"{p}.grid", "at least one parameter with a list of values", grid_raw)
            grid = {}
            for key, values in grid_raw.items():
                gp = f"{p}.grid.{key}"
                if not isinstance(values, list) or not values:
                    raise self.expect(gp, "a non-empty list of values", values)
                grid[key] = tuple(self.check(spec[key][0], v, f"{gp}[{j}]") for j, v in enumerate(values))
            out.append(SweepSpec(name, pol, MappingProxyType(grid)))
        return tuple(out)


#: Columns of the study log that design names must not shadow.
_RESERVED_COLUMNS = {
    "participant", "decision", "arm", "propensity", "policy", "step",
    "expected_reward", "best_expected_reward", "condition",
}

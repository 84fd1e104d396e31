"""Every setting a user can give, checked in one place.

The Python API, study files and the command line all pass their settings through these
checks, so a setting means the same thing and fails with the same message wherever it is
given. Nothing here reads data: this module sits below every other layer of the package
(it imports only the errors).

- what to fit: ``model``, ``scheme``, ``statistic``, ``method``, ``storage``
  (:func:`check_regression`, :func:`check_correlation`);
- how to run: permutations, seed, workers, exact enumeration, chunks, where chunks run,
  shards, run file, the stop rule (:class:`RunOptions`, :func:`run_options`);
- the stop rule itself (:class:`StopRule`, :func:`stop_rule`; the rules are described in
  ``dyadperm.pipeline.stopping``).
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Mapping

import numpy as np

from .errors import InputError, RunFileError

MODELS = ("linear", "logistic")
SCHEMES = ("y", "dsp", "freedman-lane")
STATISTICS = ("t", "coef")
LOGISTIC_SCHEMES = ("y", "dsp")
LOGISTIC_STATISTICS = ("t", "coef", "score")
METHODS = ("pearson", "spearman")
STORAGE = ("float64", "float32")
BACKENDS = ("threads", "processes", "dask")
EXACT_LIMIT = 10_000_000

STOP_RULES = ("none", "besag-clifford", "gandy")
#: h of Besag & Clifford (1991); they discuss h of 10 or 20 [memory].
DEFAULT_EXCEEDANCES = 10
#: Gandy's (2009) examples bound the resampling risk at 0.001 [memory].
DEFAULT_RISK = 0.001


# --------------------------------------------------------------------------- what to fit

def check_regression(*, model: Any, scheme: Any, statistic: Any, storage: Any) -> None:
    """InputError naming the first of model, scheme, statistic, storage not offered."""
    if model not in MODELS:
        raise InputError(f"model must be one of {', '.join(MODELS)}; got {model!r}")
    if model == "logistic":
        if scheme == "freedman-lane":
            raise InputError("scheme 'freedman-lane' is not offered for model='logistic': "
                             "fitted probabilities plus relabelled residuals are not 0/1, so "
                             "the logistic likelihood of the refit is undefined; use 'dsp' or "
                             "'y'")
        if scheme not in LOGISTIC_SCHEMES:
            raise InputError(f"scheme must be one of {', '.join(LOGISTIC_SCHEMES)} for "
                             f"model='logistic'; got {scheme!r}")
        if statistic not in LOGISTIC_STATISTICS:
            raise InputError(f"statistic must be one of {', '.join(LOGISTIC_STATISTICS)} for "
                             f"model='logistic'; got {statistic!r}")
        if storage != "float64":
            raise InputError(f"storage must be 'float64' for model='logistic'; got {storage!r}")
        return
    for name, value, offered in (("scheme", scheme, SCHEMES), ("statistic", statistic, STATISTICS),
                                 ("storage", storage, STORAGE)):
        if value not in offered:
            raise InputError(f"{name} must be one of {', '.join(offered)}; got {value!r}")


def check_ci(ci: Any) -> float | None:
    """The level of coefficient intervals (0 < ci < 1), or None for none."""
    if ci is None or ci is False:
        return None
    if isinstance(ci, bool) or not isinstance(ci, (int, float, np.integer, np.floating)) \
            or not math.isfinite(float(ci)) or not 0 < float(ci) < 1:
        raise InputError(f"ci must be a level with 0 < ci < 1 (0.95 for 95% intervals), or "
                         f"None for no intervals; got {ci!r}")
    return float(ci)


def check_correlation(*, method: Any, storage: Any) -> None:
    if method not in METHODS:
        raise InputError(f"method must be 'pearson' or 'spearman'; got {method!r}")
    if storage not in STORAGE:
        raise InputError(f"storage must be one of {', '.join(STORAGE)}; got {storage!r}")


# --------------------------------------------------------------------------- the stop rule

def check_level(name: str, value: Any, upper: float = 1.0) -> float:
    """A number strictly between 0 and ``upper`` (alpha, a precision, a risk)."""
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)) \
            or not math.isfinite(float(value)) or not 0 < float(value) < upper:
        raise InputError(f"`{name}` must be a number with 0 < {name} < {upper:g}; got {value!r}")
    return float(value)


@dataclass(frozen=True)
class StopRule:
    """A sequential stopping rule and its settings.

    ``rule`` is "none", "besag-clifford" or "gandy"; ``exceedances`` is h of Besag &
    Clifford (1991); ``risk`` bounds the resampling risk of Gandy (2009); ``alpha`` is the
    level Gandy's decision is about (and the level the report marks results at).
    """

    rule: str = "none"
    exceedances: int | None = None
    risk: float | None = None
    alpha: float = 0.05

    @property
    def active(self) -> bool:
        return self.rule != "none"

    def to_dict(self) -> dict:
        return {"rule": self.rule, "exceedances": self.exceedances, "risk": self.risk,
                "alpha": self.alpha}

    @classmethod
    def from_dict(cls, d: Mapping | None) -> "StopRule":
        if not d:
            return cls()
        return cls(str(d.get("rule", "none")), d.get("exceedances"), d.get("risk"),
                   float(d.get("alpha", 0.05)))

    def describe(self) -> str:
        if self.rule == "besag-clifford":
            return f"besag-clifford (h = {self.exceedances})"
        if self.rule == "gandy":
            return f"gandy (risk {self.risk:g} at alpha {self.alpha:g})"
        return "none"


def stop_rule(stop: Any = None, *, exceedances: Any = None, risk: Any = None,
              alpha: Any = None) -> StopRule:
    """A validated :class:`StopRule` from a rule name (or a StopRule) and settings.

    Settings left as None take the rule's defaults (h = 10; risk 0.001; alpha 0.05);
    a setting that does not belong to the rule is an error.
    """
    if isinstance(stop, StopRule):
        base = stop
        rule = stop.rule
    else:
        rule = "none" if stop is None else stop
        base = StopRule(rule if isinstance(rule, str) else "none")
    if not isinstance(rule, str) or rule not in STOP_RULES:
        raise InputError(f"`stop` must be one of {', '.join(STOP_RULES)}; got {rule!r}")
    a = base.alpha if alpha is None else alpha
    a = check_level("alpha", a)
    h = base.exceedances if exceedances is None else exceedances
    r = base.risk if risk is None else risk
    if rule != "besag-clifford" and exceedances is not None:
        raise InputError(f"`stop_exceedances` applies to stop = besag-clifford only "
                         f"(stop is {rule}); got {exceedances!r}")
    if rule != "gandy" and risk is not None:
        raise InputError(f"`stop_risk` applies to stop = gandy only (stop is {rule}); "
                         f"got {risk!r}")
    if rule == "besag-clifford":
        h = DEFAULT_EXCEEDANCES if h is None else h
        if isinstance(h, bool) or not isinstance(h, (int, np.integer)) or h < 1:
            raise InputError(f"`stop_exceedances` must be an integer >= 1; got {h!r}")
        return StopRule(rule, int(h), None, a)
    if rule == "gandy":
        r = DEFAULT_RISK if r is None else r
        # a bound of 1/2 or more is no bound: a coin flip decides with risk 1/2
        return StopRule(rule, None, check_level("stop_risk", r, 0.5), a)
    return StopRule("none", None, None, a)


# --------------------------------------------------------------------------- how to run

def parse_shard(shard: str) -> tuple[int, int]:
    """"i/N" -> (i, N), 1 <= i <= N."""
    try:
        i_s, n_s = shard.split("/")
        i, n = int(i_s), int(n_s)
    except ValueError:
        raise RunFileError(f"shard must look like i/N (e.g. 2/8); got {shard!r}") from None
    if not (n >= 1 and 1 <= i <= n):
        raise RunFileError(f"shard must look like i/N with 1 <= i <= N; got {shard!r}")
    return i, n


def entropy_of(seed: Any) -> int:
    """The integer entropy of a run: the seed given, or fresh entropy for None."""
    if isinstance(seed, np.random.SeedSequence):
        if seed.spawn_key:
            raise InputError("seed: give a root SeedSequence (no spawn_key)")
        ent = seed.entropy
    elif seed is None:
        ent = np.random.SeedSequence().entropy
    else:
        ent = int(seed)
    if not isinstance(ent, int):
        raise InputError("seed: SeedSequence entropy must be a single integer")
    return ent


@dataclass(frozen=True)
class RunOptions:
    """How a run is carried out (not what is fitted): the pipeline's settings.

    ``seed`` is as given (None: fresh entropy, unless a run file being resumed holds the
    seed it was made with); ``progress`` is False or a callable(done, total).
    """

    permutations: int = 10_000
    seed: Any = None
    jobs: int = 1
    exact: Any = "auto"
    chunk_size: int | None = None
    out: Any = None
    progress: Any = False
    backend: str = "threads"
    scheduler: str | None = None
    shard: str = ""
    stop: StopRule = field(default_factory=StopRule)
    provenance: dict | None = None

    @property
    def tick(self) -> Callable[[int, int], None] | None:
        return self.progress if callable(self.progress) else None


def check_output_file(path: Any, what: str) -> Path:
    """A file a command will write, checked before any work: not a folder, and in a folder
    that exists (a missing folder would otherwise surface only when the file is made, after
    the work). ``what`` names it in the error ("run file", "CSV file", ...)."""
    path = Path(path)
    if path.is_dir():
        raise InputError(f"{what} {path}: is a folder; name a file")
    if not path.parent.is_dir():
        raise InputError(f"{what} {path}: no such folder {path.parent}")
    return path


def run_options(*, permutations: Any = 10_000, seed: Any = None, jobs: Any = 1,
                exact: Any = "auto", chunk_size: Any = None, out: Any = None,
                progress: Any = False, backend: Any = "threads", scheduler: Any = None,
                shard: Any = None, stop: Any = None, provenance: Any = None) -> RunOptions:
    """Validated :class:`RunOptions`; InputError (or RunFileError for a shard) naming the
    first setting that breaks its rule."""
    stop = stop_rule(stop)
    if isinstance(permutations, bool) or not isinstance(permutations, (int, np.integer)) \
            or permutations < 1:
        raise InputError(f"permutations must be a whole number >= 1; got {permutations!r}")
    if seed is not None and not isinstance(seed, np.random.SeedSequence) and (
            isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0):
        raise InputError(f"seed must be a whole number >= 0, a numpy SeedSequence or None; "
                         f"got {seed!r}")
    if isinstance(seed, np.random.SeedSequence):
        entropy_of(seed)  # a spawned or multi-word sequence is refused here
    if isinstance(jobs, bool) or not isinstance(jobs, (int, np.integer)) or jobs == 0 or jobs < -1:
        raise InputError(f"jobs must be a whole number >= 1, or -1 for all cores; got {jobs!r}")
    if exact not in ("auto", True, False):
        raise InputError(f"exact must be 'auto', True or False; got {exact!r}")
    if chunk_size is not None and (isinstance(chunk_size, bool)
                                   or not isinstance(chunk_size, (int, np.integer))
                                   or chunk_size < 1):
        raise InputError(f"chunk_size must be a whole number >= 1; got {chunk_size!r}")
    if backend not in BACKENDS:
        raise InputError(f"backend must be one of {', '.join(BACKENDS)}; got {backend!r}")
    if (backend == "dask") != (scheduler is not None):
        raise InputError("backend 'dask' and a scheduler address go together")
    if out is not None:
        check_output_file(out, "run file")
    shard = shard or ""
    if shard:
        parse_shard(shard)
        if out is None:
            raise InputError("shard: needs out= (each shard writes its own run file)")
        if stop.active:
            raise InputError("stop: a stop rule reads the chunks in order; it cannot be "
                             f"combined with shard (got shard {shard!r})")
    return RunOptions(permutations=int(permutations), seed=seed, jobs=int(jobs), exact=exact,
                      chunk_size=None if chunk_size is None else int(chunk_size), out=out,
                      progress=progress, backend=backend, scheduler=scheduler, shard=shard,
                      stop=stop, provenance=provenance)

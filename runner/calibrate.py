"""Can I trust this p-value here? Size and power of each scheme on the user's own design.

Simulation studies show that relabelling schemes can lose their nominal error rate under
collinear predictors, skewed values and dyadic dependence (Anderson & Legendre 1999,
J. Stat. Comput. Simul. 62:271–303; Dekker, Krackhardt & Snijders 2007, Psychometrika
72:563–581). :func:`calibrate` answers the question for one data set: it keeps the user's
predictors exactly as they are, simulates many responses for which a tested term truly has
no effect, runs every scheme on each, and counts how often each rejects at ``alpha``.

What the simulation assumes, in plain words
-------------------------------------------
For each tested term x_j separately, with Z = [1, the other predictors]:

1. Fit the reduced model y = Z gamma + r on the observed dyads (least squares). Keep the
   fitted values Z gamma_hat and the residual matrix R = y - Z gamma_hat.
2. A simulated response is y* = Z gamma_hat + R relabelled: the nodes of R are given a
   random relabelling (rows and columns together, within groups; rows and columns apart
   for two-mode data). A relabelled matrix keeps everything about R that does not depend
   on which node is which: its values, the dependence between dyads that share a node
   (sender and receiver effects, reciprocity), its skew and its ties. What it breaks is
   any tie between R and the predictors, so x_j has no effect in y*: the null hypothesis
   for that term holds, while the other terms keep the effects the data show.
3. With ``effect`` = e, a second response y* + e * sd(y) / sd(x_j) * x_j is tested too: e
   is a **standardised coefficient** (the change in y, in standard deviations of the
   observed response, per standard deviation of x_j; sds over the observed dyads). Its
   rejection rate is the power to detect an effect of that size.

Each scheme tests x_j on every simulated response with the same relabellings (a paired
comparison of schemes); classical OLS p-values (t distribution with N - p degrees of
freedom, which treats the dyads as independent) are given for contrast.

This is a check of *this* design, not a proof: it tells whether the tests hold their size
when the null model above is true, and nothing about data that break it.

- The null is the Freedman & Lane (1983) resampling model (fitted reduced model plus
  relabelled residuals). ``freedman-lane`` relabels in the same way, so its rate inside
  the band is a consistency check more than independent evidence; ``y``, ``dsp`` and
  classical OLS are put to a real test.
- The other terms' effects and the residuals are those of the observed fit, estimates
  with their own noise; in small data sets they are rough.
- Residual structure that a relabelling cannot carry (dependence that follows a
  predictor's own layout, such as distance-decay along a canal) is not reproduced.
- Missing values travel with the residual matrix under relabelling; a simulated dyad is
  also missing where a predictor is.

Reading the output
------------------
Under a valid test the count of rejections over R replicates is Binomial(R, a), where a
is the rejection probability a valid test has here: with m random relabellings and the
p-value (b + 1) / (m + 1) (Phipson & Smyth 2010), a = floor(alpha (m + 1)) / (m + 1),
which is exactly alpha when alpha (m + 1) is a whole number (m = 199 or 999 at 0.05);
when every one of the m relabellings is enumerated, a = floor(alpha m) / m.
The band is the central ``band_level`` binomial interval (``scipy.stats.binom.interval``)
around a; a rate inside it is what a valid test gives, above it the test rejects too
often (too liberal), below it too rarely. The classical OLS test has no relabellings: its
p-values are continuous, so a valid classical test rejects exactly alpha of the time, and
its column is judged against the band around alpha itself (``nominal_band``; the same band
whenever a = alpha). Each rate also carries its Clopper–Pearson interval (Clopper &
Pearson 1934, Biometrika 26:404–413).

Cost
----
terms x replicates x schemes x (permutations + 1) relabelled statistics, twice with
``effect`` (``CalibrationResult.passes``; the wall time is ``seconds``). Each replicate
builds the engine's own plan for every scheme (``routes.linear.build_statistics`` on the simulated
response) and runs the engine's relabelling kernels, so a statistic costs what it costs
in a normal run; with complete data ``dsp`` and ``freedman-lane`` read the same layers
and share one relabelling pass per replicate. The defaults (200 replicates, 199
relabellings, three schemes) on the demo study (90 farms, 8,010 dyads, four terms) make
4 x 200 x 3 x 200 = 480,000 statistics. Replicates run in parallel threads (``jobs``);
results do not depend on ``jobs``: replicate r of term j draws everything from
``SeedSequence(seed, spawn_key=(j, r))`` (its residual relabelling, then its tests'
relabellings, drawn at once); :func:`simulated_response` gives any replicate back.

Panels (``dyadperm.Waves``: several waves of one node set) are prepared as a run prepares
them (``inputs.waves.prepare_waves``: the waves stacked, lagged predictors taken at their
earlier wave and the response's first waves dropped). The reduced model of each term
holds one intercept per wave (``wave_effects``, the default), fixed terms that are never
tested nor calibrated; the residuals' relabelling is one relabelling of the nodes applied
to every wave (rows pi, columns ``Blocks.columns``), as are the tests' relabellings. The
tests read the layers as a run does: on complete data centred within each wave, on
missing dyads with the wave intercepts as fixed layers; classical OLS counts the wave
intercepts among its parameters (N - T - k degrees of freedom for T waves and k
predictors). The standardised ``effect`` uses sds over the analysed dyads of every wave.

Studies on the sparse route (networks kept as edge lists) are refused, in one line with
the memory the dense route would need: a simulated response, fitted values plus
relabelled residuals, holds a value at every dyad, so it is an n x n array whatever the
data; at the sizes that send a study to the sparse route (dense layers above 1 GiB) that
is many such arrays per replicate. Calibrate a smaller network of the same design instead.
Dense inputs are checked against the memory available before any work, as every dense
route is (``inputs.memory``).
"""

from __future__ import annotations

import math
import time
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any, Callable, NamedTuple

import numpy as np
from scipy.stats import binom
from scipy.stats import t as t_dist

from .errors import InputError
from .inputs import design as _design
from .inputs.blocks import Blocks
from .inputs.memory import check_dense_route, gib
from .inputs.sparse import refuse_edges
from .inputs.waves import WaveInfo, centre_waves, prepare_waves, uses_waves
from .inputs.waves import observed_fit as waves_observed_fit
from .output.result import _plain
from .pipeline.engine import parallel_map
from .pipeline.permutations import draw_from, draw_many_from, enumerate_exact
from .pipeline.pvalues import clopper_pearson, pvalues
from .routes.linear import build_statistics, fit_pivot, shared_statistics
from .settings import EXACT_LIMIT, SCHEMES, STATISTICS, check_output_file, entropy_of

__all__ = ["CalibrationResult", "Replicate", "calibrate", "calibrate_study",
           "simulated_response", "plot_calibration", "check_plot_path"]

DEFAULT_SCHEMES = ("y", "dsp", "freedman-lane")
OLS = "ols"
"""Method id of the classical OLS t test in :attr:`CalibrationResult.methods`."""
METHOD_LABELS = {"y": "y", "dsp": "dsp", "freedman-lane": "freedman-lane",
                 OLS: "classical OLS"}
BAND_LEVEL = 0.95
INTERVAL_LEVEL = 0.95
# alpha (m + 1) within this of a whole number counts as whole (floating point of 0.05 * 200).
WHOLE_TOL = 1e-9


@dataclass(frozen=True, eq=False)
class CalibrationResult:
    """Size (and power) of each test of each term on simulated responses.

    Arrays are indexed [term, method] (and [term, method, replicate] for p-values).

    Attributes
    ----------
    terms : tuple of str
        The tested terms (predictors, in model order).
    methods : tuple of str
        The schemes asked for, then ``"ols"`` (classical OLS t test) when included.
    response : str
    alpha : float
    replicates : int
        Simulated responses per term.
    permutations : int
        Relabellings per test (all of them when ``exact``).
    exact : bool
        True when every test enumerated all relabellings.
    statistic : str
        ``"t"`` or ``"coef"``.
    valid_rate : float
        Rejection probability of a valid relabelling test here (see the module notes).
    band_level : float
    band : ndarray (2,)
        Rates between which a valid relabelling test's rate falls with probability
        ``band_level`` (around ``valid_rate``): the yardstick of the schemes.
    nominal_band : ndarray (2,)
        The same around ``alpha`` itself: the yardstick of the classical OLS test, whose
        p-values are continuous (module notes).
    null_p : ndarray (k, methods, replicates)
        Two-sided p-values under the null of each term.
    rejections : ndarray of int (k, methods)
        p <= alpha counts under the null.
    rate, interval : ndarray (k, methods), (k, methods, 2)
        Rejection rate and its Clopper–Pearson interval (``interval_level``).
    effect : float or None
        Standardised coefficient added for the power study.
    power_p, power_rejections, power_rate, power_interval : ndarray or None
        As above, for the responses with the effect added (None without ``effect``).
    seed : int
        Entropy actually used.
    n_nodes, n_dyads : int
    directed, two_mode : bool
    passes : int
        Statistics computed by the relabelling kernels (the cost).
    seconds : float
        Wall time of the simulation.
    notes : tuple of str
    """

    terms: tuple[str, ...]
    methods: tuple[str, ...]
    response: str
    alpha: float
    replicates: int
    permutations: int
    exact: bool
    statistic: str
    valid_rate: float
    band_level: float
    band: np.ndarray
    nominal_band: np.ndarray
    interval_level: float
    null_p: np.ndarray
    rejections: np.ndarray
    rate: np.ndarray
    interval: np.ndarray
    effect: float | None
    power_p: np.ndarray | None
    power_rejections: np.ndarray | None
    power_rate: np.ndarray | None
    power_interval: np.ndarray | None
    seed: int
    n_nodes: int
    n_dyads: int
    directed: bool
    two_mode: bool
    passes: int
    seconds: float
    notes: tuple[str, ...] = ()

    def band_of(self, method: str) -> np.ndarray:
        """The band a valid test of ``method`` falls in: ``nominal_band`` for the classical
        OLS test (continuous p-values), ``band`` for a relabelling scheme."""
        return self.nominal_band if method == OLS else self.band

    def verdicts(self) -> tuple[tuple[str, ...], ...]:
        """Per term and method: ``"inside band"``, ``"too liberal"`` or ``"too conservative"``,
        each method against its own band (``band_of``)."""
        out = []
        for row in self.rate:
            verdict = []
            for r, method in zip(row, self.methods):
                lo, hi = self.band_of(method)
                verdict.append("too liberal" if r > hi + WHOLE_TOL else
                               "too conservative" if r < lo - WHOLE_TOL else "inside band")
            out.append(tuple(verdict))
        return tuple(out)

    def table(self) -> str:
        """Formatted text: the settings, the band, then size (and power) per term and method."""
        return format_calibration(self)

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-ready dict (lists; p-values per replicate left out)."""

        out: dict[str, Any] = {}
        for name in self.__dataclass_fields__:
            if name in ("null_p", "power_p"):
                continue
            out[name] = _plain(getattr(self, name))
        out["verdicts"] = [list(v) for v in self.verdicts()]
        return out

    def plot(self, path: str | Path) -> Path:
        """Write the figure (see :func:`plot_calibration`) to ``path``; returns the path."""
        return plot_calibration(self, path)


# --------------------------------------------------------------------------- validation

def _whole(value: Any, name: str, minimum: int, also: int | None = None) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or (
            value < minimum and value != also):
        rule = f"a whole number >= {minimum}" + ("" if also is None else f", or {also}")
        raise InputError(f"`{name}` must be {rule}; got {value!r}")
    return int(value)


def _fraction(value: Any, name: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)) \
            or not 0.0 < float(value) < 1.0:
        raise InputError(f"`{name}` must be a number between 0 and 1 (exclusive); got {value!r}")
    return float(value)


def _check(*, schemes, replicates, permutations, alpha, effect, seed, jobs, include_ols,
           statistic, band_level) -> dict:
    """One validator for :func:`calibrate`: every rule, with the setting and value named."""
    if isinstance(schemes, str):
        schemes = (schemes,)
    try:
        schemes = tuple(schemes)
    except TypeError:
        raise InputError(f"`schemes` must be a list of scheme names; got {schemes!r}") from None
    if not schemes:
        raise InputError("`schemes` must name at least one of " + ", ".join(SCHEMES) + "; got ()")
    for s in schemes:
        if s not in SCHEMES:
            raise InputError(f"`schemes` must be among {', '.join(SCHEMES)}; got {s!r}")
    if len(set(schemes)) != len(schemes):
        raise InputError(f"`schemes` lists a scheme twice; got {schemes!r}")
    if statistic not in STATISTICS:
        raise InputError(f"`statistic` must be one of {', '.join(STATISTICS)}; got {statistic!r}")
    replicates = _whole(replicates, "replicates", 1)
    permutations = _whole(permutations, "permutations", 1)
    alpha = _fraction(alpha, "alpha")
    band_level = _fraction(band_level, "band_level")
    if effect is not None:
        if isinstance(effect, bool) or not isinstance(effect, (int, float, np.integer,
                                                               np.floating)) \
                or not math.isfinite(float(effect)):
            raise InputError(f"`effect` must be a finite number (a standardised coefficient) "
                             f"or None; got {effect!r}")
        effect = float(effect)
    if seed is not None and not isinstance(seed, np.random.SeedSequence) and (
            isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0):
        raise InputError(f"`seed` must be a whole number >= 0, a numpy SeedSequence or None; "
                         f"got {seed!r}")
    jobs = _whole(jobs, "jobs", 1, also=-1)
    if not isinstance(include_ols, bool):
        raise InputError(f"`include_ols` must be True or False; got {include_ols!r}")
    return dict(schemes=schemes, replicates=replicates, permutations=permutations,
                alpha=alpha, effect=effect, seed=seed, jobs=jobs, band_level=band_level)


# --------------------------------------------------------------------------- simulation

@dataclass(frozen=True, eq=False)
class _Reduced:
    """Reduced-model pieces of one tested term, on the engine's internal node order."""

    fitted: np.ndarray  # Z gamma_hat, (n, m)
    resid: np.ndarray  # y - Z gamma_hat, NaN off the analysed dyads
    shift: np.ndarray  # effect of one standardised unit: sd(y) / sd(x_j) * x_j


def _analysed(prep: _design.Prepared) -> np.ndarray:
    """Dyads that enter the observed fit: structural dyad set, every matrix finite."""
    ok = prep.mask.copy()
    for a in prep.matrices:
        ok &= np.isfinite(a)
    return ok


def _reduced(prep: _design.Prepared, j: int, ok: np.ndarray,
             wave_effects: bool = False) -> _Reduced:
    """Reduced model of tested term ``j``: y on Z = [1, the other predictors], or for a
    panel with ``wave_effects`` [one indicator per wave, the other predictors] (the wave
    intercepts take the place of the constant and of the fixed wave layers)."""
    k = prep.k
    y = prep.matrices[k]
    jj = prep.fixed + j
    others = [c for c in range(prep.fixed, k) if c != jj]
    T = prep.waves
    if wave_effects and T > 1:
        lead = np.zeros((int(ok.sum()), T))
        lead[np.arange(lead.shape[0]), np.nonzero(ok)[1] % T] = 1.0
    else:
        lead = np.ones((int(ok.sum()), 1))
    a = lead.shape[1]
    Z = np.column_stack([lead] + [prep.matrices[c][ok] for c in others])
    gamma = np.linalg.lstsq(Z, y[ok], rcond=None)[0]
    if a == 1:
        fitted = np.full(y.shape, gamma[0])
    else:  # column c is wave c mod T
        fitted = np.broadcast_to(gamma[:a][np.arange(y.shape[1]) % T], y.shape).copy()
    for c, g in zip(others, gamma[a:]):
        fitted = fitted + g * prep.matrices[c]
    resid = prep.mirror(np.where(ok, y - fitted, np.nan))
    x = prep.matrices[jj]
    shift = (np.std(y[ok]) / np.std(x[ok])) * x
    return _Reduced(fitted, resid, shift)


def _replicate_stream(entropy: int, term: int, replicate: int, blocks: Blocks, count: int):
    """Replicate r of term j: the relabelling of its residuals, then ``count`` relabellings
    for its tests (none when ``count`` is 0), all from SeedSequence(entropy, (j, r))."""
    rng = np.random.Generator(np.random.PCG64(
        np.random.SeedSequence(entropy, spawn_key=(term, replicate))))
    rows, cols = draw_from(rng, blocks)
    if count == 0:
        return rows, cols, None
    return rows, cols, draw_many_from(rng, blocks, count)


def _as_response(prep: _design.Prepared, values: np.ndarray) -> np.ndarray:
    """A response matrix in the form ``design.prepare`` gives: NaN off the dyad set, mirrored."""
    out = np.array(values, dtype=np.float64, copy=True)
    out[~prep.mask] = np.nan
    return prep.mirror(out)


def _simulate(prep, red: _Reduced, rows, cols) -> np.ndarray:
    # y* = Z gamma_hat + R relabelled: y*[i, j] = fitted[i, j] + R[rows[i], cols[j]]
    return _as_response(prep, red.fitted + red.resid[np.ix_(rows, cols)])


def _test(prep, ystar, j, schemes, statistic, include_ols, batch, exact, ident, ok_x,
          absorbed=0):
    """p-values of term ``j`` on response ``ystar``: each scheme, then classical OLS.

    ``batch`` holds the relabellings, the identity first (random draws) or among them
    (exact enumeration, where it is index 0). ``absorbed``: wave intercepts of a complete
    panel, absorbed by centring within waves as a run does (``routes.waves``): ``prep``'s
    predictors are centred already, ``ystar`` is centred here; they count in the degrees
    of freedom.
    """
    complete = prep.complete and not np.isnan(ystar[prep.mask]).any()
    if absorbed:
        ystar = ystar.copy()
        centre_waves(replace(prep, matrices=(ystar,)))
    sim = replace(prep, matrices=prep.matrices[:prep.k] + (ystar,), complete=complete,
                  exact=None)
    plans = []
    for s in schemes:  # only the passes that fill term j's statistic
        plan = build_statistics(sim, scheme=s, statistic=statistic, absorbed=absorbed)
        plans.append(replace(plan, passes=tuple(ps for ps in plan.passes if j in ps.terms)))
    if all(ps.gram0 is not None for plan in plans for ps in plan.passes):
        stats = shared_statistics(plans, j, batch)
    else:  # missing values: the engine's own passes (one full Gram per permutation and term)
        stats = [plan.statistics(*batch)[:, j] for plan in plans]
    out = np.empty(len(schemes) + int(include_ols))
    for s, st in enumerate(stats):
        observed, null = st[:1], (st if exact else st[1:])[:, None]
        out[s] = pvalues(null, observed, exact=exact).p[0]
    if include_ols:
        if statistic == "t":
            t_obs = stats[0][0]  # the identity relabelling: the full-model t (engine check)
        else:
            t_obs = build_statistics(sim, scheme=schemes[0], statistic="t",
                                     absorbed=absorbed).statistics(*ident)[0][j]
        # parameters: the constant (or one intercept per wave) and every predictor
        df = int(np.isfinite(ystar[ok_x]).sum()) - (prep.k + 1 + absorbed)
        out[-1] = 2.0 * t_dist.sf(abs(t_obs), df) if df > 0 else np.nan
    return out


def _prepare(y: Any, predictors: Any, *, directed, groups, dyads, wave_effects,
             layers_per_term: int = 1):
    """The inputs on the engine's order, and the panel's WaveInfo (None: one network).

    A panel (``dyadperm.Waves``) is prepared as a run prepares it
    (``inputs.waves.prepare_waves``: stacked waves, lags, wave intercepts as fixed layers
    when dyads are missing); one network by ``design.prepare``."""
    if uses_waves(y, predictors):
        if not isinstance(wave_effects, (bool, np.bool_)):
            raise InputError(f"`wave_effects` must be True or False; got {wave_effects!r}")
        return prepare_waves(y, predictors, directed=directed, groups=groups, dyads=dyads,
                             wave_effects=bool(wave_effects),
                             layers_per_term=layers_per_term)
    return _design.prepare(y, predictors, directed=directed, groups=groups, dyads=dyads), None


def _wave_intercepts(prep: _design.Prepared, info: WaveInfo | None) -> bool:
    """Whether the reduced and full models hold one intercept per wave."""
    return info is not None and info.wave_effects and prep.waves > 1


def _for_tests(prep: _design.Prepared, info: WaveInfo | None) -> tuple[_design.Prepared, int]:
    """The inputs the schemes read and the design columns absorbed: a complete panel with
    wave intercepts has its layers centred within each wave (a copy), as a run does
    (``routes.waves.plan``); anything else is read as prepared."""
    if not (_wave_intercepts(prep, info) and prep.complete):
        return prep, 0
    out = replace(prep, matrices=tuple(np.array(a, copy=True) for a in prep.matrices))
    centre_waves(out)
    return out, prep.waves - 1


class Replicate(NamedTuple):
    """One simulated data set of :func:`calibrate`, on the caller's node order.

    ``response`` (NaN off the dyad set; undirected data symmetric); ``rows`` and ``cols``
    (m, n) and (m, m_cols): the random relabellings its tests used, as M'[a, b] =
    M[rows[t, a], cols[t, b]] (one-mode: ``cols`` is ``rows``); None when the calibration
    enumerated every relabelling instead. A panel (``dyadperm.Waves``): ``response`` is
    (T, n, n), one matrix per wave used (a lag drops the first waves), in the node order
    of ``dyadperm.Waves``; ``rows`` relabel the nodes at every wave and ``cols`` is ``rows``.
    """

    response: np.ndarray
    rows: np.ndarray | None
    cols: np.ndarray | None


def simulated_response(y: Any, predictors: Any, *, term: str, replicate: int, seed: int,
                       permutations: int = 199, effect: float | None = None,
                       directed: bool | None = None, groups: Any = None,
                       dyads: str | None = None, wave_effects: bool = True) -> Replicate:
    """The data set :func:`calibrate` simulates for ``term``, replicate ``replicate``.

    With the same inputs, ``seed`` and ``permutations`` as the calibration, the response
    and relabellings are exactly those it used, so any replicate can be rerun and checked
    on its own. For checking and teaching.
    """
    prep, info = _prepare(y, predictors, directed=directed, groups=groups, dyads=dyads,
                          wave_effects=wave_effects)
    tested = prep.names[prep.fixed:]
    if term not in tested:
        raise InputError(f"`term` must be one of the predictors ({', '.join(tested)}); "
                         f"got {term!r}")
    replicate = _whole(replicate, "replicate", 0)
    seed = _whole(seed, "seed", 0)
    permutations = _whole(permutations, "permutations", 1)
    j = tested.index(term)
    red = _reduced(prep, j, _analysed(prep), _wave_intercepts(prep, info))
    exact = prep.blocks.count() <= permutations
    rows, cols, perms = _replicate_stream(seed, j, replicate, prep.blocks,
                                          0 if exact else permutations)
    ystar = _simulate(prep, red, rows, cols)
    if effect is not None:
        ystar = ystar + float(effect) * red.shift
    if prep.waves > 1 or info is not None:
        n, T = prep.mask.shape[0], prep.waves
        cube = ystar.reshape(n, n, T)
        out = np.empty((T, n, n))
        for t in range(T):
            out[t][np.ix_(prep.row_order, prep.row_order)] = cube[:, :, t]
        if perms is None:
            return Replicate(out, None, None)
        rows = _to_user(perms[0], prep.row_order)
        return Replicate(out, rows, rows)
    out = np.empty_like(ystar)
    out[np.ix_(prep.row_order, prep.col_order)] = ystar
    if perms is None:
        return Replicate(out, None, None)
    return Replicate(out, _to_user(perms[0], prep.row_order),
                     _to_user(perms[1], prep.col_order))


def _to_user(perms: np.ndarray, order: np.ndarray) -> np.ndarray:
    """Relabellings of internal positions as relabellings of the caller's positions.

    Internal position i holds the caller's node order[i]; a relabelling pi of internal
    positions moves node order[i] to order[pi(i)], i.e. sigma[order] = order[pi].
    """
    out = np.empty_like(perms)
    out[:, order] = order[perms]
    return out


def calibrate(y: Any, predictors: Any, *, schemes: Any = DEFAULT_SCHEMES, replicates: int = 200,
              permutations: int = 199, alpha: float = 0.05, effect: float | None = None,
              seed: Any = None, jobs: int = 1, directed: bool | None = None, groups: Any = None,
              dyads: str | None = None, include_ols: bool = True, statistic: str = "t",
              band_level: float = BAND_LEVEL,
              progress: bool | Callable[[int, int], None] = False,
              wave_effects: bool = True) -> CalibrationResult:
    """Size (and power) of each scheme on simulated responses that keep the user's design.

    Parameters
    ----------
    y, predictors, directed, groups, dyads
        As in :func:`dyadperm.regress`.
    schemes : sequence of {"y", "dsp", "freedman-lane"}
        Schemes to check (default all three).
    replicates : int
        Simulated responses per tested term (R).
    permutations : int
        Random relabellings per test (m); every relabelling is enumerated instead when
        there are at most this many.
    alpha : float
        Level at which a test rejects (p <= alpha).
    effect : float, optional
        Standardised coefficient of the tested term for a power study (change in y, in
        standard deviations of the observed response, per standard deviation of x_j).
    seed : int, SeedSequence or None
        Entropy; the one used is ``result.seed``.
    jobs : int
        Worker threads (-1: all cores). Results do not depend on it.
    include_ols : bool
        Also report classical OLS t-test p-values (dyads treated as independent).
    statistic : {"t", "coef"}
        Statistic of the relabelling tests.
    band_level : float
        Probability of the binomial band around the valid rejection rate.
    progress : bool or callable(done, total)
        Called with replicates done and their total.
    wave_effects : bool
        Panels (``y`` a ``dyadperm.Waves``): one intercept per wave in every reduced and
        full model (default), fixed terms that are never tested nor calibrated; False:
        one intercept for every wave. As in :func:`dyadperm.regress`.

    Returns
    -------
    CalibrationResult

    Notes
    -----
    The null responses are the reduced-model fit plus relabelled reduced-model residuals
    (the Freedman & Lane 1983 null model); see the module notes for what that assumes and
    what it costs. Schemes: Krackhardt (1988), Dekker, Krackhardt & Snijders (2007),
    Freedman & Lane (1983, J. Bus. Econ. Stat. 1:292–298).
    """
    t0 = time.perf_counter()
    opts = _check(schemes=schemes, replicates=replicates, permutations=permutations,
                  alpha=alpha, effect=effect, seed=seed, jobs=jobs, include_ols=include_ols,
                  statistic=statistic, band_level=band_level)
    schemes, R, M = opts["schemes"], opts["replicates"], opts["permutations"]
    alpha, effect = opts["alpha"], opts["effect"]
    entropy = entropy_of(opts["seed"])
    refuse_edges(y, predictors, reason="calibrate simulates responses that hold a value at "
                 "every dyad, on the dense route")
    # inputs, three reduced-model arrays per term, and per replicate a simulated response
    # and the schemes' layer stacks
    check_dense_route(y, predictors, route="calibrate", layers_per_term=4 + len(schemes),
                      groups=groups)
    prep, info = _prepare(y, predictors, directed=directed, groups=groups, dyads=dyads,
                          wave_effects=wave_effects, layers_per_term=4 + len(schemes))
    # the same input checks as a run (the one rule of a fittable design, no variation)
    if info is None:
        _design.observed_fit(prep, pivot=fit_pivot(prep))
    else:
        waves_observed_fit(prep, info, pivot=fit_pivot(prep))
    tprep, absorbed = _for_tests(prep, info)

    count = prep.blocks.count()
    exact = count <= M
    if exact:
        m_total = count
        valid = math.floor(alpha * count + WHOLE_TOL) / count
        if valid <= 0.0:
            raise InputError(f"`alpha` {alpha:g}: this network has only {count} relabellings, "
                             f"so no p-value can be at most alpha (smallest {1 / count:.4g})")
    else:
        m_total = M
        valid = math.floor(alpha * (M + 1) + WHOLE_TOL) / (M + 1)
        if valid <= 0.0:
            need = math.ceil(1.0 / alpha - 1.0 - WHOLE_TOL)
            raise InputError(f"`permutations` {M}: the smallest p-value is 1/{M + 1} = "
                             f"{1 / (M + 1):.4g}, above alpha {alpha:g}; use at least {need}")
    if exact and count > EXACT_LIMIT:  # pragma: no cover - count <= M keeps this unreachable
        raise InputError(f"too many relabellings to enumerate: {count:,}")

    k = prep.k - prep.fixed  # tested terms (a panel's wave layers are not)
    n, m = prep.mask.shape
    ok = _analysed(prep)
    ok_x = prep.mask.copy()
    for a in prep.matrices[:prep.k]:
        ok_x &= np.isfinite(a)
    ident = (np.arange(n, dtype=np.int64)[None, :], np.arange(m, dtype=np.int64)[None, :])
    exact_perms = enumerate_exact(prep.blocks, 0, count) if exact else None
    reduced = [_reduced(prep, j, ok, _wave_intercepts(prep, info)) for j in range(k)]
    n_methods = len(schemes) + int(include_ols)

    def one(j: int, r: int):
        rows, cols, perms = _replicate_stream(entropy, j, r, prep.blocks, 0 if exact else M)
        if exact:
            batch = exact_perms  # index 0 is the identity
        else:
            batch = (np.concatenate([ident[0], perms[0]]), np.concatenate([ident[1], perms[1]]))
        ystar = _simulate(prep, reduced[j], rows, cols)
        try:
            p0 = _test(tprep, ystar, j, schemes, statistic, include_ols, batch, exact, ident,
                       ok_x, absorbed)
            p1 = None
            if effect is not None:
                p1 = _test(tprep, ystar + effect * reduced[j].shift, j, schemes, statistic,
                           include_ols, batch, exact, ident, ok_x, absorbed)
        except InputError:
            # missing values moved with the residuals: on this replicate's complete dyads the
            # design breaks the fit rule, so a run would refuse this data set (no test)
            p0 = np.full(n_methods, np.nan)
            p1 = None if effect is None else np.full(n_methods, np.nan)
        return j, r, p0, p1

    null_p = np.empty((k, n_methods, R))
    power_p = np.empty((k, n_methods, R)) if effect is not None else None
    tasks = [(j, r) for j in range(k) for r in range(R)]
    tick = progress if callable(progress) else None
    for done, (j, r, p0, p1) in enumerate(parallel_map(one, tasks, opts["jobs"]), start=1):
        null_p[j, :, r] = p0
        if p1 is not None:
            power_p[j, :, r] = p1
        if tick is not None:
            tick(done, len(tasks))

    lo, hi = binom.interval(opts["band_level"], R, valid)  # source: scipy.stats.binom
    nlo, nhi = binom.interval(opts["band_level"], R, alpha)
    rej, rate, interval = _rates(null_p, alpha, R)
    prej = prate = pint = None
    if power_p is not None:
        prej, prate, pint = _rates(power_p, alpha, R)
    methods = tuple(schemes) + ((OLS,) if include_ols else ())
    passes = k * R * len(schemes) * (m_total + 1) * (2 if effect is not None else 1)
    terms = prep.names[prep.fixed:]
    notes = [] if info is None else _wave_notes(info)
    for j in range(k):
        refused = int(np.isnan(null_p[j, 0]).sum())
        if refused:
            notes.append(f"{refused} of {R} simulated responses of {terms[j]!r} leave the "
                         "design unfittable over their complete dyads (a run would refuse "
                         "them): those replicates have no p-value and count as not rejecting")
    if not math.isclose(valid, alpha, rel_tol=1e-9):
        step = m_total if exact else m_total + 1
        notes.append(f"with {m_total} relabellings a valid test rejects {valid:.4f} of the "
                     f"time, not {alpha:g}: p-values come in steps of 1/{step}")
    return CalibrationResult(
        terms=terms, methods=methods, response=prep.response_name, alpha=alpha,
        replicates=R, permutations=m_total, exact=exact, statistic=statistic,
        valid_rate=valid, band_level=opts["band_level"], band=np.array([lo / R, hi / R]),
        nominal_band=np.array([nlo / R, nhi / R]),
        interval_level=INTERVAL_LEVEL, null_p=null_p, rejections=rej, rate=rate,
        interval=interval, effect=effect, power_p=power_p, power_rejections=prej,
        power_rate=prate, power_interval=pint, seed=entropy,
        n_nodes=n + m if prep.two_mode else n, n_dyads=int(ok.sum()),
        directed=prep.directed, two_mode=prep.two_mode, passes=int(passes),
        seconds=time.perf_counter() - t0, notes=tuple(notes))


def _wave_notes(info: WaveInfo) -> list[str]:
    """What a panel's calibration did with its waves, in plain words."""
    notes = [f"waves: {len(info.names)} ({', '.join(info.names)}), one relabelling of the "
             "nodes applied to every wave, for the simulated residuals and every test"]
    if info.wave_effects and len(info.names) > 1:
        notes.append(f"wave intercepts ({', '.join(info.intercepts)}) in every reduced and "
                     "full model: fixed terms, not tested, not calibrated; classical OLS "
                     "counts them as parameters")
    if info.dropped:
        notes.append(f"lag: the response's wave(s) {', '.join(info.dropped)} drop out")
    return notes


def _rates(p: np.ndarray, alpha: float, R: int):
    # a failed classical fit (NaN) is not a rejection
    with np.errstate(invalid="ignore"):
        rej = (p <= alpha).sum(axis=2)
    return rej, rej / R, clopper_pearson(rej, R, INTERVAL_LEVEL)


def calibrate_study(study: Any, *, replicates: int = 200, permutations: int = 199,
                    alpha: float | None = None, effect: float | None = None,
                    seed: int | None = None, jobs: int | None = None, schemes: Any = None,
                    include_ols: bool = True,
                    progress: bool | Callable[[int, int], None] = False) -> CalibrationResult:
    """:func:`calibrate` on a loaded study (``dyadperm.load_study``).

    Settings left as None come from the study file: ``alpha``, ``seed``, groups, dyads,
    directedness and the statistic; ``jobs`` is the file's ``jobs`` when it sets one, else
    every core (-1): a calibration is many runs. ``schemes`` defaults to all three (the
    study's own scheme among them). A correlation study (Pearson) is checked as the
    one-predictor regression, whose relabelling p-values are the same (methods.md).
    """
    t = study.spec["test"]
    route = getattr(study, "route", None)
    if route is not None and route.sparse:
        have = "" if route.available is None else f", {gib(route.available)} available"
        raise InputError(f"{study.path.name}: calibrate does not run on the sparse route: its "
                         "simulated responses (fitted values plus relabelled residuals) hold "
                         "a value at every dyad, so they need the dense route, which would "
                         f"need {gib(route.dense_bytes)} of memory here{have}; calibrate a "
                         "smaller network of the same design")
    if jobs is None:
        jobs = -1 if t["jobs"] is None else t["jobs"]
    notes = []
    if t["kind"] == "correlation":
        if t["method"] != "pearson":
            raise InputError(f"{study.path.name} [test] method: calibrate checks Pearson "
                             f"correlation studies only; got {t['method']!r}")
        notes.append("correlation study: checked as the regression on its one predictor "
                     "(the same relabelling p-values)")
        statistic = "t"
    else:
        if t["model"] != "linear":
            raise InputError(f"{study.path.name} [test] model: calibrate supports the linear "
                             f"model only; got {t['model']!r}")
        statistic = t["statistic"]
    res = calibrate(study.response, dict(study.predictors),
                    schemes=DEFAULT_SCHEMES if schemes is None else schemes,
                    replicates=replicates, permutations=permutations,
                    alpha=t["alpha"] if alpha is None else alpha, effect=effect,
                    seed=t["seed"] if seed is None else seed,
                    jobs=jobs,
                    directed=study.spec["study"]["directed"], groups=study.groups,
                    dyads=t["dyads"], include_ols=include_ols, statistic=statistic,
                    progress=progress)
    if notes:
        res = replace(res, notes=res.notes + tuple(notes))
    return res


# --------------------------------------------------------------------------- output

def _pct(x: float) -> str:
    return f"{100.0 * x:.1f}%"


def format_calibration(res: CalibrationResult) -> str:
    """The text table of a :class:`CalibrationResult`."""
    mode = "two-mode" if res.two_mode else ("directed" if res.directed else "undirected")
    lo, hi = res.band
    draws = (f"all {res.permutations:,} relabellings (exact)" if res.exact
             else f"{res.permutations:,} random relabellings")
    lines = [
        f"calibration of the tests of response {res.response!r} on its own design",
        f"nodes: {res.n_nodes}   dyads: {res.n_dyads:,} ({mode})   statistic: {res.statistic}"
        f"   seed: {res.seed}",
        f"null of each term: fitted other terms + relabelled reduced-model residuals; "
        f"{res.replicates} simulated responses per term, each test with {draws}",
        f"alpha {res.alpha:g}: a valid test rejects {_pct(res.valid_rate)} of the time; "
        f"{res.band_level:.0%} binomial band for {res.replicates} replicates: "
        f"[{_pct(lo)}, {_pct(hi)}]",
        f"cost: {len(res.terms)} terms x {res.replicates} replicates x "
        f"{len(res.methods) - int(OLS in res.methods)} schemes x ({res.permutations:,} + 1) "
        + ("x 2 (null and effect) " if res.effect is not None else "")
        + f"= {res.passes:,} relabelled statistics, {res.seconds:.1f} s",
    ]
    w = max(8, max(len(t) for t in res.terms) + 2)
    mw = max(len(METHOD_LABELS[m]) for m in res.methods) + 2

    def block(title: str, rej, rate, interval, verdicts) -> None:
        head = (f"{'term':<{w}}{'method':<{mw}}{'rejected':>12}{'rate':>8}"
                f"{'interval (' + format(res.interval_level, '.0%') + ')':>22}"
                + ("   verdict" if verdicts is not None else ""))
        lines.extend(["", title, head, "-" * len(head)])
        for a, term in enumerate(res.terms):
            for b, method in enumerate(res.methods):
                iv = f"[{_pct(interval[a, b, 0])}, {_pct(interval[a, b, 1])}]"
                row = (f"{term if b == 0 else '':<{w}}{METHOD_LABELS[method]:<{mw}}"
                       f"{f'{int(rej[a, b])}/{res.replicates}':>12}{_pct(rate[a, b]):>8}{iv:>22}")
                if verdicts is not None:
                    row += f"   {verdicts[a][b]}"
                lines.append(row)

    block("size: rejection rate when the term has no effect", res.rejections, res.rate,
          res.interval, res.verdicts())
    if res.effect is not None:
        block(f"power: rejection rate at an effect of {res.effect:g} (standardised coefficient: "
              "sd of the response per sd of the term)", res.power_rejections, res.power_rate,
              res.power_interval, None)
    lines.append("")
    lines.append("inside band: as often as a valid test; too liberal: rejects too often (p-values "
                 "too small); too conservative: too rarely.")
    if OLS in res.methods:
        lines.append("classical OLS: t distribution with dyads taken as independent, for contrast.")
        nlo, nhi = res.nominal_band
        if not np.allclose(res.nominal_band, res.band):
            lines.append(f"classical OLS has continuous p-values: it is judged against the band "
                         f"around alpha {res.alpha:g} itself, [{_pct(nlo)}, {_pct(nhi)}].")
    for note in res.notes:
        lines.append(f"note: {note}")
    return "\n".join(lines)


def check_plot_path(path: str | Path) -> Path:
    """The figure path, checked before any work: a known image suffix, an existing folder."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    path = Path(path)
    kinds = FigureCanvasAgg(Figure()).get_supported_filetypes()
    suffix = path.suffix.lower().lstrip(".")
    if suffix not in kinds:
        known = ", ".join("." + s for s in sorted(kinds))
        raise InputError(f"plot file {path}: the suffix must be one of {known}; "
                         f"got {path.suffix or 'none'!r}")
    return check_output_file(path, "plot file")


# The look of the figure, matching the result plots (runner/plots.py): print-friendly
# greys with one accent colour, the nominal line in dark red, the band in light blue.
WIDTH, HEIGHT, DPI = 6.4, 4.6, 150
FONT = 9.5
ACCENT = "#1f4e9a"
ALPHA_LINE = "#b2182b"
BAND = "#9ecae1"
TERM_COLOURS = ("black", ACCENT, "#6b6b6b", "#4a7c59", "#8c5a2b", "#7a3b69")
TERM_MARKERS = "osD^v<>ph*"


def plot_calibration(res: CalibrationResult, path: str | Path) -> Path:
    """Rejection rate by method with interval bars, the nominal alpha and its band shaded.

    One panel for size; a second for power when the result has an effect. Each term is
    one marker per method, its bar the Clopper–Pearson interval. Drawn on matplotlib's
    Agg canvas (no pyplot, no global backend or style changed); the format follows the
    file suffix.
    """
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    path = check_plot_path(path)
    panels = 2 if res.effect is not None else 1
    width = max(WIDTH, 1.3 + 1.25 * len(res.methods)) * (0.85 if panels == 2 else 1.0)
    fig = Figure(figsize=(width * panels, HEIGHT), dpi=DPI, layout="constrained")
    FigureCanvasAgg(fig)
    axes = fig.subplots(1, panels, squeeze=False)[0]
    x = np.arange(len(res.methods))
    k = len(res.terms)
    offsets = (np.arange(k) - (k - 1) / 2) * min(0.18, 0.7 / max(k, 1))
    labels = [METHOD_LABELS[m] for m in res.methods]

    def draw_panel(ax, rate, interval, title, ylabel, band: bool) -> None:
        ax.tick_params(labelsize=FONT)
        for side in ("top", "right"):
            ax.spines[side].set_visible(False)
        if band:
            # each method's own band (the classical test's is around alpha itself)
            for b, method in enumerate(res.methods):
                lo, hi = res.band_of(method)
                centre = res.alpha if method == OLS else res.valid_rate
                first = b == 0
                ax.fill_between([b - 0.45, b + 0.45], lo, hi, color=BAND, alpha=0.55, lw=0,
                                zorder=0,
                                label=f"{res.band_level:.0%} band of a valid test" if first
                                else None)
                ax.plot([b - 0.45, b + 0.45], [centre, centre], color=ALPHA_LINE, lw=1.4,
                        ls=(0, (5, 3)),
                        label=f"rate of a valid test at alpha {res.alpha:g}" if first else None)
        else:
            ax.axhline(res.alpha, color=ALPHA_LINE, lw=1.0, ls=(0, (1, 2)),
                       label=f"alpha {res.alpha:g}")
        for a, term in enumerate(res.terms):
            err = np.abs(interval[a].T - rate[a])
            ax.errorbar(x + offsets[a], rate[a], yerr=err, fmt=TERM_MARKERS[a % len(TERM_MARKERS)],
                        color=TERM_COLOURS[a % len(TERM_COLOURS)], capsize=3, ms=5, lw=1.2,
                        label=term)
        ax.set_xticks(x, labels)
        ax.set_xlim(-0.6, len(res.methods) - 0.4)
        ax.set_title(title, fontsize=FONT + 1)
        ax.set_ylabel(ylabel, fontsize=FONT)
        ax.set_xlabel("test", fontsize=FONT)
        ax.set_ylim(bottom=0.0)

    draw_panel(axes[0], res.rate, res.interval,
               f"size at alpha {res.alpha:g}\n({res.replicates} null responses per term)",
               "rejection rate under the null (share)", True)
    if res.effect is not None:
        draw_panel(axes[1], res.power_rate, res.power_interval,
                   f"power at effect {res.effect:g}\n(standardised coefficient)",
                   "rejection rate with the effect (share)", False)
        axes[1].set_ylim(0.0, 1.02)
    handles, names = axes[0].get_legend_handles_labels()
    fig.legend(handles, names, loc="outside lower center", ncols=min(4, len(names)),
               fontsize=FONT - 1, frameon=False)
    extra = {"metadata": {"Software": None}} if path.suffix.lower() == ".png" else {}
    fig.savefig(path, **extra)
    return path

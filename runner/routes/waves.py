"""The dense routes for panels: several waves of one node set, one relabelling.

``inputs.waves.prepare_waves`` stacks every input as an (n, n * T) layer whose columns
interleave the waves; the relabelling acts on every wave at once through the column
relabelling the blocks derive from the row relabelling. The schemes are then those of
one network, unchanged:

- linear (``routes.linear.build_statistics``): with complete data and wave intercepts the
  layers are centred within each wave first (the intercepts are absorbed; the t
  statistic's degrees of freedom count them); with missing dyads the intercepts are fixed
  layers of their own, in every design and never tested. The table's fit is the least
  squares fit with one intercept per wave (``inputs.waves.observed_fit``).
- logistic (``routes.logistic.plan_prepared``): the intercepts of waves 2.. are layers of
  their own beside the constant; the route's statistics of those layers are computed and
  dropped (``Tested``), and the table reports one intercept per wave from the Wald fit.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from typing import Any

import numpy as np

from ..errors import InputError
from ..inputs import design as _design
from ..inputs.waves import WaveInfo, centre_waves, observed_fit, prepare_waves
from ..settings import check_regression
from . import logistic as _logistic
from .linear import build_statistics
from .plan import (Plan, dense_identity, groups_fingerprint, input_fingerprints,
                   interval_reason, interval_summary)


@dataclass(frozen=True, eq=False)
class Tested:
    """A route's statistics without those of its leading ``drop`` terms (the wave
    intercepts of the logistic model: in every design, never tested)."""

    inner: Any
    drop: int

    @property
    def k(self) -> int:
        return self.inner.k - self.drop

    def statistics(self, row_perms: np.ndarray, col_perms: np.ndarray) -> np.ndarray:
        return np.ascontiguousarray(self.inner.statistics(row_perms, col_perms)[:, self.drop:])

    def chunk_size(self) -> int:
        return self.inner.chunk_size()


def plan(y: Any, predictors: Any, *, model: str = "linear", scheme: str, statistic: str,
         storage: str = "float64", directed: bool | None = None, groups: Any = None,
         dyads: str | None = None, wave_effects: bool = True,
         ci: float | None = None) -> Plan:
    """The plan of a panel regression (module docstring)."""
    check_regression(model=model, scheme=scheme, statistic=statistic, storage=storage)
    if model == "logistic":
        return _logistic_plan(y, predictors, scheme=scheme, statistic=statistic,
                              storage=storage, directed=directed, groups=groups, dyads=dyads,
                              wave_effects=wave_effects)
    prep, info = prepare_waves(y, predictors, directed=directed, groups=groups, dyads=dyads,
                               wave_effects=wave_effects)
    pivot = _design.fit_pivot(prep.complete, storage=storage)
    fit = observed_fit(prep, info, pivot=pivot)
    fingerprints = input_fingerprints(prep)
    absorbed = 0
    if info.wave_effects and prep.complete and prep.waves > 1:
        centre_waves(prep)
        absorbed = prep.waves - 1
    # intervals invert each term's test from the kernels' own rows, observed and
    # relabelled alike: the degrees of freedom the wave intercepts take are the same
    # factor in every t(b), so they leave the interval as it is
    reason = None if ci is None else interval_reason(scheme, statistic, prep.complete)
    interval = ci is not None and reason is None
    stats = build_statistics(prep, scheme=scheme, statistic=statistic, storage=storage,
                             absorbed=absorbed, interval=interval)
    notes = _notes(info)
    fit_arrays = dict(coef=fit.coef, se=fit.se, stat=fit.t if statistic == "t" else fit.coef,
                      fit=np.array([fit.r2, np.nan]))
    a = len(info.intercepts)
    settings = _settings(info, model="linear", scheme=scheme, statistic=statistic,
                         storage=storage, dyads=dyads, groups=groups)
    if interval:
        settings["stored interval columns"] = stats.extra
    summary = _summary(prep, info, "linear", scheme, statistic, fit.n_dyads, notes)
    if ci is not None:
        summary["interval"] = interval_summary(ci, reason, stats.ci_scale)
    return Plan(kernel=stats, blocks=prep.blocks, chunk_size=stats.chunk_size(),
                fit=fit_arrays, summary=summary,
                identity=dense_identity(prep, settings, fingerprints),
                expected=fit.t[a:] if statistic == "t" else None, extra=stats.extra)


def _logistic_plan(y: Any, predictors: Any, *, scheme: str, statistic: str, storage: str,
                   directed: bool | None, groups: Any, dyads: str | None,
                   wave_effects: bool) -> Plan:
    prep, info = prepare_waves(y, predictors, directed=directed, groups=groups, dyads=dyads,
                               wave_effects=wave_effects, intercept_layers=True,
                               layers_per_term=3)
    settings = _settings(info, model="logistic", scheme=scheme, statistic=statistic,
                         storage=storage, dyads=dyads, groups=groups)
    inner, fit = _logistic.plan_prepared(prep, scheme=scheme, statistic=statistic,
                                         settings=settings)
    drop = prep.fixed
    p = fit.coef.shape[0]
    # [constant, wave 2.., x..] -> [wave 1, wave 2, .., x..]: wave t's intercept is the
    # constant plus its own layer's coefficient
    L = np.eye(p)
    L[1:1 + drop, 0] = 1.0
    coef = L @ fit.coef
    se = np.sqrt(np.diag(L @ fit.cov @ L.T))
    with np.errstate(divide="ignore", invalid="ignore"):
        z = coef / se
    a = 1 + drop
    if statistic == "score":
        stat = np.concatenate([np.full(a, np.nan), np.asarray(inner.fit["stat"])[a:]])
    else:
        stat = z if statistic == "t" else coef
    notes = list(inner.summary["notes"]) + _notes(info)
    fit_arrays = dict(coef=coef, se=se, stat=stat, fit=np.asarray(inner.fit["fit"]))
    kernel = Tested(inner.kernel, drop)
    expected = None if inner.expected is None else np.asarray(inner.expected)[drop:]
    return Plan(kernel=kernel, blocks=prep.blocks, chunk_size=inner.chunk_size,
                fit=fit_arrays, summary=_summary(prep, info, "logistic", scheme, statistic,
                                                 fit.n_dyads, notes),
                identity=inner.identity, expected=expected)


def _settings(info: WaveInfo, *, model: str, scheme: str, statistic: str, storage: str,
              dyads: Any, groups: Any) -> dict:
    return dict(kind="regression", model=model, scheme=scheme, statistic=statistic,
                method=None, storage=storage, dyads=dyads, groups=groups_fingerprint(groups),
                waves=json.dumps(info.names), lags=json.dumps(info.lags, sort_keys=True),
                wave_effects=info.wave_effects)


def _notes(info: WaveInfo) -> list[str]:
    notes = []
    if info.wave_effects:
        notes.append(f"wave intercepts ({', '.join(info.intercepts)}): one per wave, fixed "
                     "terms, not tested")
    if info.dropped:
        lagged = ", ".join(f"{name!r} (lag {lag})" for name, lag in info.lags.items())
        one = len(info.dropped) == 1 and len(info.lags) == 1
        notes.append(f"lag: the response's wave{'' if len(info.dropped) == 1 else 's'} "
                     f"{', '.join(info.dropped)} drop{'s' if len(info.dropped) == 1 else ''} "
                     f"out; {lagged} take{'s' if one else ''} the earlier wave")
    notes.append(f"waves: {len(info.names)} ({', '.join(info.names)}), one relabelling of the "
                 f"nodes applied to every wave; complete dyads per wave "
                 f"{', '.join(f'{c:,}' for c in info.dyads)}")
    return notes


def _summary(prep, info: WaveInfo, model: str, scheme: str, statistic: str, n_dyads: int,
             notes: list[str]) -> dict:
    tested = prep.names[prep.fixed:]
    return dict(kind="regression", model=model, scheme=scheme, statistic=statistic,
                method=None, terms=list(info.intercepts + tested), tested=list(tested),
                response=prep.response_name, n_nodes=prep.mask.shape[0],
                n_dyads=int(n_dyads), directed=prep.directed, two_mode=False, notes=notes,
                waves=list(info.names), wave_dyads=list(info.dyads))


def refuse_options(*, overwrite_inputs: bool) -> None:
    """What panel data do not take, each refused in one line."""
    if overwrite_inputs:
        raise InputError("waves: overwrite_inputs does not apply (the waves are stacked "
                         "into a copy)")

"""The dense linear route for panels: several waves of one node set, one relabelling.

``inputs.waves.prepare_waves`` stacks every input as an (n, n * T) layer whose columns
interleave the waves; the relabelling acts on every wave at once through the column
relabelling the blocks derive from the row relabelling. The schemes are then those of
``routes.linear.build_statistics`` unchanged: with complete data and wave intercepts the
layers are centred within each wave first (the intercepts are absorbed; the t statistic's
degrees of freedom count them), with missing dyads the intercepts are fixed layers of
their own. The table's fit is the least-squares fit with one intercept per wave
(``inputs.waves.observed_fit``); the intercepts are reported, never tested.
"""

from __future__ import annotations

import json
from typing import Any

import numpy as np

from ..errors import InputError
from ..inputs import design as _design
from ..inputs.waves import centre_waves, observed_fit, prepare_waves
from ..settings import check_regression
from .linear import build_statistics
from .plan import Plan, dense_identity, groups_fingerprint, input_fingerprints


def plan(y: Any, predictors: Any, *, scheme: str, statistic: str, storage: str = "float64",
         directed: bool | None = None, groups: Any = None, dyads: str | None = None,
         wave_effects: bool = True, ci: float | None = None) -> Plan:
    """The plan of a panel regression (module docstring)."""
    check_regression(model="linear", scheme=scheme, statistic=statistic, storage=storage)
    prep, info = prepare_waves(y, predictors, directed=directed, groups=groups, dyads=dyads,
                               wave_effects=wave_effects)
    pivot = _design.fit_pivot(prep.complete, storage=storage)
    fit = observed_fit(prep, info, pivot=pivot)
    fingerprints = input_fingerprints(prep)
    absorbed = 0
    if info.wave_effects and prep.complete and prep.waves > 1:
        centre_waves(prep)
        absorbed = prep.waves - 1
    stats = build_statistics(prep, scheme=scheme, statistic=statistic, storage=storage,
                             absorbed=absorbed)
    tested = prep.names[prep.fixed:]
    terms = info.intercepts + tested
    settings = dict(kind="regression", model="linear", scheme=scheme, statistic=statistic,
                    method=None, storage=storage, dyads=dyads,
                    groups=groups_fingerprint(groups), waves=json.dumps(info.names),
                    lags=json.dumps(info.lags, sort_keys=True),
                    wave_effects=info.wave_effects)
    notes = []
    if info.wave_effects:
        notes.append(f"wave intercepts ({', '.join(info.intercepts)}): one per wave, fixed "
                     "terms, not tested")
    if info.dropped:
        lagged = ", ".join(f"{name!r} (lag {lag})" for name, lag in info.lags.items())
        notes.append(f"lag: the response's wave(s) {', '.join(info.dropped)} drop out; "
                     f"{lagged} take(s) the earlier wave")
    notes.append(f"waves: {len(info.names)} ({', '.join(info.names)}), one relabelling of the "
                 f"nodes applied to every wave; complete dyads per wave "
                 f"{', '.join(f'{c:,}' for c in info.dyads)}")
    if ci is not None:
        notes.append("no coefficient intervals with waves (not built for panel data yet)")
    n = prep.mask.shape[0]
    info_summary = dict(kind="regression", model="linear", scheme=scheme, statistic=statistic,
                        method=None, terms=list(terms), tested=list(tested),
                        response=prep.response_name, n_nodes=n, n_dyads=int(fit.n_dyads),
                        directed=prep.directed, two_mode=False, notes=notes,
                        waves=list(info.names), wave_dyads=list(info.dyads))
    fit_arrays = dict(coef=fit.coef, se=fit.se, stat=fit.t if statistic == "t" else fit.coef,
                      fit=np.array([fit.r2, np.nan]))
    a = len(info.intercepts)
    ident = dense_identity(prep, settings, fingerprints)
    return Plan(kernel=stats, blocks=prep.blocks, chunk_size=stats.chunk_size(),
                fit=fit_arrays, summary=info_summary, identity=ident,
                expected=fit.t[a:] if statistic == "t" else None, extra=stats.extra)


def refuse_options(*, model: str, overwrite_inputs: bool) -> None:
    """What panel data do not take yet, each refused in one line."""
    if model != "linear":
        raise InputError("waves: model='logistic' does not take waves yet; use the linear "
                         "model")
    if overwrite_inputs:
        raise InputError("waves: overwrite_inputs does not apply (the waves are stacked "
                         "into a copy)")

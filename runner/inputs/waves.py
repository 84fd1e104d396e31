"""Several waves of one node set: panel data under one relabelling shared by every wave.

``Waves([M1, M2, ...], names=None, lag=0)`` is one network observed at several waves, each
a network of any accepted kind (array, DataFrame, Dyadic, graph, a derived predictor) over
the same nodes; labelled waves are aligned by label, and a node absent at a wave has its
dyads missing there. A problem mixes Waves of one length with derived predictors and
single networks, which stand at every wave. ``lag`` = l on a predictor: the response at
wave t goes with the predictor at wave t - l, so the response's first l waves drop out.

The engine's layout (``prepare_waves``): one rectangular (n, n * T) matrix per input
whose column ``j * T + t`` is node j at wave t. A relabelling pi of the nodes acts on the
rows as pi and on the columns as pi(j) * T + t (``blocks.Blocks.columns``), which is
M_t'[i, j] = M_t[pi(i), pi(j)] at every wave at once: no copy per wave, and the kernels,
schemes, missing dyads, groups, run files, stop rules and exact enumeration (n!
relabellings, each applied to every wave) are those of one-mode data. Interleaving the
waves keeps a row's dyads with larger nodes in one column range (undirected data) and a
relabelled node's T values next to each other in memory.

Wave intercepts (``wave_effects``, the default): one intercept per wave, fixed terms that
are never tested. With complete data every layer is centred within each wave (so each
intercept is orthogonal to every layer, relabelled or not, and only the residual degrees
of freedom change: ``routes.linear.build_statistics(absorbed=...)``); with missing dyads
the intercepts are layers of their own (``Prepared.fixed``), since a relabelled layer is
then no longer centred over a relabelling's complete dyads.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Sequence

import numpy as np

from ..errors import InputError
from .design import (Prepared, _column_ranges, _group_order, _symmetric, check_design,
                     check_response, decide_directed, decide_dyads, fold_rows, name_predictors,
                     node_groups)
from . import memory
from .blocks import Blocks
from .dyadic import Dyadic, NodeDerived, Reverse, as_dyadic, network_name
from .labels import some_labels
from .optional import is_frame
from .sparse import SparseNetwork

# Dyad rows folded into the observed fit's streaming QR at once.
FIT_ROWS = 1 << 18


@dataclass(frozen=True, eq=False)
class Waves:
    """One network observed at several waves of the same node set.

    Parameters
    ----------
    networks : list
        One network per wave, in time order: arrays, DataFrames, ``dyadperm.Dyadic``,
        networkx graphs or derived predictors (``dyadperm.same`` ...). Labelled networks
        are aligned by label; a node absent at a wave has its dyads missing there. The
        nodes are every label of the response's waves, in the order of the first wave
        then of appearance; an unlabelled predictor array (and a groups array) is read in
        that order, so plain arrays of one size keep their positions "0" .. "n-1" (when
        the node set changes between waves, give labelled networks).
    names : list of str, optional
        The waves' names ("2023", ...); default "1", "2", ...
    lag : int
        0: the network at wave t goes with the response at wave t. 1: with the response at
        wave t + 1 (the previous wave of a predictor; the response's first wave drops out).
    name : str, optional
        Name in messages and tables (a dict key of the predictors wins).
    """

    networks: Sequence[Any]
    names: Sequence[Any] | None = None
    lag: int = 0
    name: str | None = None

    def __post_init__(self) -> None:
        what = self.name or "Waves"
        if isinstance(self.networks, (str, bytes)) or not hasattr(self.networks, "__len__"):
            raise InputError(f"{what}: give a list of networks, one per wave")
        object.__setattr__(self, "networks", tuple(self.networks))
        if len(self.networks) == 0:
            raise InputError(f"{what}: give at least one wave")
        if any(isinstance(net, Waves) for net in self.networks):
            raise InputError(f"{what}: a wave cannot itself be a Waves")
        if self.names is not None:
            names = tuple(str(v) for v in self.names)
            if len(names) != len(self.networks):
                raise InputError(f"{what}: {len(names)} names for {len(self.networks)} waves")
            if len(set(names)) != len(names):
                raise InputError(f"{what}: wave names must differ; got {list(names)}")
            object.__setattr__(self, "names", names)
        if isinstance(self.lag, bool) or not isinstance(self.lag, (int, np.integer)) \
                or not 0 <= int(self.lag) < len(self.networks):
            raise InputError(f"{what}: lag must be a whole number from 0 to "
                             f"{len(self.networks) - 1} (fewer than its waves); got {self.lag!r}")
        object.__setattr__(self, "lag", int(self.lag))

    def __len__(self) -> int:
        return len(self.networks)

    def wave_names(self) -> tuple[str, ...]:
        return self.names if self.names is not None else tuple(
            str(t + 1) for t in range(len(self.networks)))


def is_waves(obj: Any) -> bool:
    return isinstance(obj, Waves)


@dataclass(frozen=True)
class WaveInfo:
    """What a panel problem reports: the waves used and the dyads of each."""

    names: tuple[str, ...]  # waves of the response used, in order
    dropped: tuple[str, ...]  # response waves dropped by a lag
    lags: dict  # predictor name -> lag (only those with a lag)
    wave_effects: bool
    dyads: tuple[int, ...]  # complete dyads per wave (response and every predictor observed)
    density: tuple[float, ...]  # response's mean over its observed dyads, per wave (the
    # share of ties of a 0/1 network)

    @property
    def intercepts(self) -> tuple[str, ...]:
        """The fixed terms: one intercept per wave, or the single intercept."""
        return tuple(f"wave {w}" for w in self.names) if self.wave_effects else ("intercept",)


def uses_waves(y: Any, predictors: Any) -> bool:
    """Whether a problem is a panel (the response, or some predictor, is a Waves)."""
    if is_waves(y):
        return True
    values = predictors.values() if isinstance(predictors, dict) else (
        predictors if isinstance(predictors, (list, tuple)) else [predictors])
    return any(is_waves(v) for v in values)


def refuse_waves(y: Any, predictors: Any, *, reason: str) -> None:
    """One InputError when a panel problem reaches a route that has no waves."""
    if uses_waves(y, predictors):
        raise InputError(f"waves: {reason}")


def prepare_waves(y: Any, predictors: Any, *, directed: bool | None = None,
                  groups: Any = None, dyads: str | None = None,
                  wave_effects: bool = True, intercept_layers: bool = False,
                  layers_per_term: int = 1) -> tuple[Prepared, WaveInfo]:
    """Align a panel problem on one node order and stack its waves (module docstring).

    ``intercept_layers``: the wave intercepts as layers of their own even with complete
    data (the logistic model, whose fits cannot absorb them by centring).
    ``layers_per_term``: n x n T layers the route builds per network (memory check)."""
    if not is_waves(y):
        raise InputError("waves: the response must be a dyadperm.Waves when a predictor is one")
    if not isinstance(wave_effects, (bool, np.bool_)):
        raise InputError(f"wave_effects must be True or False; got {wave_effects!r}")
    if y.lag:
        raise InputError("waves: lag applies to predictors, not to the response")
    yname = network_name(y) or "response"
    n_waves = len(y)
    all_names = y.wave_names()
    items = name_predictors(predictors, named=(Dyadic, NodeDerived, Reverse, Waves))
    for name, obj in items:
        if is_waves(obj):
            if len(obj) != n_waves:
                raise InputError(f"predictor {name!r} has {len(obj)} waves; the response "
                                 f"has {n_waves}")
            if obj.names is not None and y.names is not None and obj.wave_names() != all_names:
                raise InputError(f"predictor {name!r}: its wave names {list(obj.wave_names())} "
                                 f"are not the response's {list(all_names)}")
    for name, obj in items:
        inner = obj.network if isinstance(obj, Reverse) else None
        if is_waves(inner) and len(inner) != n_waves:
            raise InputError(f"predictor {name!r} has {len(inner)} waves; the response "
                             f"has {n_waves}")
    lags = {name: _lag(obj) for name, obj in items if _lag(obj)}
    first = max(lags.values(), default=0)
    used = list(range(first, n_waves))
    if not used:
        raise InputError("waves: the lag leaves no wave of the response")
    T = len(used)

    # the response's waves fix the node set: every node seen at some wave (a wave a lag
    # drops too, so the node order does not depend on the lag)
    every = [_wave_dyadic(net, f"{yname} at wave {w}") for net, w in zip(y.networks, all_names)]
    resp = [every[t] for t in used]
    labels = _union_labels(every)
    n = len(labels)
    if n < 3:
        raise InputError(f"too few nodes: got {n}; need at least 3")
    # before any array is built: every network per wave and stacked, the route's layers
    L = len(items) + 1 + (T - 1 if wave_effects else 0)
    need = memory.dense_bytes(n, n * T, arrays=2 * L, layers=layers_per_term * L)
    ok, avail = memory.fits(need)
    if not ok:
        raise InputError(f"waves: {n:,} nodes at {T} waves would need {memory.gib(need)} of "
                         f"memory for the stacked waves, more than the {memory.gib(avail)} "
                         "available; use fewer waves or a smaller network")
    groups = node_groups(groups, labels)
    order, row_blocks, codes = _group_order(groups, n, "groups", labels)
    dyads = decide_dyads(dyads, groups)
    internal = [labels[i] for i in order]
    pos = {lab: i for i, lab in enumerate(internal)}

    # every input at every used wave, (n, n) on the internal order (NaN: node absent)
    waves_of: list[list[np.ndarray]] = []
    explicit: list[bool] = []
    names = [name for name, _ in items]
    for name, obj in items:
        mats = []
        for w, t in enumerate(used):
            lag = _lag(obj)
            if is_waves(obj):
                src = obj.networks[t - lag]
            elif isinstance(obj, Reverse) and is_waves(obj.network):
                src = Reverse(obj.network.networks[t - lag], obj.name)
            else:
                src = obj
            what = f"predictor {name!r}" + (f" at wave {all_names[t - lag]}"
                                            if src is not obj else "")
            mats.append(_on_nodes(src, what, internal, pos, resp[w], explicit, labels,
                                  order))
        waves_of.append(mats)
    waves_of.append([_on_nodes(r, f"{yname} at wave {all_names[t]}", internal, pos, r,
                               explicit) for r, t in zip(resp, used)])
    for name, mats in zip(names + [yname], waves_of):
        for mat in mats:
            if np.isinf(mat).any():
                raise InputError(f"{name!r} has an infinite value; use NaN for a missing value")
    asym = [nm for nm, mats in zip(names + [yname], waves_of)
            if not all(_symmetric(m) for m in mats)]
    is_directed = decide_directed(directed, asym, explicit)

    base = ~np.eye(n, dtype=bool)
    if not is_directed:
        base &= np.triu(np.ones((n, n), dtype=bool), 1)
    within = groups is not None and dyads == "within"
    if within:
        c = codes[order]
        base &= c[:, None] == c[None, :]
    start, stop = _column_ranges(base, False, is_directed, within, row_blocks)
    mask = np.repeat(base[:, :, None], T, axis=2).reshape(n, n * T)
    lower = np.tril_indices(n, -1)
    stacked = []
    for mats in waves_of:
        cube = np.stack(mats, axis=2)
        cube[~base] = np.nan
        if not is_directed:
            cube[lower] = cube.transpose(1, 0, 2)[lower]
        stacked.append(cube.reshape(n, n * T))
    complete = not any(np.isnan(a[mask]).any() for a in stacked)
    ok = np.ones((n, n, T), dtype=bool)
    for a in stacked:
        ok &= ~np.isnan(a.reshape(n, n, T))
    ok &= base[:, :, None]
    per_wave = tuple(int(v) for v in ok.sum(axis=(0, 1)))
    ycube = stacked[-1].reshape(n, n, T)
    density = tuple(float(np.nanmean(np.where(base, ycube[:, :, w], np.nan)))
                    if np.any(base & ~np.isnan(ycube[:, :, w])) else float("nan")
                    for w in range(T))
    fixed = 0
    pred_names = tuple(names)
    if wave_effects and (intercept_layers or not complete) and T > 1:
        # missing dyads: the intercepts of waves 2.. are layers of their own (wave 1's is
        # the engine's constant)
        fixed = T - 1
        marks = [np.zeros((n, n * T)) for _ in range(T - 1)]
        for w, mark in enumerate(marks):
            mark[:, w + 1::T] = 1.0
        stacked = marks + stacked
        pred_names = tuple(f"wave {all_names[t]}" for t in used[1:]) + pred_names
    blocks = Blocks(n, n * T, row_blocks, None, waves=T)
    prep = Prepared(pred_names, yname, tuple(stacked), mask, blocks, start * T, stop * T,
                    order, order, tuple(labels), None, is_directed, complete,
                    int(mask.sum()), waves=T, fixed=fixed)
    info = WaveInfo(tuple(all_names[t] for t in used), tuple(all_names[:first]), lags,
                    bool(wave_effects), per_wave, density)
    return prep, info


def _lag(obj: Any) -> int:
    """The lag of a predictor: its own (a Waves), its network's (reverse of a Waves), 0."""
    if is_waves(obj):
        return obj.lag
    if isinstance(obj, Reverse) and is_waves(obj.network):
        return obj.network.lag
    return 0


def _wave_dyadic(obj: Any, what: str, labels: Sequence[str] | None = None) -> Dyadic:
    if isinstance(obj, (NodeDerived, Reverse)):
        raise InputError(f"{what}: the response must be a network at every wave")
    if isinstance(obj, SparseNetwork):
        raise InputError(f"{what} is a SparseNetwork; waves run on the dense route only "
                         "(give arrays, DataFrames or scipy.sparse matrices)")
    if labels is not None and not isinstance(obj, Dyadic) and not is_frame(obj) \
            and tuple(getattr(obj, "shape", ())) != (len(labels), len(labels)) \
            and not _is_graph(obj):
        shape = getattr(obj, "shape", None)
        raise InputError(f"{what} has shape {shape}; the waves have {len(labels)} nodes "
                         "(an unlabelled network is taken in the node order: the labels of "
                         "the response's waves, first wave first)")
    dy = as_dyadic(obj, name=what, labels=None if _is_graph(obj) else labels)
    if dy.two_mode:
        raise InputError(f"{what} is two-mode; waves of two-mode networks are not supported")
    return dy


def _union_labels(resp: list[Dyadic]) -> list[str]:
    """The node order of a panel: the labels of the response's first wave, then each label
    new at a later wave, in order of appearance. (The engine's internal order is by
    label whatever this order is; it says how an unlabelled predictor or a groups array
    is read.)"""
    seen: dict[str, None] = {}
    for dy in resp:
        for lab in dy.labels:
            seen.setdefault(lab, None)
    return list(seen)


def _is_graph(obj: Any) -> bool:
    return type(obj).__module__.startswith("networkx")


def _on_nodes(obj: Any, what: str, internal: list[str], pos: dict, resp_wave: Dyadic,
              explicit: list[bool], labels: Sequence[str] | None = None,
              order: np.ndarray | None = None) -> np.ndarray:
    """(n, n) float64 on the internal node order; NaN for nodes the network lacks.
    ``labels``: the node order (an unlabelled array, or a derived predictor's plain
    vector, is read in it); ``order``: its internal order (internal[i] = labels[order[i]])."""
    n = len(internal)
    if isinstance(obj, NodeDerived):
        # a plain vector holds one value per node in the node order, a mapping or Series
        # is aligned by label: either way build it there, then take the internal order
        return np.asarray(obj.dense(list(labels)), dtype=np.float64)[np.ix_(order, order)]
    if isinstance(obj, Reverse):
        src = resp_wave if obj.network is None else obj.network
        return np.ascontiguousarray(_on_nodes(src, what, internal, pos, resp_wave, explicit,
                                              labels, order).T)
    dy = obj if isinstance(obj, Dyadic) and obj is resp_wave else \
        _wave_dyadic(obj, what, labels) if not isinstance(obj, Waves) else None
    if dy is None:
        raise InputError(f"{what}: a wave cannot itself be a Waves")
    if dy.directed is not None:
        explicit.append(bool(dy.directed))
    unknown = [lab for lab in dy.labels if lab not in pos]
    if unknown:
        raise InputError(f"{what}: labels not among the response's nodes: "
                         f"{some_labels(unknown)}")
    at = np.array([pos[lab] for lab in dy.labels], dtype=np.int64)
    out = np.full((n, n), np.nan)
    vals = dy.values
    if dy.excluded is not None:
        vals = np.where(dy.excluded, np.nan, vals)
    out[np.ix_(at, at)] = vals
    return out


def centre_waves(prep: Prepared) -> None:
    """Centre every matrix within each wave over the dyad set, in place (complete data:
    the wave intercepts are then orthogonal to every layer, relabelled or not)."""
    T = prep.waves
    n = prep.mask.shape[0]
    cube_mask = prep.mask.reshape(n, n, T)
    for mat in prep.matrices:
        cube = mat.reshape(n, n, T)
        for t in range(T):
            cube[:, :, t] -= cube[:, :, t][cube_mask[:, :, t]].mean()


@dataclass(frozen=True)
class WaveFit:
    """Least squares on the stacked dyads: the fixed terms (one intercept per wave, or one
    intercept), then the predictors."""

    coef: np.ndarray
    se: np.ndarray
    t: np.ndarray
    r2: float
    n_dyads: int


def observed_fit(prep: Prepared, info: WaveInfo, *, pivot: float) -> WaveFit:
    """OLS of the response on [wave intercepts (or 1), predictors] over the complete dyads
    of every wave, by a streaming QR (as ``design.observed_fit``), checked by the one rule
    (``design.check_design``) before anything is solved."""
    T = prep.waves
    mats = prep.matrices[prep.fixed:]
    k = len(mats) - 1
    names = prep.names[prep.fixed:]
    a = T if info.wave_effects else 1
    p = a + k
    r_acc = np.zeros((0, p + 1))
    n_obs, ysum, ysq = 0, 0.0, 0.0
    step = max(1, FIT_ROWS // max(prep.mask.shape[1], 1))
    for i0 in range(0, prep.mask.shape[0], step):
        sel = prep.mask[i0:i0 + step]
        cols = np.nonzero(sel)[1]
        block = np.stack([m[i0:i0 + step][sel] for m in mats], axis=1)
        ok = ~np.isnan(block).any(axis=1)
        block, cols = block[ok], cols[ok]
        if block.shape[0] == 0:
            continue
        lead = np.zeros((block.shape[0], a))
        if info.wave_effects:
            lead[np.arange(block.shape[0]), cols % T] = 1.0
        else:
            lead[:, 0] = 1.0
        n_obs += block.shape[0]
        ysum += float(block[:, -1].sum())
        r_acc = fold_rows(r_acc, np.concatenate([lead, block], axis=1))
    if n_obs <= p:
        raise InputError(f"too few dyads for the model: {n_obs} complete dyads for {p} terms")
    ymean = ysum / n_obs
    for i0 in range(0, prep.mask.shape[0], step):
        sel = prep.mask[i0:i0 + step]
        block = np.stack([m[i0:i0 + step][sel] for m in mats], axis=1)
        ok = ~np.isnan(block).any(axis=1)
        ysq += float(((block[ok, -1] - ymean) ** 2).sum())
    r = r_acc[:p + 1, :p + 1]
    rx = r[:p, :p]
    where = "over the dyad set" if prep.complete else \
        f"over the {n_obs:,} complete dyads of the waves"
    if info.wave_effects:
        where += " within each wave (the wave intercepts take its mean at every wave)"
    raw = np.sqrt((rx[:, a:] * rx[:, a:]).sum(axis=0))
    check_design(rx[a:, a:], names, pivot=pivot, raw_norms=raw, where=where)
    if ysq <= 0.0:
        raise InputError(f"response {prep.response_name!r} has no variation over the dyad set")
    rss = float(r[p, p] ** 2) if r.shape[0] > p else 0.0
    check_response(rss, ysq, prep.response_name, where=where)
    if info.wave_effects:
        # every wave needs dyads of its own, or its intercept cannot be fitted
        empty = [w for w, c in zip(info.names, info.dyads) if c == 0]
        if empty:
            raise InputError(f"wave {empty[0]!r} has no complete dyads, so its intercept "
                             "cannot be fitted; leave the wave out")
    coef = np.linalg.solve(np.triu(rx), r[:p, p])
    rinv = np.linalg.solve(np.triu(rx), np.eye(p))
    sigma2 = rss / (n_obs - p)
    se = np.sqrt(sigma2 * (rinv * rinv).sum(axis=1))
    with np.errstate(divide="ignore", invalid="ignore"):
        t = coef / se
    return WaveFit(coef, se, t, 1.0 - rss / ysq, n_obs)


def wave_lines(info: WaveInfo, response: str) -> list[str]:
    """Per-wave dyad counts and response densities, for ``dyadperm check``."""
    lines = [f"waves: {len(info.names)} used ({', '.join(info.names)}); one relabelling of "
             "the nodes applied to every wave"]
    if info.dropped:
        lines.append(f"  lag: the response's first wave(s) {', '.join(info.dropped)} drop out")
    for w, c, d in zip(info.names, info.dyads, info.density):
        lines.append(f"  wave {w}: {c:,} complete dyads, {response} density {d:.4g} (its "
                     "mean over its observed dyads)")
    return lines

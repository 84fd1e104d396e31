"""Confidence intervals for a coefficient by inverting the scheme's own permutation test.

The 1 - alpha interval for beta_k is the set of values b for which the test of
H0: beta_k = b -- the same scheme on the response y - b x_k, with the same relabellings --
has p > alpha (Garthwaite 1996, Biometrics 52:1387-1393; Manly 2007, Randomization,
Bootstrap and Monte Carlo Methods in Biology, 3rd ed. [memory]).

How each relabelling's statistic depends on b
--------------------------------------------
For the DSP and Freedman-Lane schemes the kernels factor, for every relabelling, the Gram
matrix of the design [Z, A, Y, X] over that relabelling's dyads (Z: the intercept and the
other predictors; for DSP A = the relabelled residual of x_k, Y = y, X = x_k; for
Freedman-Lane A = x_k, Y = the relabelled reduced-model residual, X = the relabelled
residual of x_k on Z). Replacing y by y - b x_k replaces Y by Y - b X in both schemes. With
the trailing lower-triangular block of the Cholesky factor,

    [[l00,   0,   0],
     [l10, l11,   0],      rows and columns A, Y, X after partialling out Z,
     [l20, l21, l22]]

the t statistic of the relabelling at b is

    t(b) = sqrt(df) (l10 - b l20) / sqrt((l11 - b l21)^2 + (b l22)^2)

with df = N - p the relabelling's residual degrees of freedom (b = 0 gives the kernels'
ordinary t). The relabelling is at least as extreme as the observed data at b when
|T_pi(b)| >= (1 - 1e-9) |T_obs(b)| (the tie rule of ``pvalues``); squared and multiplied out
this is P_pi(b) >= 0 for a polynomial of degree at most 4. So the count of relabellings at
least as extreme is a step function of b that changes only at the real roots of these
polynomials (at most 4 per relabelling), and p(b) > alpha holds on a union of intervals
found by one sweep over the sorted roots: no grid, no refits, exact for the relabellings
drawn (and exact outright under exact enumeration).

Far from the estimate no relabelling is as extreme: the observed t(b) grows without bound
(at the identity l21 = l22 = 0, since x_k lies in the span of Z and A) while a relabelled
t(b) tends to a finite limit, so the accepted set is bounded. When it is not one interval
the hull is reported and ``pieces`` says so. The pivotal t is what makes this work: the
relabelled raw coefficient can grow with b as fast as the observed one, so inverting the
``coef`` statistic can accept every b; the interval is offered with statistic ``t`` only.

Monte Carlo error: the endpoints from the first and the second half of the relabellings
differ by chance; half their difference estimates the standard error of the endpoint from
all of them (the variance of an estimate from m/2 relabellings is about twice that from m).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from ..kernels import roots as _roots
from ..kernels.stats import INTERVAL_WIDTH
from .pvalues import TIE_TOLERANCE

#: The kernels' numbers per relabelling and tested term: the Cholesky block and df.
COLUMNS = ("l10", "l11", "l20", "l21", "l22", "df")
WIDTH = INTERVAL_WIDTH
# A polynomial whose coefficients are all this small relative to the largest term of its
# parts is identically zero: the relabelling is the observed data itself (at every b).
ZERO_POLY = 1e-12


@dataclass(frozen=True)
class Interval:
    """An inverted test: the hull [low, high] of the accepted values of b.

    ``pieces``: number of separate intervals the accepted set is made of (1 normally);
    ``halves``: the hull from each half of the relabellings (NaN when a half cannot give
    one); ``mc_se``: Monte Carlo standard error of ``low`` and ``high`` from the halves.
    """

    low: float
    high: float
    pieces: int
    halves: np.ndarray  # (2, 2)
    mc_se: np.ndarray  # (2,)


def _poly_mul(p: np.ndarray, q: np.ndarray) -> np.ndarray:
    """Product of polynomials given by coefficients (..., lowest degree first)."""
    out = np.zeros(p.shape[:-1] + (p.shape[-1] + q.shape[-1] - 1,))
    for i in range(p.shape[-1]):
        for j in range(q.shape[-1]):
            out[..., i + j] += p[..., i] * q[..., j]
    return out


def _parts(rows: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(numerator^2, denominator) of each row's squared t statistic, as polynomials in b
    (coefficients lowest degree first): t(b)^2 = num2(b) / den(b)."""
    l10, l11, l20, l21, l22, df = (rows[..., c] for c in range(WIDTH))
    num = np.stack([l10, -l20], axis=-1)  # l10 - b l20
    num2 = _poly_mul(num, num) * df[..., None]
    a = np.stack([l11, -l21], axis=-1)
    den = _poly_mul(a, a)  # (l11 - b l21)^2 + (b l22)^2
    den[..., 2] += l22 * l22
    return num2, den


def extreme_polynomials(rows: np.ndarray, observed: np.ndarray,
                        tie: float = TIE_TOLERANCE) -> np.ndarray:
    """P_pi(b) (m, 5), lowest degree first: relabelling pi is at least as extreme as the
    observed data at b exactly where P_pi(b) >= 0."""
    num_p, den_p = _parts(rows)
    num_o, den_o = _parts(observed[None, :])
    keep = (1.0 - tie) ** 2
    poly = np.zeros((rows.shape[0], 5))
    a = _poly_mul(num_p, np.broadcast_to(den_o, den_p.shape))
    b = keep * _poly_mul(np.broadcast_to(num_o, num_p.shape), den_p)
    poly[:, :a.shape[1]] += a
    poly[:, :b.shape[1]] -= b
    # a polynomial that is zero up to rounding: the observed relabelling itself
    size = np.maximum(np.abs(a).max(axis=1), np.abs(b).max(axis=1))
    flat = np.abs(poly).max(axis=1) <= ZERO_POLY * np.maximum(size, np.finfo(float).tiny)
    poly[flat] = 0.0
    return poly


def real_roots(poly: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Every point where one of the polynomials (rows, lowest degree first, degree <= 4)
    changes sign, the sign it takes just above (+1: it becomes positive as b passes the
    point upwards), and the row it belongs to (``kernels.roots``: safeguarded Newton steps
    between critical points, no eigenvalues). A root where a polynomial only touches 0
    changes no count and is left out."""
    poly = np.ascontiguousarray(poly, dtype=np.float64)
    if poly.shape[1] < 5:
        poly = np.hstack([poly, np.zeros((poly.shape[0], 5 - poly.shape[1]))])
    m = poly.shape[0]
    roots = np.zeros((m, 4))
    slopes = np.zeros((m, 4), dtype=np.int8)
    counts = np.zeros(m, dtype=np.int64)
    _roots.real_roots(poly, roots, slopes, counts)
    keep = np.arange(4)[None, :] < counts[:, None]
    row = np.broadcast_to(np.arange(m)[:, None], (m, 4))
    return roots[keep], slopes[keep].astype(np.float64), row[keep]


def _start_count(poly: np.ndarray) -> int:
    """How many polynomials are >= 0 as b -> -inf: identically zero ones, and those whose
    sign there, sign(lead) (-1)^degree, is positive."""
    nz = poly != 0.0
    deg = np.where(nz.any(axis=1), poly.shape[1] - 1 - np.argmax(nz[:, ::-1], axis=1), -1)
    lead = poly[np.arange(poly.shape[0]), np.maximum(deg, 0)]
    return int(np.count_nonzero(deg < 0)) + int(np.count_nonzero(
        (deg >= 0) & (np.sign(lead) * np.where(deg % 2 == 0, 1.0, -1.0) > 0)))


def accepted_set(poly: np.ndarray, *, exact: bool, alpha: float,
                 roots: tuple[np.ndarray, np.ndarray] | None = None,
                 extra_count: int = 0) -> list[tuple[float, float]]:
    """The intervals of b where p(b) > alpha, from each relabelling's polynomial.

    ``roots``: (points, slopes) of ``real_roots(poly)`` when already known;
    ``extra_count``: relabellings counted as at least as extreme at every b (failed fits),
    beyond the rows of ``poly``."""
    m = poly.shape[0] + extra_count
    # p(b) = (count + 1) / (m + 1) (random) or count / m (exact, the identity among them)
    if exact:
        need = int(np.floor(alpha * m + 1e-9)) + 1  # count / m > alpha
    else:
        need = int(np.floor(alpha * (m + 1) + 1e-9))  # (count + 1) / (m + 1) > alpha
    start = _start_count(poly) + extra_count
    pts, slope = real_roots(poly)[:2] if roots is None else roots
    order = np.argsort(pts, kind="stable")
    pts, slope = pts[order], slope[order]
    # the count on [pts[i], pts[i + 1]): start plus the changes at pts[0] .. pts[i]
    count = start + np.concatenate([[0], np.cumsum(slope)]).astype(np.int64)
    edges = np.concatenate([[-np.inf], pts, [np.inf]])
    # runs of consecutive accepted pieces [first, stop)
    step = np.diff(np.concatenate([[0], (count >= need).astype(np.int8), [0]]))
    out: list[tuple[float, float]] = []
    for first, stop in zip(np.flatnonzero(step == 1), np.flatnonzero(step == -1)):
        lo, hi = edges[first], edges[stop]
        if out and out[-1][1] == lo:  # only a point (two equal roots) between them
            out[-1] = (out[-1][0], hi)
        else:
            out.append((lo, hi))
    return out


def invert(rows: np.ndarray, observed: np.ndarray, *, exact: bool, alpha: float) -> Interval:
    """The interval of one term from its relabellings' rows (m, 6) and the observed row."""
    rows = np.asarray(rows, dtype=np.float64)
    observed = np.asarray(observed, dtype=np.float64)
    m = rows.shape[0]
    nan2 = np.full((2, 2), np.nan)
    if not np.all(np.isfinite(observed)) or m == 0:
        return Interval(np.nan, np.nan, 0, nan2, np.full(2, np.nan))
    # a relabelling whose fit failed (non-finite numbers) counts as extreme at every b
    ok = np.all(np.isfinite(rows), axis=1)
    index = np.flatnonzero(ok)
    poly = extreme_polynomials(rows[ok], observed)
    pts, slope, owner = real_roots(poly)  # solved once, shared by the halves
    full = _hull(poly, (pts, slope), m - index.size, exact, alpha)
    halves = nan2.copy()
    if not exact and m >= 4:
        for h, (lo, hi) in enumerate(((0, m // 2), (m // 2, m))):
            mine = (index >= lo) & (index < hi)
            mine_roots = mine[owner]
            failed = (hi - lo) - int(mine.sum())
            halves[h] = _hull(poly[mine], (pts[mine_roots], slope[mine_roots]), failed,
                              False, alpha)[:2]
    with np.errstate(invalid="ignore"):  # a half too small to bound the interval: no error
        mc_se = np.where(np.isfinite(halves).all(axis=0),
                         np.abs(halves[0] - halves[1]) / 2.0, np.nan)
    return Interval(full[0], full[1], full[2], halves, mc_se)


def _hull(poly, roots, failed, exact, alpha) -> tuple[float, float, int]:
    parts = accepted_set(poly, exact=exact, alpha=alpha, roots=roots, extra_count=failed)
    if not parts:
        return np.nan, np.nan, 0
    return parts[0][0], parts[-1][1], len(parts)


def for_terms(spec: dict, extra: np.ndarray | None, observed: np.ndarray | None,
              names: list[str], *, exact: bool) -> tuple[np.ndarray, ...]:
    """Every tested term's interval from a run's extra numbers (m, WIDTH * k).

    ``spec``: what the route put in the run's summary: ``level`` and either ``scale`` (per
    term, the factor taking b from the kernels' units to the coefficient's) or ``reason``
    (why no interval exists for this run). Returns (low, high, mc_se (k, 2), notes).
    """
    k = len(names)
    low, high = np.full(k, np.nan), np.full(k, np.nan)
    mc = np.full((k, 2), np.nan)
    if spec.get("reason"):
        return low, high, mc, [spec["reason"]]
    notes = []
    alpha = 1.0 - float(spec["level"])
    for j, name in enumerate(names):
        cols = slice(WIDTH * j, WIDTH * (j + 1))
        iv = invert(np.asarray(extra)[:, cols], np.asarray(observed)[cols], exact=exact,
                    alpha=alpha)
        s = float(spec["scale"][j])
        ends = np.array([iv.low, iv.high]) * s
        errs = iv.mc_se * abs(s)
        if s < 0:
            ends, errs = ends[::-1], errs[::-1]
        low[j], high[j] = ends
        mc[j] = errs
        if iv.pieces > 1:
            notes.append(f"{name}: the values its test accepts are {iv.pieces} separate "
                         "intervals; the interval shown is their hull")
        elif not np.all(np.isfinite(ends)):
            notes.append(f"{name}: too few relabellings to reject any value at this level, "
                         "so its interval is unbounded")
        elif iv.pieces == 0:
            notes.append(f"{name}: its test rejects every value, so it has no interval "
                         "(too few relabellings for this level?)")
    return low, high, mc, notes

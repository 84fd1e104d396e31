"""Numba options shared by every kernel, and the one rule of whether a fit is possible.

``nogil`` lets joblib threads run kernels side by side; ``cache`` keeps compiled code
between runs (a fresh machine compiles once). The fastmath set leaves out ``nnan`` and
``ninf`` (NaN marks missing dyads and must survive) and ``reassoc`` (sums must be
accumulated in one fixed order so results are bit-identical for any chunking).

Whether a design can be fitted
------------------------------
One rule decides it everywhere: for the observed data (``dyadperm.inputs.design.
check_design``, called by every route before any relabelling), in each route's setup, and
in the kernels for every relabelling (a permuted fit that breaks it is a failed fit, NaN).
Each column of a design, the intercept first, must keep apart from the other columns at
least a fraction ``pivot`` of its own size: a predictor's residual on the intercept
(centring) keeps at least ``pivot`` of its norm, and its residual on the intercept and
every other predictor keeps at least ``pivot`` of its centred norm (sqrt(1 - R^2) >=
``pivot``, R^2 of the predictor on the others; 1 / sqrt of its variance inflation factor).
Every Cholesky or QR pivot of the standardised design (predictors centred over the dyad
set, as the kernels read them), in any column order, is then at least ``pivot`` times its
column's norm, which is what the kernels test for each relabelling (on sums of squares:
pivot^2 > ``FIT_PIVOT_SQUARED`` x diagonal).

``pivot`` is the finest relative pivot the arithmetic of the fit resolves to about six
digits (the agreement the pipeline asks of the kernels' observed statistic, 1e-6):

- ``FIT_PIVOT`` (1e-5) for fits from Gram matrices (sums of products of standardised
  layers: the kernels, missing data, the logistic and sparse routes, float32 layers). A
  pivot computed from a Gram matrix carries a rounding error of a few machine epsilon
  relative to its diagonal (Higham 2002, Accuracy and Stability of Numerical Algorithms,
  2nd ed., section 10.1 [memory]), so pivot^2 = 1e-10 keeps about six digits.
- ``QR_PIVOT`` (1e-11) for the dense linear route with complete float64 data, whose
  kernels read an orthonormal basis of the predictors (made by a QR, twice when they are
  ill-conditioned): the kernels' Gram matrices are then near the identity whatever the
  predictors' collinearity, and only the QR of the standardised predictors must resolve
  their pivots, to a relative error near machine epsilon / pivot (common practice: the
  forward error of a Householder QR). A pivot below 1e-11 leaves fewer than five digits and cannot be told apart from
  exact collinearity in a large network (rounding noise of an exactly collinear pair grows
  like epsilon sqrt(N)).
"""

FASTMATH = {"nsz", "arcp", "contract", "afn"}

KERNEL_OPTIONS = dict(nogil=True, cache=True, fastmath=FASTMATH, error_model="numpy")

#: Options of element-wise setup kernels that must give numpy's bits: IEEE arithmetic
#: (no reciprocal or contraction), so (x - mean) / sd is rounded as numpy rounds it.
#: ``fastmath=False`` is written out: numba compiles a kernel that leaves it unset with
#: the fastmath of the kernel that calls it first (``Flags.inherit_if_not_set``), and then
#: serves that compiled code to every caller -- a division by sd became a multiplication
#: by its reciprocal when a fastmath kernel called the stack's writer.
EXACT_OPTIONS = dict(nogil=True, cache=True, error_model="numpy", fastmath=False)

#: Relative pivot every fit from Gram matrices needs (module docstring).
FIT_PIVOT = 1e-5
#: The same rule on sums of squares, as the kernels test it: pivot^2 > FIT_PIVOT_SQUARED *
#: diagonal. Written out (1e-5 ** 2 is 1.0000000000000002e-10 in floating point).
FIT_PIVOT_SQUARED = 1e-10
#: Relative pivot of the dense linear route on complete float64 data (module docstring).
QR_PIVOT = 1e-11

"""Kernels in LLVM IR vector code: dot products in fixed-order chains, and the triangular
map of a layer stack's records (``apply_records``).

Dot products in fixed-order chains
----------------------------------

A sum of many products is split into partial sums (chains) over t mod c, combined in an
order the source fixes: the compiler may not reorder floating-point additions (no
``reassoc``, ``options.py``), so every caller gets the same bits for any chunking or
thread count. Written as scalar chains in numba, the sums compile to scalar fused
multiply-adds (LLVM's vectorisers do not pack the chains into vectors); here each chain is a
lane of a <4 x double> accumulator in LLVM IR, which performs the same operations in the
same order (one fused multiply-add a term, lane by lane), four terms per instruction.

- ``dot_chains(x, y, w)``: four chains, t mod 4, combined as (s0 + s1) + (s2 + s3).
- ``dot_chains2`` / ``dot_chains4``: two or four such sums of different pairs in one loop
  (each with ``dot_chains``' bits); their accumulators are independent, so the loop waits
  on the adder's latency a half or a quarter as often.
- ``dot_chains16(x, y, w)``: sixteen chains, t mod 16 (four accumulators), combined
  pairwise as ((s0 + s8) + (s4 + s12) + ...) (below).

In every one the last w mod 4 (``dot_chains16``: w mod 16) terms are added to chain 0 in
increasing t. x and y are 1-d C-contiguous float64 arrays; terms t < w are read. With
numba's JIT off the scalar twins (``_py_chains``: the same order, but a product and a sum
where the kernels fuse them, so not the same bits) run.

Records to rows
---------------
``records_to_rows(flat, start, L, nb, bt, row0)``: bt[row0 + c, w] = flat[start + w L + c]
for c < L, w < nb (widened to float64): nb records of a layer stack into one row per
layer (the layer-major blocks of the QR fold and the Gram). Four records at a time: each
layer's four values go to its row with one vector store. Only copies: no value changes.

Masked row sums
---------------
``masked_row_sum(mat, mask, i, shift, square)``: the sum over row i's cells where
``mask`` holds of (x - shift), or of its square, in four chains over j mod 4 (one lane
each; the last m mod 4 cells in chain 0), combined as (s0 + s1) + (s2 + s3): the order of
``stats._masked_row_sum``, with an unmasked cell adding 0.0. The square is rounded before
it is added (a product, then a sum: no fused multiply-add), as there.

The triangular map of records
-----------------------------
``apply_records(flat, n_cells, L, rpad)``: each record v (L consecutive values of
``flat``, float64 or float32) becomes v @ R, R upper triangular: new_c = sum_{e <= c} v_e
R[e, c], one fused multiply-add a term in increasing e from 0.0, rounded to ``flat``'s type
(the order of ``stats.apply_upper``). Each v_e is broadcast to a vector and multiplied into
whole rows of R at once, so lane c also takes the terms e > c, whose R[e, c] is 0: adding
a zero product leaves a sum as it is (only an exact zero may change its sign).
"""

from llvmlite import ir
from numba import config, njit, types
from numba.core import cgutils
from numba.extending import intrinsic

from .options import KERNEL_OPTIONS

V4D = ir.VectorType(ir.DoubleType(), 4)


def ir_loop_head(builder, name, j0, start):
    """Open a loop over j from j0 carrying the values ``start`` (vectors or scalars):
    branch to and position at its head block; returns (head, j phi, the values' phis).
    The caller adds the incoming values of the loop's back edge."""
    entry = builder.block
    head = builder.append_basic_block(f"{name}.head")
    builder.branch(head)
    builder.position_at_end(head)
    j = builder.phi(ir.IntType(64))
    j.add_incoming(j0, entry)
    sums = []
    for vec in start:
        ph = builder.phi(vec.type)
        ph.add_incoming(vec, entry)
        sums.append(ph)
    return head, j, sums


def _py_chains(xs, ys, w, k):
    """The sums of the pairs (xs[p], ys[p]) in ``k`` chains (4 or 16), the scalar way."""
    out = []
    full = w - w % k
    for x, y in zip(xs, ys):
        s = [0.0] * k
        for t in range(full):
            s[t % k] += x[t] * y[t]
        for t in range(full, w):
            s[0] += x[t] * y[t]
        if k == 4:
            out.append((s[0] + s[1]) + (s[2] + s[3]))
        else:
            def pair(a):
                return (s[a] + s[a + 8]) + (s[a + 4] + s[a + 12])
            out.append((pair(0) + pair(2)) + (pair(1) + pair(3)))
    return out


def _chains_codegen(n_pairs, n_vec):
    """IR of ``n_pairs`` dot products, each in ``n_vec`` <4 x double> accumulators.

    Arguments: x_0, y_0, ..., x_{P-1}, y_{P-1}, w. Term t of pair p goes to lane t mod 4 of
    accumulator (t div 4) mod n_vec while t < w - w mod (4 n_vec), as one fused
    multiply-add; the rest to lane 0 of accumulator 0, in increasing t. Then the lanes are
    combined: n_vec 1 as (l0 + l1) + (l2 + l3); n_vec 4 (chain c = 4 a + l) as
    ((s0 + s8) + (s4 + s12) + ...), see ``_py_chains``.
    """
    step = 4 * n_vec

    def codegen(context, builder, signature, args):
        i32, i64 = ir.IntType(32), ir.IntType(64)
        dbl = ir.DoubleType()
        ptrs = [context.make_array(signature.args[a])(context, builder, args[a]).data
                for a in range(2 * n_pairs)]
        w = args[2 * n_pairs]
        fma4 = cgutils.get_or_insert_function(
            builder.module, ir.FunctionType(V4D, [V4D, V4D, V4D]), "llvm.fma.v4f64")
        fma1 = cgutils.get_or_insert_function(
            builder.module, ir.FunctionType(dbl, [dbl, dbl, dbl]), "llvm.fma.f64")
        zero = ir.Constant(V4D, [0.0] * 4)
        full = builder.sub(w, builder.srem(w, ir.Constant(i64, step)))
        head, t, accs = ir_loop_head(builder, "chains", ir.Constant(i64, 0),
                                     [zero] * (n_pairs * n_vec))
        body = builder.append_basic_block("chains.body")
        after = builder.append_basic_block("chains.after")
        builder.cbranch(builder.icmp_signed("<", t, full), body, after)
        builder.position_at_end(body)
        new = []
        for p in range(n_pairs):
            for a in range(n_vec):
                at = builder.add(t, ir.Constant(i64, 4 * a))
                xv = builder.load(builder.bitcast(builder.gep(ptrs[2 * p], [at]),
                                                  V4D.as_pointer()), align=8)
                yv = builder.load(builder.bitcast(builder.gep(ptrs[2 * p + 1], [at]),
                                                  V4D.as_pointer()), align=8)
                new.append(builder.call(fma4, [xv, yv, accs[p * n_vec + a]]))
        t.add_incoming(builder.add(t, ir.Constant(i64, step)), builder.block)
        for ph, val in zip(accs, new):
            ph.add_incoming(val, builder.block)
        builder.branch(head)
        # the last w mod step terms into lane 0 of accumulator 0, in increasing t
        builder.position_at_end(after)
        lane0 = [builder.extract_element(accs[p * n_vec], ir.Constant(i32, 0))
                 for p in range(n_pairs)]
        tail_head, u, s0 = ir_loop_head(builder, "chains.tail", t, lane0)
        tail_body = builder.append_basic_block("chains.tailbody")
        done = builder.append_basic_block("chains.done")
        builder.cbranch(builder.icmp_signed("<", u, w), tail_body, done)
        builder.position_at_end(tail_body)
        for p in range(n_pairs):
            xs = builder.load(builder.gep(ptrs[2 * p], [u]))
            ys = builder.load(builder.gep(ptrs[2 * p + 1], [u]))
            s0[p].add_incoming(builder.call(fma1, [xs, ys, s0[p]]), builder.block)
        u.add_incoming(builder.add(u, ir.Constant(i64, 1)), builder.block)
        builder.branch(tail_head)
        builder.position_at_end(done)
        sums = []
        for p in range(n_pairs):
            # chain c = 4 a + l is lane l of accumulator a
            s = [builder.extract_element(accs[p * n_vec + c // 4], ir.Constant(i32, c % 4))
                 for c in range(step)]
            s[0] = s0[p]
            add = builder.fadd
            if n_vec == 1:
                sums.append(add(add(s[0], s[1]), add(s[2], s[3])))
            else:
                def pair(a):
                    return add(add(s[a], s[a + 8]), add(s[a + 4], s[a + 12]))
                sums.append(add(add(pair(0), pair(2)), add(pair(1), pair(3))))
        if n_pairs == 1:
            return sums[0]
        return context.make_tuple(builder, signature.return_type, sums)
    return codegen


FLOATS = (types.float64, types.float32)


def _c_array(x, ndim, dtypes) -> bool:
    """Whether the numba type ``x`` is a C-contiguous array of ``ndim`` dimensions and
    one of ``dtypes`` (what the intrinsics here take)."""
    return (isinstance(x, types.Array) and x.ndim == ndim and x.layout == "C"
            and x.dtype in dtypes)


def _chains_intrinsic(n_pairs, n_vec):
    """An intrinsic taking x_0, y_0, ..., w (1-d C float64 arrays, an integer)."""
    def typer(typingctx, *args):
        arrays, w = args[:-1], args[-1]
        if len(arrays) != 2 * n_pairs or not isinstance(w, types.Integer):
            return None
        if not all(_c_array(a, 1, (types.float64,)) for a in arrays):
            return None
        ret = types.float64 if n_pairs == 1 else types.UniTuple(types.float64, n_pairs)
        inner = _chains_codegen(n_pairs, n_vec)

        def codegen(context, builder, signature, cargs):
            cargs = list(cargs)
            cargs[-1] = context.cast(builder, cargs[-1], signature.args[-1], types.int64)
            return inner(context, builder, signature, cargs)
        return ret(*args), codegen
    return typer


if config.DISABLE_JIT:
    def dot_chains(x, y, w):
        """Scalar twin of the four-chain dot product (JIT off)."""
        return _py_chains([x], [y], w, 4)[0]

    def dot_chains2(x0, y0, x1, y1, w):
        """Scalar twin of two four-chain dot products (JIT off)."""
        return tuple(_py_chains([x0, x1], [y0, y1], w, 4))

    def dot_chains4(x0, y0, x1, y1, x2, y2, x3, y3, w):
        """Scalar twin of four four-chain dot products (JIT off)."""
        return tuple(_py_chains([x0, x1, x2, x3], [y0, y1, y2, y3], w, 4))

    def dot_chains16(x, y, w):
        """Scalar twin of the sixteen-chain dot product (JIT off)."""
        return _py_chains([x], [y], w, 16)[0]
else:
    @intrinsic
    def _chains1(typingctx, x, y, w):
        return _chains_intrinsic(1, 1)(typingctx, x, y, w)

    @intrinsic
    def _chains2(typingctx, x0, y0, x1, y1, w):
        return _chains_intrinsic(2, 1)(typingctx, x0, y0, x1, y1, w)

    @intrinsic
    def _chains4(typingctx, x0, y0, x1, y1, x2, y2, x3, y3, w):
        return _chains_intrinsic(4, 1)(typingctx, x0, y0, x1, y1, x2, y2, x3, y3, w)

    @intrinsic
    def _chains16(typingctx, x, y, w):
        return _chains_intrinsic(1, 4)(typingctx, x, y, w)

    @njit(inline="always", **KERNEL_OPTIONS)
    def dot_chains(x, y, w):
        """sum_t x[t] y[t], t < w, in four chains over t mod 4 (the last w mod 4 terms in
        chain 0), combined as (s0 + s1) + (s2 + s3); one vector accumulator."""
        return _chains1(x, y, w)

    @njit(inline="always", **KERNEL_OPTIONS)
    def dot_chains2(x0, y0, x1, y1, w):
        """(``dot_chains``(x0, y0, w), ``dot_chains``(x1, y1, w)) in one loop."""
        return _chains2(x0, y0, x1, y1, w)

    @njit(inline="always", **KERNEL_OPTIONS)
    def dot_chains4(x0, y0, x1, y1, x2, y2, x3, y3, w):
        """(``dot_chains``(x0, y0, w), ..., ``dot_chains``(x3, y3, w)) in one loop."""
        return _chains4(x0, y0, x1, y1, x2, y2, x3, y3, w)

    @njit(inline="always", **KERNEL_OPTIONS)
    def dot_chains16(x, y, w):
        """sum_t x[t] y[t], t < w, in sixteen chains over t mod 16 (the last w mod 16
        terms in chain 0), combined pairwise: ((s0 + s8) + (s4 + s12)) + ((s2 + s10) +
        (s6 + s14)), then the same of the odd chains, the two added."""
        return _chains16(x, y, w)



# Widest record ``apply_records`` takes (two vectors of four lanes).
RECORD_LANES = 8


def _width_cases(builder, L, name):
    """A switch over the record width L = 1 .. RECORD_LANES (any other L goes straight to
    the end): returns the end block and [(width, its case block)], each case to be
    filled by the caller and to branch to the end block."""
    done = builder.append_basic_block(f"{name}.done")
    switch = builder.switch(L, done)
    cases = []
    for width in range(1, RECORD_LANES + 1):
        case = builder.append_basic_block(f"{name}.{width}")
        switch.add_case(ir.Constant(ir.IntType(64), width), case)
        cases.append((width, case))
    return done, cases


def _records_codegen(context, builder, signature, args):
    """IR of ``apply_records``: a switch over L = 1 .. RECORD_LANES, each case a loop over
    the records with its own unrolled body (see the module docstring)."""
    flat_t = signature.args[0]
    flat, n_cells, L, rpad = args
    i32, i64 = ir.IntType(32), ir.IntType(64)
    dbl = ir.DoubleType()
    data = context.make_array(flat_t)(context, builder, flat).data
    rdata = context.make_array(signature.args[3])(context, builder, rpad).data
    single = flat_t.dtype == types.float32
    fma4 = cgutils.get_or_insert_function(
        builder.module, ir.FunctionType(V4D, [V4D, V4D, V4D]), "llvm.fma.v4f64")
    zero = ir.Constant(V4D, [0.0] * 4)
    splat_mask = ir.Constant(ir.VectorType(i32, 4), [0] * 4)
    done, cases = _width_cases(builder, L, "records")
    for width, case in cases:
        builder.position_at_end(case)
        n_vec = (width + 3) // 4
        # rows of R as vectors: rows[e][a] = R[e, 4a : 4a + 4]
        rows = [[builder.load(builder.bitcast(
            builder.gep(rdata, [ir.Constant(i64, e * RECORD_LANES + 4 * a)]),
            V4D.as_pointer()), align=8) for a in range(n_vec)] for e in range(width)]
        head = builder.append_basic_block(f"records.{width}.head")
        body = builder.append_basic_block(f"records.{width}.body")
        builder.branch(head)
        builder.position_at_end(head)
        q = builder.phi(i64)
        q.add_incoming(ir.Constant(i64, 0), case)
        builder.cbranch(builder.icmp_signed("<", q, n_cells), body, done)
        builder.position_at_end(body)
        base = builder.mul(q, ir.Constant(i64, width))
        ptrs = [builder.gep(data, [builder.add(base, ir.Constant(i64, c))])
                for c in range(width)]
        accs = [zero] * n_vec
        for e in range(width):
            v = builder.load(ptrs[e])
            if single:
                v = builder.fpext(v, dbl)
            vec = builder.insert_element(ir.Constant(V4D, ir.Undefined), v, ir.Constant(i32, 0))
            vec = builder.shuffle_vector(vec, vec, splat_mask)
            for a in range(n_vec):
                if 4 * a + 3 >= e:  # a vector with some lane c >= e
                    accs[a] = builder.call(fma4, [vec, rows[e][a], accs[a]])
        for c in range(width):
            out = builder.extract_element(accs[c // 4], ir.Constant(i32, c % 4))
            if single:
                out = builder.fptrunc(out, ir.FloatType())
            builder.store(out, ptrs[c])
        q.add_incoming(builder.add(q, ir.Constant(i64, 1)), builder.block)
        builder.branch(head)
    builder.position_at_end(done)
    return context.get_dummy_value()


def _py_records(flat, n_cells, L, rpad):
    """Scalar twin of ``apply_records`` (JIT off): the same sums, e <= c only."""
    for q in range(n_cells):
        base = q * L
        v = [float(flat[base + e]) for e in range(L)]
        for c in range(L):
            acc = 0.0
            for e in range(c + 1):
                acc += v[e] * rpad[e, c]
            flat[base + c] = acc


if config.DISABLE_JIT:
    apply_records = _py_records
else:
    @intrinsic
    def apply_records(typingctx, flat, n_cells, L, rpad):
        """v @ R for each record of ``flat`` in place (module docstring). flat: 1-d C
        float64 or float32 (n_cells * L values); n_cells, L: int64, 1 <= L <=
        RECORD_LANES (other L: nothing is done); rpad: float64 (RECORD_LANES,
        RECORD_LANES) C, R in its upper left corner and zeros elsewhere."""
        if not (_c_array(flat, 1, FLOATS) and _c_array(rpad, 2, (types.float64,))):
            return None
        if not (n_cells == types.int64 and L == types.int64):
            return None
        return types.void(flat, n_cells, L, rpad), _records_codegen


def _row_sum_codegen(context, builder, signature, args):
    """IR of ``masked_row_sum`` (module docstring): row i of ``mat`` (inner stride one
    value) and of ``mask`` (C bool)."""
    mat_t, mask_t = signature.args[0], signature.args[1]
    mat, mask, i, shift, square = args
    i32, i64, i8 = ir.IntType(32), ir.IntType(64), ir.IntType(8)
    dbl = ir.DoubleType()
    amat = context.make_array(mat_t)(context, builder, mat)
    amask = context.make_array(mask_t)(context, builder, mask)
    m = builder.extract_value(amat.shape, 1)
    stride0 = builder.extract_value(amat.strides, 0)
    elt = ir.FloatType() if mat_t.dtype == types.float32 else dbl
    vec_elt = ir.VectorType(elt, 4)
    row = builder.bitcast(builder.gep(builder.bitcast(amat.data, i8.as_pointer()),
                                      [builder.mul(i, stride0)]), elt.as_pointer())
    mrow = builder.gep(builder.bitcast(amask.data, i8.as_pointer()), [builder.mul(i, m)])
    shift4 = builder.insert_element(ir.Constant(V4D, ir.Undefined), shift, ir.Constant(i32, 0))
    shift4 = builder.shuffle_vector(shift4, shift4, ir.Constant(ir.VectorType(i32, 4), [0] * 4))
    zero = ir.Constant(V4D, [0.0] * 4)
    # llvm.arithmetic.fence: the square is rounded on its own; without it the backend
    # fused it into the sum where the mask selects it (a masked fused multiply-add)
    fence4 = cgutils.get_or_insert_function(
        builder.module, ir.FunctionType(V4D, [V4D]), "llvm.arithmetic.fence.v4f64")
    fence1 = cgutils.get_or_insert_function(
        builder.module, ir.FunctionType(dbl, [dbl]), "llvm.arithmetic.fence.f64")
    full = builder.sub(m, builder.srem(m, ir.Constant(i64, 4)))
    sq = builder.icmp_unsigned("!=", square, ir.Constant(square.type, 0))
    head, j, (acc,) = ir_loop_head(builder, "rowsum", ir.Constant(i64, 0), [zero])
    body = builder.append_basic_block("rowsum.body")
    after = builder.append_basic_block("rowsum.after")
    builder.cbranch(builder.icmp_signed("<", j, full), body, after)
    builder.position_at_end(body)
    x = builder.load(builder.bitcast(builder.gep(row, [j]), vec_elt.as_pointer()), align=4)
    if elt != dbl:
        x = builder.fpext(x, V4D)
    d = builder.fsub(x, shift4)
    d = builder.select(sq, builder.call(fence4, [builder.fmul(d, d)]), d)
    keep = builder.load(builder.bitcast(builder.gep(mrow, [j]), ir.VectorType(i8, 4).as_pointer()),
                        align=1)
    keep = builder.icmp_unsigned("!=", keep, ir.Constant(ir.VectorType(i8, 4), [0] * 4))
    new = builder.fadd(acc, builder.select(keep, d, zero))
    j.add_incoming(builder.add(j, ir.Constant(i64, 4)), builder.block)
    acc.add_incoming(new, builder.block)
    builder.branch(head)
    # the last m mod 4 cells into chain 0, in increasing j
    builder.position_at_end(after)
    lane0 = builder.extract_element(acc, ir.Constant(i32, 0))
    tail_head, u, (s0,) = ir_loop_head(builder, "rowsum.tail", j, [lane0])
    tail_body = builder.append_basic_block("rowsum.tailbody")
    done = builder.append_basic_block("rowsum.done")
    builder.cbranch(builder.icmp_signed("<", u, m), tail_body, done)
    builder.position_at_end(tail_body)
    x1 = builder.load(builder.gep(row, [u]))
    if elt != dbl:
        x1 = builder.fpext(x1, dbl)
    x1 = builder.fsub(x1, shift)
    x1 = builder.select(sq, builder.call(fence1, [builder.fmul(x1, x1)]), x1)
    k1 = builder.icmp_unsigned("!=", builder.load(builder.gep(mrow, [u])), ir.Constant(i8, 0))
    s0.add_incoming(builder.fadd(s0, builder.select(k1, x1, ir.Constant(dbl, 0.0))),
                    builder.block)
    u.add_incoming(builder.add(u, ir.Constant(i64, 1)), builder.block)
    builder.branch(tail_head)
    builder.position_at_end(done)
    lanes = [s0] + [builder.extract_element(acc, ir.Constant(i32, c)) for c in (1, 2, 3)]
    return builder.fadd(builder.fadd(lanes[0], lanes[1]), builder.fadd(lanes[2], lanes[3]))


def _py_row_sum(mat, mask, i, shift, square):
    """Scalar twin of ``masked_row_sum`` (JIT off)."""
    m = mat.shape[1]
    s = [0.0] * 4
    full = m - m % 4
    for j in range(m):
        d = float(mat[i, j]) - shift
        if square:
            d *= d
        s[j % 4 if j < full else 0] += d if mask[i, j] else 0.0
    return (s[0] + s[1]) + (s[2] + s[3])


if config.DISABLE_JIT:
    masked_row_sum = _py_row_sum
else:
    @intrinsic
    def masked_row_sum(typingctx, mat, mask, i, shift, square):
        """Row i's masked sum of (x - shift) or its square (module docstring). mat: 2-d
        float64 or float32 (values widened to float64), rows of contiguous values (the
        caller checks its inner stride); mask: 2-d C bool of the same shape; i: int64;
        shift: float64; square: bool."""
        if not (isinstance(mat, types.Array) and mat.ndim == 2
                and mat.dtype in (types.float64, types.float32)):
            return None
        if not _c_array(mask, 2, (types.boolean,)):
            return None
        if not (i == types.int64 and shift == types.float64 and square == types.boolean):
            return None
        return types.float64(mat, mask, i, shift, square), _row_sum_codegen


def _records_rows_codegen(context, builder, signature, args):
    """IR of ``records_to_rows`` (module docstring): a switch over L = 1 .. RECORD_LANES,
    each case four records a step (then one at a time)."""
    flat_t, bt_t = signature.args[0], signature.args[4]
    flat, start, L, nb, bt, row0 = args
    i32, i64 = ir.IntType(32), ir.IntType(64)
    dbl = ir.DoubleType()
    data = context.make_array(flat_t)(context, builder, flat).data
    abt = context.make_array(bt_t)(context, builder, bt)
    width = builder.extract_value(abt.shape, 1)
    single = flat_t.dtype == types.float32
    src = builder.gep(data, [start])
    done, cases = _width_cases(builder, L, "rows")
    for lanes, case in cases:
        builder.position_at_end(case)
        dst = [builder.gep(abt.data, [builder.mul(builder.add(row0, ir.Constant(i64, c)), width)])
               for c in range(lanes)]
        full = builder.sub(nb, builder.srem(nb, ir.Constant(i64, 4)))

        def value(w, c):
            v = builder.load(builder.gep(src, [builder.add(builder.mul(
                w, ir.Constant(i64, lanes)), ir.Constant(i64, c))]))
            return builder.fpext(v, dbl) if single else v

        head, w, _ = ir_loop_head(builder, f"rows.{lanes}.four", ir.Constant(i64, 0), [])
        body = builder.append_basic_block(f"rows.{lanes}.body")
        rest = builder.append_basic_block(f"rows.{lanes}.rest")
        builder.cbranch(builder.icmp_signed("<", w, full), body, rest)
        builder.position_at_end(body)
        for c in range(lanes):
            vec = ir.Constant(V4D, ir.Undefined)
            for t in range(4):
                vec = builder.insert_element(
                    vec, value(builder.add(w, ir.Constant(i64, t)), c), ir.Constant(i32, t))
            builder.store(vec, builder.bitcast(builder.gep(dst[c], [w]), V4D.as_pointer()),
                          align=8)
        w.add_incoming(builder.add(w, ir.Constant(i64, 4)), builder.block)
        builder.branch(head)
        builder.position_at_end(rest)
        head1, u, _ = ir_loop_head(builder, f"rows.{lanes}.one", w, [])
        body1 = builder.append_basic_block(f"rows.{lanes}.onebody")
        builder.cbranch(builder.icmp_signed("<", u, nb), body1, done)
        builder.position_at_end(body1)
        for c in range(lanes):
            builder.store(value(u, c), builder.gep(dst[c], [u]))
        u.add_incoming(builder.add(u, ir.Constant(i64, 1)), builder.block)
        builder.branch(head1)
    builder.position_at_end(done)
    return context.get_dummy_value()


def _py_records_rows(flat, start, L, nb, bt, row0):
    """Twin of ``records_to_rows`` (JIT off)."""
    for c in range(L):
        for w in range(nb):
            bt[row0 + c, w] = flat[start + w * L + c]


if config.DISABLE_JIT:
    records_to_rows = _py_records_rows
else:
    @intrinsic
    def records_to_rows(typingctx, flat, start, L, nb, bt, row0):
        """Records of ``flat`` (1-d C float64 or float32) into rows of ``bt`` (2-d C
        float64), module docstring; start, L (1 .. RECORD_LANES; other L: nothing is
        done), nb, row0: int64."""
        if not (_c_array(flat, 1, FLOATS) and _c_array(bt, 2, (types.float64,))):
            return None
        if not all(x == types.int64 for x in (start, L, nb, row0)):
            return None
        return types.void(flat, start, L, nb, bt, row0), _records_rows_codegen

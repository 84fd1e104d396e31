"""Relabel-and-accumulate kernels: dot products of relabelled layers with fixed layers.

No relabelled matrix is ever built: the value of a relabelled layer at dyad (i, j) is read
from the stored layer at (row_perm[i], col_perm[j]).

How ``gather_cross`` reaches the memory floor (one read of the relabelled layers per
permutation):

- Row-wise gathers. For permutation b and row i, every relabelled value of the row comes
  from one stored row, ``rel[row_perms[b, i]]``, at the columns ``col_perms[b, j]``. That
  row is small enough for the first-level caches, so the random column reads hit cache
  once the row is there.
- Prefetch of rows ahead. While row i of permutation b is gathered, the stored row that
  the step ``ahead`` steps later will read (steps run over the block's permutations, then
  rows; as many steps as ``PREFETCH_BYTES`` of stored rows allow, at most ``AHEAD``) is
  requested line by line (a software prefetch, spread over the gather so it streams at
  memory bandwidth instead of waiting on one miss at a time).
- Blocks of permutations. ``block`` permutations go through row i one after the other,
  so the fixed row i (all its fixed layers) is loaded from memory once per block, not
  once per permutation.
- Register accumulators. Products are summed in local scalars, never by
  ``out[b, a, c] +=`` per dyad: with one relabelled layer (scheme y, correlation) up to
  4 consecutive fixed layers per pass (a vector pass, below; any other fixed layer in a
  scalar pass of its own, ``_dot1``) with four interleaved partial sums each; with several
  (dsp, freedman-lane) fused tiles of 3 relabelled x 4 fixed (or 4 x 3) layers, twelve
  pairs per pass over the row, each in two partial sums (even and odd columns), the three
  or four gathered values sharing one index load.
- Vector one-layer passes. When a pass's fixed layers (2 to 4) are consecutive in their
  records (scheme y's stack of predictors is), ``dot_vec`` reads each fixed record with
  one 4-wide load and adds the gathered value times it into one of four 4-lane vectors
  (the four chains), one vector fused multiply-add per dyad instead of up to four scalar
  ones and their loads: the same bits as ``_dot1`` on each layer (scheme y at n = 2,000,
  two threads: 1.94 -> 1.4-1.5 ms per relabelling). The scalar passes of 2 to 4 layers
  it replaced are gone: a layer outside a consecutive group runs in ``_dot1``. When one
  such group is all the pass does (scheme y with up to 4 predictors), two relabellings of
  a block go through a row together (``dot_vec2``): each fixed record is loaded once for
  both, and each relabelling keeps its own four chains in the same order (timed in turn
  with one relabelling a pass: 1.61-1.81 against 1.67-2.01 ms at n = 2,000).
- Vector tiles. When a tile's layers are consecutive in their records (the dsp and
  freedman-lane stacks of 3 predictors are), ``tile_vec`` keeps the twelve pairs' even and
  odd sums in six 4-lane vectors, reads each record with one 4-wide load and does three
  vector fused multiply-adds per dyad instead of twelve scalar ones (numba has no vector
  types, so that loop is written in LLVM IR). Each lane still sums one pair's even (or
  odd) columns in increasing order with one fused multiply-add per term: the same bits as
  the scalar tiles. Two chains per lane halve the time spent waiting on the adder's
  latency (one chain per lane ran at one dyad per fused multiply-add latency). Each
  column also prefetches the relabelled record GATHER_AHEAD columns on into the
  first-level cache: a wide stored row sits in the second level, and its random reads
  waited on that level's latency (dsp, n = 10,000 float32: 108 -> 92 ms a relabelling).

Summation order (what makes results bit-identical for any chunk size, number of jobs or
block size): for each permutation b and pair (a, c), the products of row i are summed in
partial sums over the columns by their offset from ``col_start[i]``, each in increasing
column order, one fused multiply-add per product: tiles in two (even and odd offsets),
the row's sum being (even + odd); single-layer passes in four (offsets 0, 1, 2, 3 mod 4),
the row's sum being (s0 + s1) + (s2 + s3). The row sums are added in increasing row
order. Which of the two runs depends on (R, Q) alone (``choose_tile``). Nothing in this order depends on
which other permutations share a block, so a permutation gives the same bits alone or
in any batch. ``fastmath`` leaves out ``reassoc`` (kernels/options.py), so the compiler
keeps this order.
"""

import numpy as np
from llvmlite import ir
from numba import config, njit, types
from numba.core import cgutils
from numba.extending import intrinsic

from .options import KERNEL_OPTIONS
from .vector import (RECORD_LANES, apply_records, dot_chains, dot_chains2, dot_chains4,
                     ir_loop_head, records_to_rows)

# Cap of the automatic block, and the bytes of column offsets (int32, one row per
# permutation of the block) it may keep in cache. Prefetching runs a few steps of (row,
# permutation) ahead, so only a few stored rows are in flight whatever the block; the
# block's own working set is its column offsets. Measured on the 2-core EPYC (dsp tile,
# ms per permutation): n = 10,000 float32 block 1/4/6 141/124/124; n = 5000 float32
# 3/6/12 34.4/32.9/30.9; n = 2000 float64 4/8/16 10.3/13.5/9.8. (Before prefetching by
# steps, blocks of wide rows thrashed L2: rows of 156 KB took 132/140/202/361/492 ms at
# block 1/2/4/8/16.)
MAX_BLOCK = 16
BLOCK_BYTES = 256 * 1024
# Fixed layers summed together per vector pass over a row (``dot_vec``: the four lanes of
# each chain's vector).
FIX_GROUP = 4
# Bytes of one cache line, the unit of prefetching (64 on current x86-64 and ARM cores).
CACHE_LINE = 64
# Locality of the prefetch hint: 2 (x86 prefetcht1) fills L2 but not L1, so the stream of
# rows ahead does not evict the lines of the row being gathered. Measured against 3 (all
# levels) on the 2-core EPYC, ms per permutation: dsp n = 10,000 float64 231-242 vs
# 302-316, float32 109 vs 111; dsp n = 5000 float64 46 vs 65; n = 2000 dsp 7.1 vs 9.1,
# y 2.65 vs 2.83. On a 2-core Intel Xeon (2 MB L2 a core), later: dsp n = 10,000 float32
# 109 vs 115 ms with 3, but float64 230 vs 225 and n = 2,000 float64 6.35 vs 5.58.
PREFETCH_LOCALITY = 2
# Steps ahead whose stored rows are prefetched while a row is gathered: as many as fit in
# PREFETCH_BYTES of stored rows, 1 to AHEAD. The rows in flight share the second-level
# cache (1 MiB a core on the benchmark machine) with the row being gathered, the fixed row
# and the block's column offsets; past it they are evicted before use and the gathers
# wait on the third level. Measured on the 2-core EPYC, dsp tile, two threads, ms per
# relabelling (median of 6-8 rounds timed in turn): n = 2,000 float64 (rows of 64 KB) 3
# steps better than 1 or 2; n = 10,000 float32 (160 KB) 3 / 2 / 1 steps 182 / 112 / 118;
# n = 5,000 float64 (160 KB) 44 / 43 / 45; n = 10,000 float64 (320 KB) 390 / 327 / 207.
# On a 2-core Intel Xeon with 2 MB L2 a core, 768 KB (so 4 steps at n = 10,000 float32)
# was no better: 118-120 vs 115 ms.
AHEAD = 3
PREFETCH_BYTES = 384 * 1024
# The vector tiles also ask for the record of the column GATHER_AHEAD columns on, into the
# first-level cache (a rows-ahead prefetch only brings the stored row to the second
# level, and random reads from there wait on its latency). Measured on the 2-core EPYC,
# dsp tile, two threads, ms per relabelling (median of 6-8 rounds timed in turn):
# n = 10,000 float32 none / 32 / 64 / 128 columns ahead 121 / 103 / 98 / 97; n = 5,000
# float32 none / 64: 25.4 / 22.8; n = 2,000 float64 7.4 / 6.4. Not in the one-layer
# passes (scheme y): one product a dyad leaves no room for the extra offset load and hint
# (n = 2,000 float64 2.2 -> 3.0 ms, n = 10,000 float32 53 -> 68 ms with it).
GATHER_AHEAD = 64
GATHER_LOCALITY = 3


def _ir_prefetch(builder, ptr, at, locality):
    """Emit LLVM's ``llvm.prefetch`` (read, data) of ptr[at] at the given locality."""
    i8p = ir.IntType(8).as_pointer()
    i32 = ir.IntType(32)
    fnty = ir.FunctionType(ir.VoidType(), [i8p, i32, i32, i32])
    fn = cgutils.get_or_insert_function(builder.module, fnty, "llvm.prefetch.p0")
    builder.call(fn, [builder.bitcast(builder.gep(ptr, [at]), i8p), i32(0), i32(locality),
                      i32(1)])


if config.DISABLE_JIT:
    def prefetch(arr, idx):
        """No-op twin of the prefetch hint (the kernels run as Python code)."""
        return None
else:
    @intrinsic
    def prefetch(typingctx, arr, idx):
        """Hint: load the cache line holding ``arr[idx]`` (1-D array, idx unsigned).

        Emits LLVM's ``llvm.prefetch`` (read, locality ``PREFETCH_LOCALITY``). A hint
        only: it changes no value and cannot fault, even for an address past the array.
        """
        if not isinstance(arr, types.Array) or arr.ndim != 1:
            return None
        sig = types.void(arr, idx)

        def codegen(context, builder, signature, args):
            aryty = signature.args[0]
            ary = context.make_array(aryty)(context, builder, args[0])
            _ir_prefetch(builder, ary.data, args[1], PREFETCH_LOCALITY)
            return context.get_dummy_value()
        return sig, codegen


# The vector type of the LLVM IR loops (``tile_vec``, ``dot_vec``): four doubles.
V4D = ir.VectorType(ir.DoubleType(), 4)

# Columns per call of the vector tile (the prefetches of the next stored row are issued
# between calls). Long enough that loading and storing the accumulators is cheap.
VEC_COLUMNS = 64


def _tile_vec_python(swap, relf, rb, co, fixf, fb, lf, r0, f0, j0, j1, js, jl, acc):
    """Pure-Python twin of ``tile_vec`` (used when numba's JIT is off; no prefetch)."""
    for j in range(j0, j1):
        g = rb + co[j]
        o = fb + (j - js) * lf
        half = 12 * ((j - js) & 1)  # even offsets from js: acc[:12]; odd: acc[12:]
        u = [float(relf[g + r0 + t]) for t in range(4)]
        v = [float(fixf[o + f0 + t]) for t in range(4)]
        for a in range(3):
            for c in range(4):
                if swap:  # lanes: relabelled layers; sums s_ca, c < 3
                    acc[half + a * 4 + c] += v[a] * u[c]
                else:  # lanes: fixed layers; sums s_ac, a < 3
                    acc[half + a * 4 + c] += u[a] * v[c]


def _ir_data(context, builder, signature, args, at):
    """Data pointer of the array argument at position ``at`` of an intrinsic's call."""
    return context.make_array(signature.args[at])(context, builder, args[at]).data


def _ir_read_acc(builder, acc_p, count):
    """``count`` <4 x double> vectors read from acc[0 : 4 count] (float64 pointer)."""
    i32, i64 = ir.IntType(32), ir.IntType(64)
    vecs = []
    for a in range(count):
        vec = ir.Constant(ir.VectorType(ir.DoubleType(), 4), ir.Undefined)
        for c in range(4):
            x = builder.load(builder.gep(acc_p, [ir.Constant(i64, a * 4 + c)]))
            vec = builder.insert_element(vec, x, ir.Constant(i32, c))
        vecs.append(vec)
    return vecs


def _ir_write_acc(builder, acc_p, vecs):
    """Write the <4 x double> vectors ``vecs`` back to acc[0 : 4 len(vecs)]."""
    i32, i64 = ir.IntType(32), ir.IntType(64)
    for a, vec in enumerate(vecs):
        for c in range(4):
            x = builder.extract_element(vec, ir.Constant(i32, c))
            builder.store(x, builder.gep(acc_p, [ir.Constant(i64, a * 4 + c)]))


def _ir_load4(builder, ptr, at):
    """ptr[at : at + 4] as <4 x double>: one 4-wide load, widened from float32."""
    dbl = ir.DoubleType()
    elt = ptr.type.pointee
    raw = builder.load(builder.bitcast(builder.gep(ptr, [at]),
                                       ir.VectorType(elt, 4).as_pointer()), align=4)
    return builder.fpext(raw, ir.VectorType(dbl, 4)) if elt != dbl else raw


def _tile_vec_codegen(swap):
    """LLVM IR of a 3 x 4 tile loop with six <4 x double> accumulators.

    For j in [j0, j1): u = rel[rb + co[j] + r0 : +4] and v = fix[fb + (j - js) lf + f0 : +4]
    (one 4-wide load each, widened to double), then for a = 0, 1, 2:
    acc_a = fma(splat(u[a]), v, acc_a) -- or, with ``swap``, fma(splat(v[a]), u, acc_a) --
    into the even set of accumulators for even j - js and the odd set for odd j - js (j0 -
    js must be even). Each lane is one (relabelled, fixed) pair's partial sum, in
    increasing j, with one fused multiply-add per term: the same operations, in the same
    order, as the scalar tiles, so the results are the same bits. Each column also
    prefetches into the first-level cache the relabelled record of column min(j +
    GATHER_AHEAD, jl - 1) (jl: the end of the row's columns, so ``co`` is never read past
    them); a hint, no value changes. Two sets of sums make two independent chains of
    fused multiply-adds per lane, so the loop waits on the adder's latency half as often.
    acc (24,) float64 (even set, then odd set) is read on entry and written back.
    """
    def codegen(context, builder, signature, args):
        (relf, rb, co, fixf, fb, lf, r0, f0, j0, j1, js, jl, acc) = args
        rel_p, co_p, fix_p, acc_p = (_ir_data(context, builder, signature, args, at)
                                     for at in (0, 2, 3, 12))
        i32, i64 = ir.IntType(32), ir.IntType(64)
        fma = cgutils.get_or_insert_function(
            builder.module, ir.FunctionType(V4D, [V4D, V4D, V4D]), "llvm.fma.v4f64")
        start = _ir_read_acc(builder, acc_p, 6)  # 0..2: even set, 3..5: odd set
        jl = context.cast(builder, jl, signature.args[11], types.int64)
        final = builder.sub(jl, ir.Constant(i64, 1))  # the row's last column

        def column(jj, sums):
            """The three fused multiply-adds of column jj into ``sums``."""
            on = builder.add(jj, ir.Constant(i64, GATHER_AHEAD))
            on = builder.select(builder.icmp_signed("<", on, jl), on, final)
            ahead = builder.add(rb, builder.sext(builder.load(builder.gep(co_p, [on])), i64))
            _ir_prefetch(builder, rel_p, builder.add(ahead, r0), GATHER_LOCALITY)
            g = builder.add(rb, builder.sext(builder.load(builder.gep(co_p, [jj])), i64))
            o = builder.add(fb, builder.mul(builder.sub(jj, js), lf))
            u = _ir_load4(builder, rel_p, builder.add(g, r0))
            v = _ir_load4(builder, fix_p, builder.add(o, f0))
            lanes, split = (u, v) if swap else (v, u)
            new = []
            for a in range(3):
                s = builder.shuffle_vector(split, split,
                                           ir.Constant(ir.VectorType(i32, 4), [a] * 4))
                new.append(builder.call(fma, [s, lanes, sums[a]]))  # s_a. += split_a * lanes
            return new

        head, j, sums = ir_loop_head(builder, "tile", j0, start)
        body = builder.append_basic_block("tile.body")
        last = builder.append_basic_block("tile.last")
        one = builder.append_basic_block("tile.one")
        done = builder.append_basic_block("tile.done")
        one_i = ir.Constant(i64, 1)
        builder.cbranch(builder.icmp_signed("<", builder.add(j, one_i), j1), body, last)
        builder.position_at_end(body)  # columns j (even set) and j + 1 (odd set)
        new = column(j, sums[:3]) + column(builder.add(j, one_i), sums[3:])
        step = builder.block
        j.add_incoming(builder.add(j, ir.Constant(i64, 2)), step)
        for a in range(6):
            sums[a].add_incoming(new[a], step)
        builder.branch(head)
        builder.position_at_end(last)  # at most one column left, at an even offset
        builder.cbranch(builder.icmp_signed("<", j, j1), one, done)
        builder.position_at_end(one)
        tail = column(j, sums[:3])
        builder.branch(done)
        builder.position_at_end(done)
        ends = []
        for a in range(3):  # the odd set leaves the loop as it is
            ph = builder.phi(V4D)
            ph.add_incoming(sums[a], last)
            ph.add_incoming(tail[a], one)
            ends.append(ph)
        _ir_write_acc(builder, acc_p, ends + sums[3:])
        return context.get_dummy_value()
    return codegen


if config.DISABLE_JIT:
    def tile_vec(swap, relf, rb, co, fixf, fb, lf, r0, f0, j0, j1, js, jl, acc):
        """Pure-Python twin of the vector tile (the kernels run as Python code)."""
        _tile_vec_python(swap, relf, rb, co, fixf, fb, lf, r0, f0, j0, j1, js, jl, acc)
else:
    @intrinsic
    def tile_vec(typingctx, swap, relf, rb, co, fixf, fb, lf, r0, f0, j0, j1, js, jl, acc):
        """3 x 4 tile of sums over columns [j0, j1) in vector registers (see
        ``_tile_vec_codegen``); ``swap`` must be a literal bool: False puts the fixed
        layers in the lanes (tile 3 x 4), True the relabelled layers (tile 4 x 3)."""
        if not isinstance(swap, types.BooleanLiteral):
            return None
        if not all(isinstance(x, types.Array) and x.ndim == 1 and x.layout == "C"
                   for x in (relf, co, fixf, acc)):
            return None
        sig = types.void(swap, relf, rb, co, fixf, fb, lf, r0, f0, j0, j1, js, jl, acc)
        inner = _tile_vec_codegen(swap.literal_value)

        def codegen(context, builder, signature, args):
            sub = types.void(*signature.args[1:])
            return inner(context, builder, sub, args[1:])
        return sig, codegen


def _dot_vec_python(relf, rb, co, fixf, fb, lf, f0, j0, j1, js, acc):
    """Pure-Python twin of ``dot_vec`` (used when numba's JIT is off)."""
    for j in range(j0, j1):
        u = float(relf[rb + co[j]])
        o = fb + (j - js) * lf + f0
        chain = 4 * ((j - js) & 3)
        for c in range(4):
            acc[chain + c] += u * float(fixf[o + c])


def _dot_vec_codegen(streams):
    """LLVM IR of a one-layer pass with four <4 x double> accumulators per relabelling.

    For j in [j0, j1): u = rel[rb + co[j]] (widened to double) and v = fix[fb + (j - js) lf
    + f0 : +4] (one 4-wide load, widened), then acc_(j - js) mod 4 = fma(splat(u), v,
    acc_(j - js) mod 4). j0 - js must be a multiple of 4, so columns at offsets 0, 1, 2, 3
    (mod 4) go to chains 0, 1, 2, 3 as in ``_dot1``: lane c of chain t is the
    scalar sum of fixed layer f0 + c over those columns, in increasing j, one fused
    multiply-add per term -- the same bits. Lanes past the pass's layers read whatever
    follows in the record and are dropped by the caller; the caller keeps every 4-wide
    read inside ``fixf``. acc (16,) float64 (chain 0's four lanes, then chain 1's, ...) is
    read on entry and written back.

    ``streams`` = 2: two relabellings (rb, co) and (rb2, co2) share each fixed record's
    load; acc (32,) holds the first's chains, then the second's, each summed as above.
    """
    def codegen(context, builder, signature, args):
        if streams == 1:
            (relf, rb, co, fixf, fb, lf, f0, j0, j1, js, acc) = args
            rbs, co_at, fix_at, acc_at = [rb], [2], 3, 10
        else:
            (relf, rb, co, rb2, co2, fixf, fb, lf, f0, j0, j1, js, acc) = args
            rbs, co_at, fix_at, acc_at = [rb, rb2], [2, 4], 5, 12
        rel_p, fix_p, acc_p = (_ir_data(context, builder, signature, args, at)
                               for at in (0, fix_at, acc_at))
        co_ps = [_ir_data(context, builder, signature, args, at) for at in co_at]
        i32, i64, dbl = ir.IntType(32), ir.IntType(64), ir.DoubleType()
        fma = cgutils.get_or_insert_function(
            builder.module, ir.FunctionType(V4D, [V4D, V4D, V4D]), "llvm.fma.v4f64")
        zeros = ir.Constant(ir.VectorType(i32, 4), [0] * 4)
        start = _ir_read_acc(builder, acc_p, 4 * streams)  # stream s, chain t: 4 s + t

        def column(jj, accs):
            """The fused multiply-adds of column jj into one chain of each stream."""
            o = builder.add(builder.add(fb, builder.mul(builder.sub(jj, js), lf)), f0)
            v = _ir_load4(builder, fix_p, o)
            new = []
            for rb_s, co_p, acc_t in zip(rbs, co_ps, accs):
                g = builder.add(rb_s, builder.sext(builder.load(builder.gep(co_p, [jj])), i64))
                u = builder.load(builder.gep(rel_p, [g]))
                if u.type != dbl:
                    u = builder.fpext(u, dbl)
                sp = builder.insert_element(ir.Constant(V4D, ir.Undefined), u,
                                            ir.Constant(i32, 0))
                sp = builder.shuffle_vector(sp, sp, zeros)
                new.append(builder.call(fma, [sp, v, acc_t]))  # acc_t += u * v, by lane
            return new

        def chain(vecs, t):
            return [vecs[4 * s + t] for s in range(streams)]

        head, j, sums = ir_loop_head(builder, "dot", j0, start)
        body = builder.append_basic_block("dot.body")
        tail = builder.append_basic_block("dot.tail")
        done = builder.append_basic_block("dot.done")
        builder.cbranch(builder.icmp_signed("<", builder.add(j, ir.Constant(i64, 3)), j1),
                        body, tail)
        builder.position_at_end(body)  # columns j .. j + 3, one per chain
        new = list(sums)
        for t in range(4):
            for s, vec in enumerate(column(builder.add(j, ir.Constant(i64, t)),
                                           chain(sums, t))):
                new[4 * s + t] = vec
        step = builder.block
        j.add_incoming(builder.add(j, ir.Constant(i64, 4)), step)
        for x, vec in enumerate(new):
            sums[x].add_incoming(vec, step)
        builder.branch(head)
        # at most three columns left, at offsets 0, 1, 2 (mod 4): chains 0, 1, 2 in turn
        builder.position_at_end(tail)
        ends = list(sums)
        for t in range(3):
            here = builder.block
            go = builder.append_basic_block(f"dot.tail{t}")
            after = builder.append_basic_block(f"dot.after{t}")
            jj = builder.add(j, ir.Constant(i64, t))
            builder.cbranch(builder.icmp_signed("<", jj, j1), go, after)
            builder.position_at_end(go)
            got = column(jj, chain(ends, t))
            go_end = builder.block
            builder.branch(after)
            builder.position_at_end(after)
            for s in range(streams):
                ph = builder.phi(V4D)
                ph.add_incoming(ends[4 * s + t], here)
                ph.add_incoming(got[s], go_end)
                ends[4 * s + t] = ph
        builder.branch(done)
        builder.position_at_end(done)
        _ir_write_acc(builder, acc_p, ends)
        return context.get_dummy_value()
    return codegen


if config.DISABLE_JIT:
    def dot_vec(relf, rb, co, fixf, fb, lf, f0, j0, j1, js, acc):
        """Pure-Python twin of the vector one-layer pass."""
        _dot_vec_python(relf, rb, co, fixf, fb, lf, f0, j0, j1, js, acc)

    def dot_vec2(relf, rb, co, rb2, co2, fixf, fb, lf, f0, j0, j1, js, acc):
        """Pure-Python twin of the vector one-layer pass of two relabellings."""
        _dot_vec_python(relf, rb, co, fixf, fb, lf, f0, j0, j1, js, acc[:16])
        _dot_vec_python(relf, rb2, co2, fixf, fb, lf, f0, j0, j1, js, acc[16:])
else:
    def _c_arrays(*arrays):
        return all(isinstance(x, types.Array) and x.ndim == 1 and x.layout == "C"
                   for x in arrays)

    @intrinsic
    def dot_vec(typingctx, relf, rb, co, fixf, fb, lf, f0, j0, j1, js, acc):
        """One relabelled layer against up to 4 consecutive fixed layers over columns
        [j0, j1), in vector registers (see ``_dot_vec_codegen``)."""
        if not _c_arrays(relf, co, fixf, acc):
            return None
        return (types.void(relf, rb, co, fixf, fb, lf, f0, j0, j1, js, acc),
                _dot_vec_codegen(1))

    @intrinsic
    def dot_vec2(typingctx, relf, rb, co, rb2, co2, fixf, fb, lf, f0, j0, j1, js, acc):
        """``dot_vec`` of two relabellings at once, one load of each fixed record."""
        if not _c_arrays(relf, co, co2, fixf, acc):
            return None
        return (types.void(relf, rb, co, rb2, co2, fixf, fb, lf, f0, j0, j1, js, acc),
                _dot_vec_codegen(2))


# --- fused gather + dot of one row against one fixed layer ------------------------------
# ``_dot1`` sums, over the columns j in [js, je) of one row,
#     s = sum_j rel[rb + co[j]] * fix[fb + (j - js) * lf + f0]
# in four partial sums over the columns at offsets 0, 1, 2, 3 (mod 4) from js, each in
# increasing column order, combined as (s0 + s1) + (s2 + s3), and meanwhile issues
# ``pf_n`` prefetches per 8 columns of the line offsets pf, pf + line, ... below pf_end.
# It returns the sum and the next prefetch offset. (Four chains of fused multiply-adds
# per sum instead of two: 2.34 -> 1.94 ms per relabelling for scheme y at n = 2,000.)

@njit(inline="always", **KERNEL_OPTIONS)
def _prefetch_rest(relf, pf, pf_end, line):
    """The prefetches of a stored row a pass did not issue (its row was shorter)."""
    while pf < pf_end:
        prefetch(relf, np.uint64(pf))
        pf += line


@njit(inline="always", **KERNEL_OPTIONS)
def _prefetch_some(relf, pf, pf_end, pf_n, line):
    for _ in range(pf_n):
        if pf < pf_end:
            prefetch(relf, np.uint64(pf))
            pf += line
    return pf


@njit(inline="always", **KERNEL_OPTIONS)
def _dot1(relf, rb, co, fixf, fb, lf, f0, js, je, pf, pf_end, pf_n, line):
    a0 = 0.0
    b0 = 0.0
    c0 = 0.0
    d0 = 0.0
    o = fb
    j = js
    while j + 3 < je:
        if (j - js) & 7 == 0:
            pf = _prefetch_some(relf, pf, pf_end, pf_n, line)
        u = np.float64(relf[np.uint64(rb + co[np.uint64(j)])])
        v = np.float64(relf[np.uint64(rb + co[np.uint64(j + 1)])])
        w = np.float64(relf[np.uint64(rb + co[np.uint64(j + 2)])])
        x = np.float64(relf[np.uint64(rb + co[np.uint64(j + 3)])])
        # a_c += rel_pi[i, j] * fix[i, j, c]; b_c, c_c, d_c likewise at j + 1, 2, 3
        a0 += u * np.float64(fixf[np.uint64(o + f0)])
        o += lf
        b0 += v * np.float64(fixf[np.uint64(o + f0)])
        o += lf
        c0 += w * np.float64(fixf[np.uint64(o + f0)])
        o += lf
        d0 += x * np.float64(fixf[np.uint64(o + f0)])
        o += lf
        j += 4
    # the last columns, at offsets 0, 1, 2 (mod 4) from the last full step, each in its
    # own block: a product shared by the three sums' branches would be rounded before
    # it is added; here each is one fused multiply-add, as in the loop above. (Only the
    # first can fall on a multiple of 8 from js, where prefetches are issued.)
    if j < je:
        if (j - js) & 7 == 0:
            pf = _prefetch_some(relf, pf, pf_end, pf_n, line)
        u = np.float64(relf[np.uint64(rb + co[np.uint64(j)])])
        a0 += u * np.float64(fixf[np.uint64(o + f0)])
        o += lf
        j += 1
    if j < je:
        u = np.float64(relf[np.uint64(rb + co[np.uint64(j)])])
        b0 += u * np.float64(fixf[np.uint64(o + f0)])
        o += lf
        j += 1
    if j < je:
        u = np.float64(relf[np.uint64(rb + co[np.uint64(j)])])
        c0 += u * np.float64(fixf[np.uint64(o + f0)])
        o += lf
        j += 1
    return (a0 + b0) + (c0 + d0), pf


# --- fused gather + dot of several relabelled layers against several fixed layers --------
# For R > 1 (dsp, freedman-lane) one pass over the row reads 3 (or 4) relabelled layers at
# each gathered dyad and multiplies them by 4 (or 3) fixed layers: 12 sums, one per
# (relabelled, fixed) pair, each split in two partial sums over the columns at even and
# at odd offsets from the row's first column, each in increasing column order; the row's
# sum is (even + odd). The scalar tiles run the even columns, then the odd ones (argument
# ``first`` = js or js + 1), twelve sums at a time; the vector tile keeps both sets.

@njit(inline="always", **KERNEL_OPTIONS)
def _tile34(relf, rb, r0, r1, r2, co, fixf, fb, lf, f0, f1, f2, f3, js, first, je, pf,
            pf_end, pf_n, line):
    s00 = 0.0
    s01 = 0.0
    s02 = 0.0
    s03 = 0.0
    s10 = 0.0
    s11 = 0.0
    s12 = 0.0
    s13 = 0.0
    s20 = 0.0
    s21 = 0.0
    s22 = 0.0
    s23 = 0.0
    o = fb + (first - js) * lf
    for j in range(first, je, 2):
        if (j - js) & 7 == 0:
            pf = _prefetch_some(relf, pf, pf_end, pf_n, line)
        g = rb + co[np.uint64(j)]
        u0 = np.float64(relf[np.uint64(g + r0)])
        u1 = np.float64(relf[np.uint64(g + r1)])
        u2 = np.float64(relf[np.uint64(g + r2)])
        # s_ac += rel_pi[i, j, a] * fix[i, j, c]; one fixed value live at a time, so the
        # 12 sums, 3 gathered values and 1 fixed value fit the 16 vector registers
        v = np.float64(fixf[np.uint64(o + f0)])
        s00 += u0 * v
        s10 += u1 * v
        s20 += u2 * v
        v = np.float64(fixf[np.uint64(o + f1)])
        s01 += u0 * v
        s11 += u1 * v
        s21 += u2 * v
        v = np.float64(fixf[np.uint64(o + f2)])
        s02 += u0 * v
        s12 += u1 * v
        s22 += u2 * v
        v = np.float64(fixf[np.uint64(o + f3)])
        s03 += u0 * v
        s13 += u1 * v
        s23 += u2 * v
        o += 2 * lf
    return s00, s01, s02, s03, s10, s11, s12, s13, s20, s21, s22, s23, pf


@njit(inline="always", **KERNEL_OPTIONS)
def _tile43(relf, rb, r0, r1, r2, r3, co, fixf, fb, lf, f0, f1, f2, js, first, je, pf,
            pf_end, pf_n, line):
    s00 = 0.0
    s01 = 0.0
    s02 = 0.0
    s10 = 0.0
    s11 = 0.0
    s12 = 0.0
    s20 = 0.0
    s21 = 0.0
    s22 = 0.0
    s30 = 0.0
    s31 = 0.0
    s32 = 0.0
    o = fb + (first - js) * lf
    for j in range(first, je, 2):
        if (j - js) & 7 == 0:
            pf = _prefetch_some(relf, pf, pf_end, pf_n, line)
        g = rb + co[np.uint64(j)]
        v0 = np.float64(fixf[np.uint64(o + f0)])
        v1 = np.float64(fixf[np.uint64(o + f1)])
        v2 = np.float64(fixf[np.uint64(o + f2)])
        # s_ac += rel_pi[i, j, a] * fix[i, j, c]; one gathered value live at a time
        u = np.float64(relf[np.uint64(g + r0)])
        s00 += u * v0
        s01 += u * v1
        s02 += u * v2
        u = np.float64(relf[np.uint64(g + r1)])
        s10 += u * v0
        s11 += u * v1
        s12 += u * v2
        u = np.float64(relf[np.uint64(g + r2)])
        s20 += u * v0
        s21 += u * v1
        s22 += u * v2
        u = np.float64(relf[np.uint64(g + r3)])
        s30 += u * v0
        s31 += u * v1
        s32 += u * v2
        o += 2 * lf
    return s00, s01, s02, s10, s11, s12, s20, s21, s22, s30, s31, s32, pf


@njit(**KERNEL_OPTIONS)
def choose_tile(n_rel, n_fix):
    """Which pass structure ``cross_rows`` uses for R relabelled and Q fixed layers.

    0: one relabelled layer per pass (``dot_vec``, ``_dot1``); 34 or 43: fused tiles of
    3 x 4 or 4 x 3 layers (``_tile34``, ``_tile43``), chosen when R >= 2 and the padded
    tile work is at most 1.5 R Q. Depends on (R, Q) only, never on the permutations.
    """
    if n_rel < 2:
        return 0
    w34 = ((n_rel + 2) // 3) * 3 * ((n_fix + 3) // 4) * 4
    w43 = ((n_rel + 3) // 4) * 4 * ((n_fix + 2) // 3) * 3
    best = min(w34, w43)
    if 2 * best > 3 * n_rel * n_fix:
        return 0
    return 34 if w34 <= w43 else 43


@njit(inline="always", **KERNEL_OPTIONS)
def _consecutive(idx, at, width):
    """Whether layers idx[at : at + width] follow one another in their records."""
    for t in range(1, width):
        if idx[at + t] != idx[at] + t:
            return False
    return True


@njit(inline="always", **KERNEL_OPTIONS)
def _vec_tile_ok(idx, at, width, n_cols):
    """Whether layers idx[at : at + width] are consecutive, and a 4-wide read from
    idx[at] stays inside a stored record of ``n_cols`` layers."""
    if at + width > idx.shape[0] or idx[at] + 4 > n_cols:
        return False
    return _consecutive(idx, at, width)


@njit(inline="always", **KERNEL_OPTIONS)
def _vec_tile_row(swap, relf, rb0, r0, co, fixf, fb, lf, c0, js, je, pf, pf_end, pf_n,
                  line, vacc):
    """A full tile of one row by ``tile_vec``, VEC_COLUMNS columns per call, with the
    prefetches of the scalar tiles (pf_n per 8 columns) issued between calls."""
    vacc[:] = 0.0
    j0 = js  # every call starts at an even offset from js (VEC_COLUMNS is even)
    while j0 < je:
        j1 = min(j0 + VEC_COLUMNS, je)
        pf = _prefetch_some(relf, pf, pf_end, pf_n * ((j1 - j0 + 7) // 8), line)
        tile_vec(swap, relf, rb0, co, fixf, fb, lf, r0, c0, j0, j1, js, je, vacc)
        j0 = j1
    return pf


@njit(inline="always", **KERNEL_OPTIONS)
def _vec_dot_row(relf, rb, co, fixf, fb, lf, f0, width, js, je, pf, pf_end, pf_n, line,
                 dacc):
    """One row of a one-layer pass against fixed layers f0 .. f0 + width - 1 (width 2 to
    4) by ``dot_vec``, VEC_COLUMNS columns per call with the prefetches of ``_dot1``
    (pf_n per 8 columns) between calls; the row's sums in dacc[:width] as (s0 + s1) +
    (s2 + s3) of the four chains, the same bits as ``_dot1`` on each layer.

    A 4-wide read may run past the last of the ``width`` layers into the next record;
    only at the very end of ``fixf`` would it leave the array, so the columns whose read
    would are summed here in scalars, into their chains (one fused multiply-add a term).
    ``dacc``: (16,) workspace.
    """
    dacc[:] = 0.0
    safe = _safe_end(fixf, fb, lf, f0, js, je)  # columns [js, safe) can be read 4 wide
    j0 = js  # every call starts at an offset from js that is a multiple of 4
    while j0 < safe:
        j1 = min(j0 + VEC_COLUMNS, safe)
        pf = _prefetch_some(relf, pf, pf_end, pf_n * ((j1 - j0 + 7) // 8), line)
        dot_vec(relf, rb, co, fixf, fb, lf, f0, j0, j1, js, dacc)
        j0 = j1
    _scalar_columns(relf, rb, co, fixf, fb, lf, f0, width, js, safe, je, dacc)
    _combine_chains(dacc, width)
    return pf


@njit(inline="always", **KERNEL_OPTIONS)
def _safe_end(fixf, fb, lf, f0, js, je):
    """The end of the columns [js, safe) whose 4-wide reads from fixed layer f0 stay inside
    ``fixf`` (only the very last columns of the array can fail)."""
    safe = je
    while safe > js and fb + (safe - 1 - js) * lf + f0 + 4 > fixf.shape[0]:
        safe -= 1
    return safe


@njit(inline="always", **KERNEL_OPTIONS)
def _scalar_columns(relf, rb, co, fixf, fb, lf, f0, width, js, j0, je, dacc):
    """Columns [j0, je) of a one-layer pass in scalars, into the chains of dacc (16,)."""
    for j in range(j0, je):
        u = np.float64(relf[np.uint64(rb + co[np.uint64(j)])])
        chain = 4 * ((j - js) & 3)
        o = fb + (j - js) * lf + f0
        for t in range(width):
            dacc[chain + t] += u * np.float64(fixf[np.uint64(o + t)])


@njit(inline="always", **KERNEL_OPTIONS)
def _combine_chains(dacc, width):
    """dacc[t] = (s0 + s1) + (s2 + s3) of lane t's four chains (dacc (16,))."""
    for t in range(width):
        dacc[t] = (dacc[t] + dacc[4 + t]) + (dacc[8 + t] + dacc[12 + t])


@njit(inline="always", **KERNEL_OPTIONS)
def _vec_dot_row2(relf, rb, co, rb2, co2, fixf, fb, lf, f0, width, js, je, pf, pf_end, pf2,
                  pf2_end, pf_n, line, dacc2):
    """``_vec_dot_row`` of two relabellings at once (``dot_vec2``: one load of each fixed
    record for both), each with its own prefetches; their sums in dacc2[:width] and
    dacc2[16 : 16 + width], the same bits as two ``_vec_dot_row`` calls. ``dacc2``: (32,)."""
    dacc2[:] = 0.0
    safe = _safe_end(fixf, fb, lf, f0, js, je)
    j0 = js
    while j0 < safe:
        j1 = min(j0 + VEC_COLUMNS, safe)
        many = pf_n * ((j1 - j0 + 7) // 8)
        pf = _prefetch_some(relf, pf, pf_end, many, line)
        pf2 = _prefetch_some(relf, pf2, pf2_end, many, line)
        dot_vec2(relf, rb, co, rb2, co2, fixf, fb, lf, f0, j0, j1, js, dacc2)
        j0 = j1
    one = dacc2[:16]
    two = dacc2[16:]
    _scalar_columns(relf, rb, co, fixf, fb, lf, f0, width, js, safe, je, one)
    _scalar_columns(relf, rb2, co2, fixf, fb, lf, f0, width, js, safe, je, two)
    _combine_chains(one, width)
    _combine_chains(two, width)
    return pf, pf2


@njit(inline="always", **KERNEL_OPTIONS)
def _tiles_row(relf, rb0, rel_idx, co, fixf, fb, lf, fix_idx, js, je, pf, pf_end, pf_n,
               line, tile, acc, lr, vacc):
    """One row of one permutation through 3 x 4 (or 4 x 3) tiles; adds into acc (R, Q).

    A tile past the last layer repeats the last index; those sums are dropped. A full
    tile whose layers are consecutive in their records runs in vector registers
    (``tile_vec``, same bits); any other tile in scalar registers (``_tile34``,
    ``_tile43``). ``lr``: layers per stored record of ``relf``; ``vacc``: (12,) workspace.
    """
    n_rel = rel_idx.shape[0]
    n_fix = fix_idx.shape[0]
    ta = 3 if tile == 34 else 4
    tc = 4 if tile == 34 else 3
    last_a = n_rel - 1
    last_c = n_fix - 1
    for a in range(0, n_rel, ta):
        for c in range(0, n_fix, tc):
            pfn = pf_n if (a == 0 and c == 0) else 0
            if (_vec_tile_ok(rel_idx, a, ta, lr) and _vec_tile_ok(fix_idx, c, tc, lf)):
                if tile == 34:
                    pf = _vec_tile_row(False, relf, rb0, rel_idx[a], co, fixf, fb, lf,
                                       fix_idx[c], js, je, pf, pf_end, pfn, line, vacc)
                    for x in range(3):
                        for y in range(4):
                            acc[a + x, c + y] += vacc[x * 4 + y] + vacc[12 + x * 4 + y]
                else:
                    pf = _vec_tile_row(True, relf, rb0, rel_idx[a], co, fixf, fb, lf,
                                       fix_idx[c], js, je, pf, pf_end, pfn, line, vacc)
                    for x in range(4):
                        for y in range(3):
                            acc[a + x, c + y] += vacc[y * 4 + x] + vacc[12 + y * 4 + x]
                continue
            r0 = rel_idx[a]
            r1 = rel_idx[min(a + 1, last_a)]
            r2 = rel_idx[min(a + 2, last_a)]
            c0 = fix_idx[c]
            c1 = fix_idx[min(c + 1, last_c)]
            c2 = fix_idx[min(c + 2, last_c)]
            if tile == 34:
                c3 = fix_idx[min(c + 3, last_c)]
                (e00, e01, e02, e03, e10, e11, e12, e13, e20, e21, e22, e23,
                 pf) = _tile34(relf, rb0, r0, r1, r2, co, fixf, fb, lf, c0, c1, c2, c3, js,
                               js, je, pf, pf_end, pfn, line)
                (d00, d01, d02, d03, d10, d11, d12, d13, d20, d21, d22, d23,
                 pf) = _tile34(relf, rb0, r0, r1, r2, co, fixf, fb, lf, c0, c1, c2, c3, js,
                               js + 1, je, pf, pf_end, 0, line)
                sums = ((e00 + d00, e01 + d01, e02 + d02, e03 + d03),
                        (e10 + d10, e11 + d11, e12 + d12, e13 + d13),
                        (e20 + d20, e21 + d21, e22 + d22, e23 + d23))
                for x in range(3):
                    if a + x <= last_a:
                        row = sums[x]
                        for y in range(4):
                            if c + y <= last_c:
                                acc[a + x, c + y] += row[y]
            else:
                r3 = rel_idx[min(a + 3, last_a)]
                (e00, e01, e02, e10, e11, e12, e20, e21, e22, e30, e31, e32,
                 pf) = _tile43(relf, rb0, r0, r1, r2, r3, co, fixf, fb, lf, c0, c1, c2, js,
                               js, je, pf, pf_end, pfn, line)
                (d00, d01, d02, d10, d11, d12, d20, d21, d22, d30, d31, d32,
                 pf) = _tile43(relf, rb0, r0, r1, r2, r3, co, fixf, fb, lf, c0, c1, c2, js,
                               js + 1, je, pf, pf_end, 0, line)
                sums = ((e00 + d00, e01 + d01, e02 + d02), (e10 + d10, e11 + d11, e12 + d12),
                        (e20 + d20, e21 + d21, e22 + d22), (e30 + d30, e31 + d31, e32 + d32))
                for x in range(4):
                    if a + x <= last_a:
                        row = sums[x]
                        for y in range(3):
                            if c + y <= last_c:
                                acc[a + x, c + y] += row[y]
    return pf


@njit(**KERNEL_OPTIONS)
def cross_rows(relf, n_rel_cols, rel_idx, fixf, n_fix_cols, fix_idx, row_perms, col_perms,
               col_start, col_stop, block, coloff, tot, out):
    """Cross products of relabelled with fixed layers, row-wise, ``block`` permutations at once.

    Parameters
    ----------
    relf : float64 or float32 (n_src * m * Lr,)
        The relabelled layers, an (n_src, m, Lr) C-ordered array flattened.
    n_rel_cols : int
        Lr, the layers interleaved in ``relf``.
    rel_idx : int64 (R,)
        Which of the Lr layers take part.
    fixf : float64 or float32 (n * m * Lf,)
        The fixed layers, an (n, m, Lf) C-ordered array flattened.
    n_fix_cols : int
        Lf.
    fix_idx : int64 (Q,)
        Which of the Lf layers take part.
    row_perms : int64 (B, n); col_perms : int64 (B, m)
        Relabellings, values in [0, n_src) and [0, m).
    col_start, col_stop : int64 (n,)
        Row i uses the columns [col_start[i], col_stop[i]).
    block : int
        Permutations that share one pass over the fixed rows (>= 1). Results do not
        depend on it.
    coloff : int32 workspace (block, m)
        Column offsets of each permutation of the block (m * Lr < 2**31).
    tot : float64 workspace (block, R, Q)
    out : float64 (B, R, Q)
        Written: out[b, a, c] = sum_ij rel[row_perms[b, i], col_perms[b, j], rel_idx[a]]
        * fix[i, j, fix_idx[c]], summed in the order of the module notes, in float64.
    """
    n_perm = row_perms.shape[0]
    n_rows = row_perms.shape[1]
    m = col_perms.shape[1]
    n_rel = rel_idx.shape[0]
    n_fix = fix_idx.shape[0]
    lr = n_rel_cols
    lf = n_fix_cols
    rowlen = m * lr
    line = max(1, CACHE_LINE // relf.itemsize)  # elements per cache line
    row_lines = (rowlen + line - 1) // line
    tile = choose_tile(n_rel, n_fix)
    ahead = max(1, min(AHEAD, PREFETCH_BYTES // (rowlen * relf.itemsize)))
    vacc = np.zeros(24)  # accumulators of the vector tiles, even and odd (one row at a time)
    dacc = np.zeros(16)  # accumulators of the vector one-layer passes, four chains
    dacc2 = np.zeros(32)  # the same for two relabellings at once
    # one relabelled layer against up to 4 consecutive fixed layers (scheme y): two
    # relabellings of a block share each pass, so each fixed record is loaded once for both
    pair = tile == 0 and n_rel == 1 and 2 <= n_fix <= FIX_GROUP and _consecutive(fix_idx, 0,
                                                                                n_fix)
    for b0 in range(0, n_perm, block):
        nb = min(block, n_perm - b0)
        for q in range(nb):
            for j in range(m):
                # offset of column col_perms[b, j] inside a stored row
                coloff[q, j] = np.int32(col_perms[b0 + q, j] * lr)
        # the stored rows of the first steps (a step: row i of one permutation)
        for t in range(min(ahead, n_rows * nb)):
            pf = row_perms[b0 + t % nb, t // nb] * rowlen
            for _ in range(row_lines):
                prefetch(relf, np.uint64(pf))
                pf += line
        tot[:] = 0.0
        for i in range(n_rows):
            js = col_start[i]
            je = col_stop[i]
            fb = (i * m + js) * lf
            # prefetches per 8 columns so a stored row arrives ``ahead`` steps before its use
            eighths = (je - js + 7) // 8
            pf_n = (row_lines + eighths - 1) // eighths if eighths > 0 else 0
            q = 0
            while q < nb:
                b = b0 + q
                co = coloff[q]
                rb0 = row_perms[b, i] * rowlen
                # the stored row of the step ``ahead`` steps on (steps run q fastest)
                t = i * nb + q + ahead
                nxt = row_perms[b0 + t % nb, t // nb] * rowlen if t < n_rows * nb else rb0
                pf = nxt
                pf_end = nxt + row_lines * line
                if pair and q + 1 < nb:  # this relabelling and the next, one pass
                    rb2 = row_perms[b + 1, i] * rowlen
                    t += 1
                    nxt2 = row_perms[b0 + t % nb, t // nb] * rowlen if t < n_rows * nb else rb2
                    pf2_end = nxt2 + row_lines * line
                    pf, pf2 = _vec_dot_row2(relf, rb0 + rel_idx[0], co, rb2 + rel_idx[0],
                                            coloff[q + 1], fixf, fb, lf, fix_idx[0], n_fix, js,
                                            je, pf, pf_end, nxt2, pf2_end, pf_n, line, dacc2)
                    for c in range(n_fix):
                        tot[q, 0, c] += dacc2[c]
                        tot[q + 1, 0, c] += dacc2[16 + c]
                    _prefetch_rest(relf, pf, pf_end, line)
                    _prefetch_rest(relf, pf2, pf2_end, line)
                    q += 2
                    continue
                if tile == 34 or tile == 43:
                    pf = _tiles_row(relf, rb0, rel_idx, co, fixf, fb, lf, fix_idx, js, je, pf,
                                    pf_end, pf_n, line, tile, tot[q], lr, vacc)
                else:
                    for a in range(n_rel):
                        rb = rb0 + rel_idx[a]
                        c = 0
                        while c < n_fix:
                            width = min(FIX_GROUP, n_fix - c)
                            pfn = pf_n if (a == 0 and c == 0) else 0
                            if width >= 2 and _consecutive(fix_idx, c, width):
                                pf = _vec_dot_row(relf, rb, co, fixf, fb, lf, fix_idx[c],
                                                  width, js, je, pf, pf_end, pfn, line, dacc)
                                for t in range(width):
                                    tot[q, a, c + t] += dacc[t]
                            else:  # one fixed layer a pass: each sum as in a vector pass
                                width = 1
                                s0, pf = _dot1(relf, rb, co, fixf, fb, lf, fix_idx[c], js, je,
                                               pf, pf_end, pfn, line)
                                tot[q, a, c] += s0
                            c += width
                _prefetch_rest(relf, pf, pf_end, line)
                q += 1
        for q in range(nb):
            for a in range(n_rel):
                for c in range(n_fix):
                    out[b0 + q, a, c] = tot[q, a, c]


def auto_block(rel) -> int:
    """Permutations per pass: as many rows of int32 column offsets as fit in
    ``BLOCK_BYTES``, 1 to ``MAX_BLOCK``."""
    offsets_bytes = rel.shape[1] * 4
    return int(min(MAX_BLOCK, max(1, BLOCK_BYTES // max(offsets_bytes, 1))))


def gather_cross(rel, rel_idx, fix, fix_idx, row_perms, col_perms, col_start, col_stop, out,
                 *, block=None):
    """Cross products of relabelled layers with fixed layers over a dyad set.

    Parameters
    ----------
    rel : float64 or float32 (n, m, Lr)
        Layers read through the relabelling.
    rel_idx : int64 (R,)
        Which layers of ``rel`` take part.
    fix : float64 or float32 (n, m, Lf)
        Layers read in place.
    fix_idx : int64 (Q,)
        Which layers of ``fix`` take part.
    row_perms : int64 (B, n)
        Row relabelling of each permutation.
    col_perms : int64 (B, m)
        Column relabelling (the same rows as ``row_perms`` for one-mode data).
    col_start, col_stop : int64 (n,)
        Row i uses the columns j in [col_start[i], col_stop[i]).
    out : float64 (B, R, Q)
        Written: out[b, a, c] = sum_ij rel[row_perms[b, i], col_perms[b, j], rel_idx[a]]
        * fix[i, j, fix_idx[c]], accumulated in float64 whatever the layers' dtype.
    block : int or None
        Permutations per pass over the fixed rows (None: ``auto_block``); the results are
        the same bits for any value (see the module notes).

    Notes
    -----
    A thin dispatcher: flattens the layer arrays (views; a copy only for an array that is
    not C-contiguous) and hands them to ``cross_rows`` with its workspaces. Releases the
    GIL inside the kernel, so threads run side by side.
    """
    m = fix.shape[1]
    if m * rel.shape[2] >= 2**31:
        raise ValueError(f"gather_cross: a stored row must hold fewer than 2**31 values for "
                         f"int32 column offsets; got {m} columns x {rel.shape[2]} layers")
    rel = np.ascontiguousarray(rel)
    fix = np.ascontiguousarray(fix)
    n_perm = row_perms.shape[0]
    if block is None:
        block = auto_block(rel)
    block = int(max(1, min(block, max(n_perm, 1))))
    coloff = np.empty((block, m), dtype=np.int32)
    tot = np.empty((block, len(rel_idx), len(fix_idx)))
    cross_rows(rel.reshape(-1), rel.shape[2], np.asarray(rel_idx, np.int64), fix.reshape(-1),
               fix.shape[2], np.asarray(fix_idx, np.int64), np.asarray(row_perms, np.int64),
               np.asarray(col_perms, np.int64), np.asarray(col_start, np.int64),
               np.asarray(col_stop, np.int64), block, coloff, tot, out)
    return out


@njit(**KERNEL_OPTIONS)
def gather_gram(rel, rel_idx, fix, fix_idx, row_perms, col_perms, col_start, col_stop, out):
    """Full Gram matrix of v = [1, relabelled layers, fixed layers] over complete dyads.

    For data with missing values (NaN) the dyad set of each permutation is the set where
    every value of v is finite; this kernel sums v v' over exactly that set.

    Parameters are as in ``gather_cross``; ``out`` is float64 (B, d, d) with
    d = 1 + R + Q, written: out[b] = sum over complete dyads of v v' (out[b, 0, 0] = N).
    """
    n_perm = row_perms.shape[0]
    n_rows = fix.shape[0]
    n_rel = rel_idx.shape[0]
    n_fix = fix_idx.shape[0]
    d = 1 + n_rel + n_fix
    v = np.empty(d)
    v[0] = 1.0
    out[:] = 0.0
    for b in range(n_perm):
        for i in range(n_rows):
            pi = row_perms[b, i]
            for j in range(col_start[i], col_stop[i]):
                pj = col_perms[b, j]
                complete = True
                for c in range(n_fix):
                    x = fix[i, j, fix_idx[c]]
                    if np.isnan(x):
                        complete = False
                        break
                    v[1 + n_rel + c] = x
                if not complete:
                    continue
                for a in range(n_rel):
                    x = rel[pi, pj, rel_idx[a]]
                    if np.isnan(x):
                        complete = False
                        break
                    v[1 + a] = x
                if not complete:
                    continue
                for r in range(d):
                    for s in range(r + 1):
                        # G[r, s] += v_r v_s over complete dyads
                        out[b, r, s] += v[r] * v[s]
        for r in range(d):
            for s in range(r + 1, d):
                out[b, r, s] = out[b, s, r]


@njit(**KERNEL_OPTIONS)
def _subtract_cell(rel, rel_idx, fix, fix_idx, pi, pj, i, j, v, gram):
    """gram -= v v' for v = [1, rel[pi, pj, rel_idx], fix[i, j, fix_idx]] (lower triangle
    and diagonal; ``subtract_missing`` mirrors them)."""
    n_rel = rel_idx.shape[0]
    for a in range(n_rel):
        v[1 + a] = rel[pi, pj, rel_idx[a]]
    for c in range(fix_idx.shape[0]):
        v[1 + n_rel + c] = fix[i, j, fix_idx[c]]
    for r in range(v.shape[0]):
        for q in range(r + 1):
            gram[r, q] -= v[r] * v[q]


@njit(**KERNEL_OPTIONS)
def subtract_missing(rel, rel_idx, fix, fix_idx, row_perms, col_perms, fix_cells, fix_keys,
                     rel_cells, mask, out):
    """Take from each permutation's Gram (``fill_gram`` over layers whose missing values
    are held as 0) the dyads that are not complete under that permutation.

    With missing values read as 0, a sum over the whole dyad set D differs from the sum
    over a permutation's complete dyads only at the dyads where some value of v = [1,
    relabelled layers, fixed layers] is missing; there the products of the observed values
    went in (and the 1 of the count). Those dyads are the fixed cells ``fix_cells`` (in
    D, a fixed layer missing; the same for every permutation) and, for permutation b, the
    dyads (i, j) of D that b reads from a stored cell of ``rel_cells`` (a relabelled layer
    missing there): i = row_perms[b]^-1 of its row, j = col_perms[b]^-1 of its column.
    Each such dyad's v v' is subtracted once, in the order of ``fix_cells``, then of
    ``rel_cells`` (a dyad already among the fixed cells is skipped), so the result does not
    depend on which permutations share a call.

    rel, fix : float64 or float32 (n, m, L) with missing values 0; rel_idx, fix_idx : int64;
    row_perms (B, n_src), col_perms (B, m) : int64; fix_cells : int64 (K, 2), rows (i, j);
    fix_keys : int64 (K,), i m + j, increasing (fix_cells in that order); rel_cells :
    int64 (K', 2), stored cells (a, b); mask : bool (n, m), the dyad set D; out : float64
    (B, d, d), changed in place.
    """
    n_perm = row_perms.shape[0]
    m = col_perms.shape[1]
    d = out.shape[1]
    v = np.empty(d)
    v[0] = 1.0
    inv_r = np.empty(rel.shape[0], dtype=np.int64)
    inv_c = np.empty(m, dtype=np.int64)
    low = np.zeros((d, d))
    for b in range(n_perm):
        low[:, :] = 0.0
        for t in range(fix_cells.shape[0]):
            i = fix_cells[t, 0]
            j = fix_cells[t, 1]
            _subtract_cell(rel, rel_idx, fix, fix_idx, row_perms[b, i], col_perms[b, j], i, j,
                           v, low)
        if rel_cells.shape[0] > 0:
            for i in range(row_perms.shape[1]):
                inv_r[row_perms[b, i]] = i
            for j in range(m):
                inv_c[col_perms[b, j]] = j
        for t in range(rel_cells.shape[0]):
            i = inv_r[rel_cells[t, 0]]
            j = inv_c[rel_cells[t, 1]]
            if not mask[i, j]:
                continue
            if fix_keys.shape[0] > 0:
                at = np.searchsorted(fix_keys, i * m + j)
                if at < fix_keys.shape[0] and fix_keys[at] == i * m + j:
                    continue
            _subtract_cell(rel, rel_idx, fix, fix_idx, rel_cells[t, 0], rel_cells[t, 1], i, j,
                           v, low)
        for r in range(d):
            for q in range(r + 1):
                out[b, r, q] += low[r, q]
                if q != r:
                    out[b, q, r] += low[r, q]


# ``gram_chunks`` without a map of the records.
NO_RECORDS = np.zeros((0, 0))

# Columns of a row copied into the layer-major workspace of ``identity_gram`` at once
# (L x 256 float64: 8 KB per layer, so a 4-layer chunk stays in the first-level cache).
GRAM_COLUMNS = 256


@njit(inline="always", **KERNEL_OPTIONS)
def _all_layers(stack, idx):
    """Whether ``idx`` names every layer of ``stack`` in order (0, 1, ..., L - 1), with
    L at most ``vector.RECORD_LANES`` (and at least one)."""
    L = stack.shape[2]
    if idx.shape[0] != L or L == 0 or L > RECORD_LANES:
        return False
    for a in range(L):
        if idx[a] != a:
            return False
    return True


@njit(**KERNEL_OPTIONS)
def gram_chunks(rel, rel_idx, fix, fix_idx, col_start, col_stop, first, parts,
                rpad=NO_RECORDS):
    """The sums of each chunk of cells, for ``identity_gram`` and its threads.

    With ``rpad`` (``vector.apply_records``' padded R, float64 (RECORD_LANES,
    RECORD_LANES)), each row of ``fix`` (every record, all its layers; ``fix`` may be
    ``rel``) is first mapped in place, v -> v R, as ``stats.apply_upper`` maps it (the same
    bits), and its sums are then taken while the row is in cache: one pass over the stack
    instead of two. ``fix`` then has at most RECORD_LANES layers.

    Row i's cells j in [col_start[i], col_stop[i]) are cut into chunks of GRAM_COLUMNS
    columns (the last shorter); chunk t of row i writes parts[first[i] + t] = [sum v_0,
    sum v_0 v_0, sum v_1, sum v_1 v_0, sum v_1 v_1, sum v_2, ...] over its cells: for each
    layer r of v = [rel layers, fix layers], the sum of v_r, then the sums of v_r v_s for
    s <= r, each in four partial sums (``dot_chains``). Rows are independent, so calls
    over disjoint rows may run side by side.

    first : int64 (rows,), the slot of each row's first chunk (``chunk_slots``); parts : float64 (slots, T),
    T = L + L (L + 1) / 2 with L = R + Q.
    """
    n_rows = fix.shape[0]
    n_rel = rel_idx.shape[0]
    n_fix = fix_idx.shape[0]
    n_lay = n_rel + n_fix
    # wk[0] = ones, wk[1 + r] = layer r of the chunk; sum k of a chunk is the dot product
    # of wk[px[k]] and wk[py[k]], taken four (then two) at a time (``dot_chains4``: the bits
    # of ``dot_chains``, the sums' chains side by side instead of waiting on each other)
    wk = np.empty((n_lay + 1, GRAM_COLUMNS))
    wk[0, :] = 1.0
    buf = wk[1:]
    n_sums = n_lay + n_lay * (n_lay + 1) // 2
    px = np.empty(n_sums, dtype=np.int64)
    py = np.empty(n_sums, dtype=np.int64)
    k = 0
    for r in range(n_lay):
        for s in range(r + 2):
            px[k] = 1 + r
            py[k] = s
            k += 1
    # a stack whose layers are all taken, in order, is copied record by record
    # (vector.records_to_rows, four records at a time)
    rel_all = _all_layers(rel, rel_idx)
    fix_all = _all_layers(fix, fix_idx)
    m_rel, m_fix = rel.shape[1], fix.shape[1]
    mapped = rpad.shape[0] > 0
    if mapped and fix.shape[2] > RECORD_LANES:
        raise ValueError("gram_chunks: the map takes records of at most RECORD_LANES values")
    for i in range(n_rows):
        if mapped:
            apply_records(fix[i].reshape(-1), np.int64(m_fix), np.int64(fix.shape[2]), rpad)
        slot = first[i]
        j0 = col_start[i]
        while j0 < col_stop[i]:
            w = min(GRAM_COLUMNS, col_stop[i] - j0)
            if rel_all:
                records_to_rows(rel.reshape(-1), np.int64((i * m_rel + j0) * n_rel),
                                np.int64(n_rel), np.int64(w), wk, np.int64(1))
            else:
                for a in range(n_rel):
                    la = rel_idx[a]
                    for t in range(w):
                        buf[a, t] = rel[i, j0 + t, la]
            if fix_all:
                records_to_rows(fix.reshape(-1), np.int64((i * m_fix + j0) * n_fix),
                                np.int64(n_fix), np.int64(w), wk, np.int64(1 + n_rel))
            else:
                for c in range(n_fix):
                    lc = fix_idx[c]
                    for t in range(w):
                        buf[n_rel + c, t] = fix[i, j0 + t, lc]
            out = parts[slot]
            k = 0
            while k + 4 <= n_sums:
                s0, s1, s2, s3 = dot_chains4(wk[px[k]], wk[py[k]], wk[px[k + 1]], wk[py[k + 1]],
                                             wk[px[k + 2]], wk[py[k + 2]], wk[px[k + 3]],
                                             wk[py[k + 3]], w)
                out[k] = s0
                out[k + 1] = s1
                out[k + 2] = s2
                out[k + 3] = s3
                k += 4
            if k + 2 <= n_sums:
                s0, s1 = dot_chains2(wk[px[k]], wk[py[k]], wk[px[k + 1]], wk[py[k + 1]], w)
                out[k] = s0
                out[k + 1] = s1
                k += 2
            if k < n_sums:
                out[k] = dot_chains(wk[px[k]], wk[py[k]], w)
            slot += 1
            j0 += w


@njit(**KERNEL_OPTIONS)
def add_chunks(parts, acc):
    """acc[k] += parts[t, k] for t in order: the chunks' sums added in increasing chunk
    order (rows in increasing order), whichever threads made them."""
    for t in range(parts.shape[0]):
        for k in range(acc.shape[0]):
            acc[k] += parts[t, k]


@njit(**KERNEL_OPTIONS)
def gram_from_sums(acc, count, out):
    """out (d, d) = the Gram of [1, layers] from ``add_chunks``'s sums; out[0, 0] = count."""
    n_lay = out.shape[0] - 1
    out[0, 0] = count
    k = 0
    for r in range(n_lay):
        out[0, 1 + r] = acc[k]
        out[1 + r, 0] = acc[k]
        k += 1
        for s in range(r + 1):
            out[1 + r, 1 + s] = acc[k]
            out[1 + s, 1 + r] = acc[k]
            k += 1


def chunk_slots(col_start, col_stop):
    """int64 (rows + 1,): the slot of each row's first chunk in ``gram_chunks``'s parts,
    then the number of slots."""
    width = np.maximum(np.asarray(col_stop) - np.asarray(col_start), 0)
    first = np.zeros(len(width) + 1, dtype=np.int64)
    np.cumsum((width + GRAM_COLUMNS - 1) // GRAM_COLUMNS, out=first[1:])
    return first


def identity_gram(rel, rel_idx, fix, fix_idx, col_start, col_stop, out):
    """Gram of v = [1, rel layers, fix layers] over the cells of the identity relabelling.

    The invariant Gram of a complete-data plan: what ``gather_gram`` sums with identity
    relabellings over data without NaN, without its per-value NaN tests and relabelling
    lookups. Each row's cells j in [col_start[i], col_stop[i]) are copied, GRAM_COLUMNS at
    a time, into a layer-major workspace; each entry adds that chunk's products in four
    partial sums (``dot_chains``); chunks in increasing column order, rows in increasing
    order (``gram_chunks``, then ``add_chunks``; ``routes.linear`` runs the first on two
    threads over halves of the rows, the same bits). Deterministic: the order depends on
    the column ranges only.

    ``out`` float64 (d, d), d = 1 + R + Q, is written; out[0, 0] counts the cells.
    """
    n_lay = len(rel_idx) + len(fix_idx)
    first = chunk_slots(col_start, col_stop)
    parts = np.empty((first[-1], n_lay + n_lay * (n_lay + 1) // 2))
    gram_chunks(rel, rel_idx, fix, fix_idx, col_start, col_stop, first, parts)
    acc = np.zeros(parts.shape[1])
    add_chunks(parts, acc)
    count = int(np.maximum(np.asarray(col_stop) - np.asarray(col_start), 0).sum())
    gram_from_sums(acc, count, out)
    return out

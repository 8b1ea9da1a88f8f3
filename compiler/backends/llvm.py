"""LLVM back end: the IR as explicit ``<16 x double>`` code, JIT-compiled with llvmlite.

Layout
------
Rows of the input array are processed in blocks of ``LANES = 16`` parameter
sets side by side: every IR row becomes one vector instruction whose lane k
belongs to parameter set k of the block (an array-of-structures-of-arrays
layout). The code generator splits each ``<16 x double>`` instruction into
two 512-bit ones, so every block carries two independent chains: the
elimination's divisions and sums are long dependency chains, and a second
chain fills their latency (Q3: 27 → 23 ns per set on one core against 8
lanes; 32 lanes gained nothing more; measured here). A block of X is
row-major (16 rows × n_inputs), so each tile of 8 rows × 8 input columns is
loaded as 8 row vectors and transposed with three stages of two-source
shuffles into the 8-lane halves of 8 column vectors (columns beyond the last
full tile are gathered lane by lane); outputs are transposed back the same
way. A tail of fewer than 16 rows is copied into a padded local block (the
padding lanes hold 1.0 and are discarded).

The emitted module defines one exported function::

    i32 @treeflux_rows(ptr X, ptr out, i64 start, i64 stop)

which evaluates rows ``start:stop`` of the C-contiguous (N, n_inputs) array X
into the (N, n_outputs) array ``out`` and returns 0 (or, with
``check_inputs=True``, row + 1 of the first row holding an input that is not
positive and finite; NaN is refused). X and ``out`` must not overlap.

Arithmetic follows :func:`treeflux.compiler.ir.evaluate` in the ``numpy``
domain: n-ary sums and products fold left to right, no fast-math flags are
set (no reassociation, no contraction into FMA), so add/mul/div/sub/neg give
bit-identical results. ``exp``, ``log`` and ``pow`` use the LLVM intrinsics,
which the code generator lowers to the C library's scalar functions;
``sqrt`` is the correctly rounded hardware instruction; ``max`` is numpy's
``maximum`` folded left to right (NaN propagates; on ties, signed zeros
included, the later operand wins), emitted as compare-and-select steps (one
``vmaxpd`` each) and one unordered compare per pair of operands; only a NaN's
payload may differ from numpy's. Small
integer powers (|e| ≤ 4) are repeated multiplications, as in the python back
end.

Large bodies compile superlinearly (scheduling and register allocation work
on whole functions), so the body is split into chunk functions of at most
``CHUNK_ROWS`` rows, never inlined; values that cross a chunk boundary travel
through a stack array of vectors whose slots are reused once a value is
dead. Bodies above ``MAX_ROWS`` rows are refused with
:class:`~treeflux.compiler.errors.TooLargeError`: the runtime's looped
numeric path serves those.

References
----------
LLVM Language Reference Manual (vector types, ``fcmp``/``select``,
``llvm.exp``, ``noalias``), https://llvm.org/docs/LangRef.html.
"""

from __future__ import annotations

import ctypes
import ctypes.util
import math
import struct
import threading

from treeflux.runtime.kernel import Kernel, data_address
from treeflux.runtime.progress import progress

from ..errors import TooLargeError
from ..ir import BINARY, NARY, OPS, UNARY, Function

LANES = 16           # parameter sets per block: two independent 8-lane chains per instruction
TILE = 8             # rows and columns of one transpose tile (one 512-bit register of doubles)
VEC = f"<{LANES} x double>"
TVEC = f"<{TILE} x double>"
# Measured here (2 shared cores, LLVM 22): a 19,000-row body compiles in 2.3 s
# whole and no faster in 3,000-row chunks (the crossing values cost loads,
# stores and dead-store analysis); a 60,000-row body took 11 s whole, 8 s in
# 20,000-row chunks, 17 s in 4,000-row chunks. So chunks are large, and bodies
# that would take well over 5 s are refused.
CHUNK_ROWS = 15_000
MAX_ROWS = 40_000
ENTRY = "treeflux_rows"
CHECKED_ENTRY = "treeflux_checked"
SPEED_LEVEL = 2  # O3 measured the same here (Q3–Q5: speed and compile time within noise)

_V = f"v{LANES}f64"
FABS, UMAX = f"llvm.fabs.{_V}", f"llvm.umax.v{LANES}i64"
_INTRINSIC = {"exp": f"llvm.exp.{_V}", "log": f"llvm.log.{_V}", "sqrt": f"llvm.sqrt.{_V}",
              "pow": f"llvm.pow.{_V}"}
_ARITY = {f"llvm.pow.{_V}": 2, UMAX: 2}
_TYPE = {UMAX: f"<{LANES} x i64>"}


# ------------------------------------------------------------------ emission

def _double(value: float) -> str:
    """An exact LLVM literal for a double (hexadecimal bit pattern)."""
    return "0x%016X" % struct.unpack("<Q", struct.pack("<d", value))[0]


def _splat(value: float) -> str:
    return "<" + ", ".join([f"double {_double(value)}"] * LANES) + ">"


def _small_power(graph, args) -> int | None:
    """The exponent of ``pow(a, e)`` when e is an integer constant with |e| ≤ 4."""
    b = args[1]
    if graph.ops[b] == "const":
        e = graph.data[b]
        if e.denominator == 1 and abs(e) <= 4:
            return int(e)
    return None


def _check_function(fn: Function) -> None:
    g = fn.graph
    for i, (op, args) in enumerate(zip(g.ops, g.args)):
        if op not in OPS:
            raise ValueError(f"llvm back end: row {i} has unknown op {op!r}")
        if any(not 0 <= a < i for a in args):
            raise ValueError(f"llvm back end: row {i} uses an operand not defined before it "
                             "(compact the Function first)")
        if (op in NARY and len(args) < 2) or (op in UNARY and len(args) != 1) \
                or (op in BINARY and len(args) != 2):
            raise ValueError(f"llvm back end: row {i} ({op}) has {len(args)} operands")
        if op == "input" and not 0 <= g.data[i] < fn.n_inputs:
            raise ValueError(f"llvm back end: row {i} reads input {g.data[i]} "
                             f"of {fn.n_inputs}")
    for o in fn.outputs:
        if not 0 <= o < len(g):
            raise ValueError(f"llvm back end: output node {o} is not a row of the graph")


def _plan(fn: Function):
    """Split the computed rows into chunks and give crossing values a slot.

    Returns (chunks, slot, n_slots): ``chunks`` lists row ids per chunk,
    ``slot[i]`` is the temporaries slot of a row used in a later chunk. A
    value defined in chunk c occupies its slot from its store in c through
    its last use; slots freed before chunk c can be taken by values defined
    in c (loads of a chunk never see stores of the same chunk to their slot).
    """
    g = fn.graph
    rows = [i for i, op in enumerate(g.ops) if op not in ("const", "input")]
    chunks = [rows[k:k + CHUNK_ROWS] for k in range(0, len(rows), CHUNK_ROWS)] or [[]]
    where = {}
    for c, rs in enumerate(chunks):
        for i in rs:
            where[i] = c
    last = {}
    for c, rs in enumerate(chunks):
        for i in rs:
            for a in g.args[i]:
                if a in where and where[a] < c:
                    last[a] = c
    free: list[int] = []
    slot: dict[int, int] = {}
    n_slots = 0
    releases: dict[int, list[int]] = {}
    for c, rs in enumerate(chunks):
        for i in rs:
            if i in last:
                if free:
                    s = free.pop()
                else:
                    s, n_slots = n_slots, n_slots + 1
                slot[i] = s
                releases.setdefault(last[i], []).append(s)
        # slots whose last use is chunk c become free for chunks after c
        free.extend(sorted(releases.pop(c, []), reverse=True))
    return chunks, slot, n_slots


class _Chunk:
    """Emitter of one chunk function: an op table over vector operand names."""

    def __init__(self, fn: Function, slot: dict[int, int]):
        self.fn, self.g, self.slot = fn, fn.graph, slot
        self.lines: list[str] = []
        self.names: dict[int, str] = {}
        self.uses: set[str] = set()

    def value(self, i: int) -> str:
        """The operand text of row i, loading or gathering it on first use."""
        name = self.names.get(i)
        if name is not None:
            return name
        op, data = self.g.ops[i], self.g.data[i]
        if op == "const":
            return _splat(float(data))
        out = self.lines
        if op == "input":  # column j of the transposed input block
            out.append(f"  %c{i} = getelementptr inbounds {VEC}, ptr %x, i64 {data}")
            out.append(f"  %v{i} = load {VEC}, ptr %c{i}, align 64")
        else:  # defined in an earlier chunk: load its slot
            out.append(f"  %t{i} = getelementptr inbounds {VEC}, ptr %t, i64 {self.slot[i]}")
            out.append(f"  %v{i} = load {VEC}, ptr %t{i}, align 64")
        self.names[i] = f"%v{i}"
        return self.names[i]

    def _fold(self, i: int, instr: str, xs: list[str]) -> None:
        acc = xs[0]
        for k, x in enumerate(xs[1:], 1):
            cur = f"%v{i}" if k == len(xs) - 1 else f"%v{i}.{k}"
            self.lines.append(f"  {cur} = {instr} {VEC} {acc}, {x}")
            acc = cur

    def _call(self, i: int, name: str, xs: list[str]) -> None:
        self.uses.add(name)
        params = ", ".join(f"{VEC} {x}" for x in xs)
        self.lines.append(f"  %v{i} = call {VEC} @{name}({params})")

    def row(self, i: int) -> None:
        op, args = self.g.ops[i], self.g.args[i]
        e = _small_power(self.g, args) if op == "pow" else None
        xs = [self.value(a) for a in (args[:1] if e is not None else args)]
        out = self.lines
        if op == "add":
            self._fold(i, "fadd", xs)
        elif op == "mul":
            self._fold(i, "fmul", xs)
        elif op == "div":
            out.append(f"  %v{i} = fdiv {VEC} {xs[0]}, {xs[1]}")
        elif op == "sub":
            out.append(f"  %v{i} = fsub {VEC} {xs[0]}, {xs[1]}")
        elif op == "neg":
            out.append(f"  %v{i} = fneg {VEC} {xs[0]}")
        elif e is not None:
            one = _splat(1.0)
            if e == 0:
                out.append(f"  %v{i} = fadd {VEC} {one}, zeroinitializer")
            elif e == 1:  # x · 1 is exact for every x (−0 and NaN included)
                out.append(f"  %v{i} = fmul {VEC} {xs[0]}, {one}")
            else:
                target = f"%v{i}.m" if e < 0 else f"%v{i}"
                acc = xs[0]
                for k in range(1, abs(e)):
                    cur = target if k == abs(e) - 1 else f"%v{i}.{k}"
                    out.append(f"  {cur} = fmul {VEC} {acc}, {xs[0]}")
                    acc = cur
                if e < 0:
                    src = xs[0] if e == -1 else target
                    out.append(f"  %v{i} = fdiv {VEC} {one}, {src}")
        elif op == "max":
            # numpy's maximum folded left to right, for every value but a NaN's
            # payload: a > x ? a : x at each step (one vmaxpd; ties, signed
            # zeros included, give x as in numpy), then NaN where any operand
            # is NaN (one unordered compare per pair of operands). llvm.maximum
            # (which also orders -0 < +0) lowered to about seven instructions
            # per step.
            acc = xs[0]
            for k, x in enumerate(xs[1:], 1):
                out.append(f"  %v{i}.g{k} = fcmp ogt {VEC} {acc}, {x}")
                out.append(f"  %v{i}.{k} = select <{LANES} x i1> %v{i}.g{k}, {VEC} {acc}, {VEC} {x}")
                acc = f"%v{i}.{k}"
            nan = None
            for k in range(0, len(xs), 2):
                pair = xs[k:k + 2] if k + 1 < len(xs) else [xs[k], xs[k]]
                out.append(f"  %v{i}.u{k} = fcmp uno {VEC} {pair[0]}, {pair[1]}")
                if nan is not None:
                    out.append(f"  %v{i}.o{k} = or <{LANES} x i1> {nan}, %v{i}.u{k}")
                nan = f"%v{i}.o{k}" if nan is not None else f"%v{i}.u{k}"
            out.append(f"  %v{i} = select <{LANES} x i1> {nan}, {VEC} {_splat(math.nan)}, {VEC} {acc}")
        else:  # exp, log, sqrt, pow
            self._call(i, _INTRINSIC[op], xs)
        self.names[i] = f"%v{i}"
        if i in self.slot:
            out.append(f"  %t{i} = getelementptr inbounds {VEC}, ptr %t, i64 {self.slot[i]}")
            out.append(f"  store {VEC} %v{i}, ptr %t{i}, align 64")

    def store(self, k: int, i: int) -> None:
        """Output k (row i) into column k of the transposed output block."""
        v = self.value(i)
        self.lines.append(f"  %q{k} = getelementptr inbounds {VEC}, ptr %y, i64 {k}")
        self.lines.append(f"  store {VEC} {v}, ptr %q{k}, align 64")


def _transpose_masks(b: int) -> tuple[str, str]:
    """Shuffle masks of one butterfly stage of an 8 × 8 transpose.

    Element (vector a, lane l) moves to the place where bit b of a and bit b
    of l are exchanged; three stages (b = 0, 1, 2) exchange all bits, which
    transposes. Each stage is a two-source shuffle (one instruction on
    AVX-512, e.g. ``vpermt2pd``).
    """
    bit = 1 << b
    lo = [l if not l & bit else TILE + (l & ~bit) for l in range(TILE)]
    hi = [l | bit if not l & bit else TILE + l for l in range(TILE)]
    fmt = lambda m: "<" + ", ".join(f"i32 {v}" for v in m) + ">"  # noqa: E731
    return fmt(lo), fmt(hi)


def _transpose(prefix: str, rows: list[str], out: list[str]) -> list[str]:
    """Emit an 8 × 8 transpose of the ``TVEC`` vectors ``rows``; returns the new names."""
    cur = rows
    for b in range(3):
        lo, hi = _transpose_masks(b)
        nxt = [""] * TILE
        for a in range(TILE):
            if a & (1 << b):
                continue
            a1 = a | (1 << b)
            nxt[a], nxt[a1] = f"%{prefix}.{b}.{a}", f"%{prefix}.{b}.{a1}"
            out.append(f"  {nxt[a]} = shufflevector {TVEC} {cur[a]}, {TVEC} {cur[a1]}, <{TILE} x i32> {lo}")
            out.append(f"  {nxt[a1]} = shufflevector {TVEC} {cur[a]}, {TVEC} {cur[a1]}, <{TILE} x i32> {hi}")
        cur = nxt
    return cur


def _tiles(n_cols: int, to_columns: bool, tag: str, out: list[str]) -> int:
    """The full 8 × 8 tiles between a row-major block (LANES rows × n_cols)
    and its column vectors, one ``VEC`` per column: each tile is loaded as 8
    vectors, transposed and stored as 8. ``to_columns``: rows ``%x`` →
    columns ``%xc`` (the gather), else columns ``%yc`` → rows ``%y`` (the
    scatter). Returns the number of columns the tiles cover."""
    rows_ptr, cols_ptr = ("%x", "%xc") if to_columns else ("%y", "%yc")
    full = n_cols - n_cols % TILE
    for c0 in range(0, full, TILE):
        for h in range(LANES // TILE):
            row_at = [f"ptr {rows_ptr}, i64 {(h * TILE + r) * n_cols + c0}" for r in range(TILE)]
            col_at = [f"ptr {cols_ptr}, i64 {(c0 + a) * LANES + h * TILE}" for a in range(TILE)]
            (src, src_align), (dst, dst_align) = (((row_at, 8), (col_at, 64)) if to_columns
                                                  else ((col_at, 64), (row_at, 8)))
            loaded = []
            for k, at in enumerate(src):
                t = f"%{tag}l{c0}.{h}.{k}"
                out.append(f"  {t}.p = getelementptr inbounds double, {at}")
                out.append(f"  {t} = load {TVEC}, ptr {t}.p, align {src_align}")
                loaded.append(t)
            moved = _transpose(f"{tag}t{c0}.{h}", loaded, out)
            for k, at in enumerate(dst):
                t = f"%{tag}s{c0}.{h}.{k}"
                out.append(f"  {t} = getelementptr inbounds double, {at}")
                out.append(f"  store {TVEC} {moved[k]}, ptr {t}, align {dst_align}")
    return full


def _gather(n_in: int) -> list[str]:
    """Row-major block %x (LANES rows × n_in) → column vectors in %xc: full
    tiles by :func:`_tiles`, columns beyond the last full tile lane by lane."""
    out: list[str] = []
    for j in range(_tiles(n_in, True, "x", out), n_in):
        prev = "poison"
        for k in range(LANES):
            out.append(f"  %xp{j}.{k} = getelementptr inbounds double, ptr %x, i64 {k * n_in + j}")
            out.append(f"  %xl{j}.{k} = load double, ptr %xp{j}.{k}, align 8")
            out.append(f"  %xi{j}.{k} = insertelement {VEC} {prev}, double %xl{j}.{k}, i32 {k}")
            prev = f"%xi{j}.{k}"
        out.append(f"  %xs{j} = getelementptr inbounds {VEC}, ptr %xc, i64 {j}")
        out.append(f"  store {VEC} {prev}, ptr %xs{j}, align 64")
    return out


def _scatter(n_out: int) -> list[str]:
    """Column vectors in %yc → row-major block %y (LANES rows × n_out): full
    tiles by :func:`_tiles`, columns beyond the last full tile lane by lane."""
    out: list[str] = []
    for j in range(_tiles(n_out, False, "y", out), n_out):
        out.append(f"  %yl{j}.p = getelementptr inbounds {VEC}, ptr %yc, i64 {j}")
        out.append(f"  %yl{j} = load {VEC}, ptr %yl{j}.p, align 64")
        for k in range(LANES):
            out.append(f"  %ye{j}.{k} = extractelement {VEC} %yl{j}, i32 {k}")
            out.append(f"  %yp{j}.{k} = getelementptr inbounds double, ptr %y, i64 {k * n_out + j}")
            out.append(f"  store double %ye{j}.{k}, ptr %yp{j}.{k}, align 8")
    return out


def _chunks(fn: Function) -> tuple[list[str], set[str], int, int]:
    chunks, slot, n_slots = _plan(fn)
    home = {i: c for c, rs in enumerate(chunks) for i in rs}
    by_chunk: dict[int, list[int]] = {}
    for k, o in enumerate(fn.outputs):  # inputs and constants: in the last chunk
        by_chunk.setdefault(home.get(o, len(chunks) - 1), []).append(k)
    text, uses = [], set()
    inline = "" if len(chunks) == 1 else " noinline"
    for c, rs in enumerate(chunks):
        em = _Chunk(fn, slot)
        for i in rs:
            em.row(i)
        for k in by_chunk.get(c, []):
            em.store(k, fn.outputs[k])
        uses |= em.uses
        text.append(f"define internal void @tf_part{c}(ptr noalias nocapture readonly %x, "
                    f"ptr noalias nocapture %t, ptr noalias nocapture writeonly %y)"
                    f" nounwind{inline} {{\nentry:")
        text.extend(em.lines)
        text.append("  ret void\n}\n")
    return text, uses, len(chunks), n_slots


# Both drivers: the rows start..end of full blocks, then the tail.
_FULL_BLOCKS = """\
  %n = sub i64 %stop, %start
  %nfull = and i64 %n, -{lanes}
  %end = add i64 %start, %nfull
  %any = icmp slt i64 %start, %end
  br i1 %any, label %body, label %tail
"""

# The last, partial block of both drivers: its rows copied into %xb, the rest 1.0.
_PAD = """\
pad:
  %rx = mul i64 %rem, {n_in}
  br label %fill
fill:
  %f = phi i64 [%rx, %pad], [%f1, %fill]
  %pf = getelementptr inbounds double, ptr %xb, i64 %f
  store double 1.0, ptr %pf, align 8
  %f1 = add i64 %f, 1
  %filling = icmp slt i64 %f1, {n_block_in_1}
  br i1 %filling, label %fill, label %copy
copy:
  %tx = mul i64 %end, {n_in}
  %ptx = getelementptr inbounds double, ptr %X, i64 %tx
  %bx = mul i64 %rx, 8
  call void @llvm.memcpy.p0.p0.i64(ptr align 64 %xb, ptr align 8 %ptx, i64 %bx, i1 false)
"""

_BLOCK = """\
define internal {rtype} @{block}(ptr noalias nocapture readonly %x, ptr noalias nocapture writeonly %y) \
nounwind noinline {{
entry:
  %xc = alloca [{n_cols_in} x {vec}], align 64
  %yc = alloca [{n_cols_out} x {vec}], align 64
  %t = alloca [{n_slots} x {vec}], align 64
{gather}
{calls}
{checks}{scatter}
  ret {ret}
}}

"""

_DRIVER = """\
define i32 @{entry}(ptr noalias nocapture readonly %X, ptr noalias nocapture %Y, i64 %start, \
i64 %stop) nounwind {{
entry:
  %xb = alloca [{n_block_in} x double], align 64
  %yb = alloca [{n_block_out} x double], align 64
{full_blocks}body:
  %i = phi i64 [%start, %entry], [%i1, %next]
  %ix = mul i64 %i, {n_in}
  %iy = mul i64 %i, {n_out}
  %px = getelementptr inbounds double, ptr %X, i64 %ix
  %py = getelementptr inbounds double, ptr %Y, i64 %iy
{check_body}
next:
  call void @tf_block(ptr %px, ptr %py)
  %i1 = add i64 %i, {lanes}
  %again = icmp slt i64 %i1, %end
  br i1 %again, label %body, label %tail
tail:
  %rem = sub i64 %stop, %end
  %has = icmp sgt i64 %rem, 0
  br i1 %has, label %pad, label %exit
{pad}{check_tail}
run_tail:
  call void @tf_block(ptr %xb, ptr %yb)
  %ty = mul i64 %end, {n_out}
  %pty = getelementptr inbounds double, ptr %Y, i64 %ty
  %by = mul i64 %rem, {n_out_bytes}
  call void @llvm.memcpy.p0.p0.i64(ptr align 8 %pty, ptr align 64 %yb, i64 %by, i1 false)
  br label %exit
exit:
  ret i32 0
{refuse}}}
"""

_CHECK_FUNCTION = """\
define internal i64 @tf_check(ptr noalias nocapture readonly %x) nounwind noinline {{
entry:
  br label %scan
scan:
  %k = phi i64 [0, %entry], [%k1, %scan]
  %acc = phi <{lanes} x i1> [zeroinitializer, %entry], [%acc1, %scan]
  %p = getelementptr inbounds {vec}, ptr %x, i64 %k
  %v = load {vec}, ptr %p, align 8
  %good = fcmp ogt {vec} %v, zeroinitializer
  %finite = fcmp olt {vec} %v, {inf}
  %ok = and <{lanes} x i1> %good, %finite
  %bad = xor <{lanes} x i1> %ok, {ones}
  %acc1 = or <{lanes} x i1> %acc, %bad
  %k1 = add nuw i64 %k, 1
  %more = icmp ult i64 %k1, {n_in}
  br i1 %more, label %scan, label %reduce
reduce:
  %mask = bitcast <{lanes} x i1> %acc1 to i{lanes}
  %any = icmp ne i{lanes} %mask, 0
  br i1 %any, label %find, label %fine
fine:
  ret i64 0
find:
  %e = phi i64 [0, %reduce], [%e1, %find]
  %pe = getelementptr inbounds double, ptr %x, i64 %e
  %ve = load double, ptr %pe, align 8
  %ge = fcmp ogt double %ve, 0.0
  %fe = fcmp olt double %ve, 0x7FF0000000000000
  %oke = and i1 %ge, %fe
  %e1 = add nuw i64 %e, 1
  br i1 %oke, label %find, label %found
found:
  %row = udiv i64 %e, {n_in}
  %row1 = add i64 %row, 1
  ret i64 %row1
}}
"""

_CHECK_BODY = """\
  %cb = call i64 @tf_check(ptr %px)
  %cbad = icmp ne i64 %cb, 0
  br i1 %cbad, label %refuse_body, label %next"""

_CHECK_TAIL = """\
  %ct = call i64 @tf_check(ptr %xb)
  %ctbad = icmp ne i64 %ct, 0
  br i1 %ctbad, label %refuse_tail, label %run_tail"""

_REFUSE = """\
refuse_body:
  %rb = add i64 %i, %cb
  %rb32 = trunc i64 %rb to i32
  ret i32 %rb32
refuse_tail:
  %rt = add i64 %end, %ct
  %rt32 = trunc i64 %rt to i32
  ret i32 %rt32
"""


def _check_lines(checks, n_in: int, n_out: int) -> list[str]:
    """The fused row checks of one block (see :class:`~treeflux.runtime.kernel.RowChecks`):
    input column vectors in ``%xc``, output column vectors in ``%yc``; eight
    status bytes returned. Comparisons are ordered (false on NaN), so a
    NaN fails every test; sums fold left to right like the runtime's."""
    vec, mask = VEC, f"<{LANES} x i1>"
    inf, true = _splat(math.inf), "<" + ", ".join(["i1 true"] * LANES) + ">"
    out: list[str] = []

    def col(ptr: str, k: int, tag: str) -> str:
        out.append(f"  %{tag}{k}.p = getelementptr inbounds {vec}, ptr %{ptr}, i64 {k}")
        out.append(f"  %{tag}{k} = load {vec}, ptr %{tag}{k}.p, align 64")
        return f"%{tag}{k}"

    def finite(v: str, tag: str) -> str:
        out.append(f"  %{tag}.a = call {vec} @{FABS}({vec} {v})")
        out.append(f"  %{tag} = fcmp olt {vec} %{tag}.a, {inf}")
        return f"%{tag}"

    def conj(acc: str, ok: str, tag: str) -> str:
        out.append(f"  %{tag} = and {mask} {acc}, {ok}")
        return f"%{tag}"

    ok_in = true
    ivec, umax = f"<{LANES} x i64>", UMAX
    top = "zeroinitializer"  # unsigned maximum of bits - 1 over the positive-and-finite columns
    for j, (low, inclusive) in enumerate(checks.floors):
        v = col("xc", j, "kx")
        if low == 0 and not inclusive:
            # x > 0 and finite ⇔ its bits are 1 .. 0x7FEFFFFFFFFFFFFF (NaN, ±inf,
            # ±0 and negatives are not): bits − 1 (unsigned) ≤ 0x7FEFFFFFFFFFFFFE.
            # Two integer operations per column instead of two compares.
            out.append(f"  %kb{j} = bitcast {vec} {v} to {ivec}")
            out.append(f"  %kc{j} = sub {ivec} %kb{j}, <{', '.join(['i64 1'] * LANES)}>")
            out.append(f"  %kn{j} = call {ivec} @{umax}({ivec} {top}, {ivec} %kc{j})")
            top = f"%kn{j}"
            continue
        if low == -math.inf:
            ok = finite(v, f"kf{j}")
        else:  # above the floor and below +inf: finite (ordered: false on NaN)
            cmp = "oge" if inclusive else "ogt"
            out.append(f"  %kl{j} = fcmp {cmp} {vec} {v}, {_splat(float(low))}")
            out.append(f"  %ku{j} = fcmp olt {vec} {v}, {inf}")
            ok = conj(f"%kl{j}", f"%ku{j}", f"ko{j}")
        ok_in = ok if ok_in == true else conj(ok_in, ok, f"ki{j}")
    if top != "zeroinitializer":
        out.append(f"  %kpos = icmp ule {ivec} {top}, <{', '.join(['i64 9218868437227405310'] * LANES)}>")
        ok_in = "%kpos" if ok_in == true else conj(ok_in, "%kpos", "kall")
    ok_p = true
    for b, (lo, hi) in enumerate(checks.blocks):
        acc = col("yc", lo, f"kp{b}.")
        for k in range(lo + 1, hi):
            v = col("yc", k, f"kp{b}.")
            out.append(f"  %ks{b}.{k} = fadd {vec} {acc}, {v}")
            acc = f"%ks{b}.{k}"
        out.append(f"  %kd{b} = fsub {vec} {acc}, {_splat(1.0)}")
        out.append(f"  %kd{b}.a = call {vec} @{FABS}({vec} %kd{b})")
        out.append(f"  %kt{b} = fcmp ole {vec} %kd{b}.a, {_splat(float(checks.tol))}")
        ok_p = f"%kt{b}" if ok_p == true else conj(ok_p, f"%kt{b}", f"kblk{b}")
    ok_f = true
    lo, hi = checks.finite
    for k in range(lo, hi):
        ok = finite(col("yc", k, "kq"), f"kg{k}")
        ok_f = ok if ok_f == true else conj(ok_f, ok, f"kh{k}")
    status = "zeroinitializer"
    for bit, ok in ((1, ok_in), (2, ok_p), (4, ok_f)):
        if ok == true:
            continue
        one = "<" + ", ".join([f"i8 {bit}"] * LANES) + ">"
        out.append(f"  %kz{bit} = select {mask} {ok}, <{LANES} x i8> zeroinitializer, <{LANES} x i8> {one}")
        out.append(f"  %kw{bit} = or <{LANES} x i8> {status}, %kz{bit}")
        status = f"%kw{bit}"
    out.append(f"  ret <{LANES} x i8> {status}")
    return out


_CHECKED_DRIVER = """\
define i64 @{entry}(ptr noalias nocapture readonly %X, ptr noalias nocapture %Y, \
ptr noalias nocapture %S, i64 %start, i64 %stop) nounwind {{
entry:
  %xb = alloca [{n_block_in} x double], align 64
  %yb = alloca [{n_block_out} x double], align 64
  %sb = alloca [{lanes} x i8], align 8
{full_blocks}body:
  %i = phi i64 [%start, %entry], [%i1, %body]
  %cnt = phi i64 [0, %entry], [%cnt1, %body]
  %ix = mul i64 %i, {n_in}
  %iy = mul i64 %i, {n_out}
  %px = getelementptr inbounds double, ptr %X, i64 %ix
  %py = getelementptr inbounds double, ptr %Y, i64 %iy
  %ps = getelementptr inbounds i8, ptr %S, i64 %i
  %sv = call <{lanes} x i8> @tf_block_checked(ptr %px, ptr %py)
  store <{lanes} x i8> %sv, ptr %ps, align 1
  %nz = icmp ne <{lanes} x i8> %sv, zeroinitializer
  %nzb = bitcast <{lanes} x i1> %nz to i{lanes}
  %pc = call i{lanes} @llvm.ctpop.i{lanes}(i{lanes} %nzb)
  %pc64 = zext i{lanes} %pc to i64
  %cnt1 = add i64 %cnt, %pc64
  %i1 = add i64 %i, {lanes}
  %again = icmp slt i64 %i1, %end
  br i1 %again, label %body, label %tail
tail:
  %cntb = phi i64 [0, %entry], [%cnt1, %body]
  %rem = sub i64 %stop, %end
  %has = icmp sgt i64 %rem, 0
  br i1 %has, label %pad, label %exit
{pad}  %stv = call <{lanes} x i8> @tf_block_checked(ptr %xb, ptr %yb)
  store <{lanes} x i8> %stv, ptr %sb, align 8
  %ty = mul i64 %end, {n_out}
  %pty = getelementptr inbounds double, ptr %Y, i64 %ty
  %by = mul i64 %rem, {n_out_bytes}
  call void @llvm.memcpy.p0.p0.i64(ptr align 8 %pty, ptr align 64 %yb, i64 %by, i1 false)
  %pts = getelementptr inbounds i8, ptr %S, i64 %end
  call void @llvm.memcpy.p0.p0.i64(ptr align 1 %pts, ptr align 8 %sb, i64 %rem, i1 false)
  %stz = icmp ne <{lanes} x i8> %stv, zeroinitializer
  %remv.0 = insertelement <{lanes} x i64> poison, i64 %rem, i32 0
  %remv = shufflevector <{lanes} x i64> %remv.0, <{lanes} x i64> poison, <{lanes} x i32> zeroinitializer
  %real = icmp ult <{lanes} x i64> <{lane_ids}>, %remv
  %stm = and <{lanes} x i1> %stz, %real
  %stb = bitcast <{lanes} x i1> %stm to i{lanes}
  %tc = call i{lanes} @llvm.ctpop.i{lanes}(i{lanes} %stb)
  %tc64 = zext i{lanes} %tc to i64
  %cntt = add i64 %cntb, %tc64
  br label %exit
exit:
  %c = phi i64 [%cntb, %tail], [%cntt, %copy]
  ret i64 %c
}}

declare i{lanes} @llvm.ctpop.i{lanes}(i{lanes})
"""


def emit(fn: Function, *, name: str, check_inputs: bool = False, checks=None) -> dict[str, str]:
    """LLVM IR text of the row-range function of ``fn`` (see the module docstring).

    Parameters
    ----------
    fn : Function
        A compacted Function (``ir.compact``): rows in topological order.
    name : str
        Stem of the file name; it never enters the code.
    check_inputs : bool, optional
        Refuse rows with an input that is not positive and finite (the status
        is row + 1 of the first such row).
    checks : RowChecks, optional
        Also define the checked entry ``i64 @treeflux_checked(ptr X, ptr out,
        ptr status, i64 start, i64 stop)`` (the fused checks of
        :class:`~treeflux.runtime.kernel.RowChecks`; returns the number of
        flagged rows).

    Returns
    -------
    dict
        ``{"<name>.ll": text}``; the same Function always gives the same bytes.
    """
    if not name or "/" in name or "\\" in name:
        raise ValueError(f"llvm back end: bad file stem {name!r}")
    _check_function(fn)
    rows = sum(op not in ("const", "input") for op in fn.graph.ops)
    if rows > MAX_ROWS:
        raise TooLargeError(f"llvm back end: the body has {rows} operation rows, above the "
                            f"limit of {MAX_ROWS} for straight-line code; use the looped "
                            "numeric path (method='numeric')")
    n_in, n_out = fn.n_inputs, len(fn.outputs)
    parts, uses, n_chunks, n_slots = _chunks(fn)
    check = check_inputs and n_in > 0
    calls = "\n".join(f"  call void @tf_part{c}(ptr %xc, ptr %t, ptr %yc)" for c in range(n_chunks))
    block = dict(calls=calls, vec=VEC, n_slots=max(n_slots, 1), n_cols_in=max(n_in, 1),
                 n_cols_out=max(n_out, 1), gather="\n".join(_gather(n_in)),
                 scatter="\n".join(_scatter(n_out)))
    driver = _BLOCK.format(block="tf_block", rtype="void", ret="void", checks="", **block)
    pad = _PAD.format(n_in=n_in, n_block_in_1=LANES * n_in)
    full_blocks = _FULL_BLOCKS.format(lanes=LANES)
    if checks is not None:
        status = f"<{LANES} x i8>"
        driver += _BLOCK.format(block="tf_block_checked", rtype=status, ret=f"{status} %status",
                                checks=f"  %status = call {status} @tf_check(ptr %xc, ptr %yc)\n", **block)
        driver += (f"define internal {status} @tf_check(ptr noalias nocapture readonly %xc, ptr noalias "
                   "nocapture readonly %yc) nounwind noinline {\nentry:\n"
                   + "\n".join(_check_lines(checks, n_in, n_out)) + "\n}\n\n")
        driver += _CHECKED_DRIVER.format(entry=CHECKED_ENTRY, lanes=LANES, pad=pad, full_blocks=full_blocks,
                                         lane_ids=", ".join(f"i64 {k}" for k in range(LANES)), n_in=n_in, n_out=n_out,
                                         n_block_in=LANES * max(n_in, 1), n_block_in_1=LANES * n_in,
                                         n_block_out=LANES * max(n_out, 1), n_out_bytes=8 * n_out)
        uses |= {FABS, UMAX}
    driver += _DRIVER.format(
        pad=pad, full_blocks=full_blocks, entry=ENTRY, vec=VEC, lanes=LANES, n_in=n_in, n_out=n_out,
        n_slots=max(n_slots, 1), n_cols_in=max(n_in, 1), n_cols_out=max(n_out, 1),
        gather="\n".join(_gather(n_in)), scatter="\n".join(_scatter(n_out)),
        n_block_in=LANES * max(n_in, 1), n_block_in_1=LANES * n_in,
        n_block_out=LANES * max(n_out, 1), n_out_bytes=8 * n_out,
        check_body=_CHECK_BODY if check else "  br label %next",
        check_tail=_CHECK_TAIL if check else "  br label %run_tail",
        refuse=_REFUSE if check else "")
    decls = [f"declare {_TYPE.get(u, VEC)} @{u}({', '.join([_TYPE.get(u, VEC)] * _ARITY.get(u, 1))})"
             for u in sorted(uses)]
    decls.append("declare void @llvm.memcpy.p0.p0.i64(ptr noalias nocapture writeonly, "
                 "ptr noalias nocapture readonly, i64, i1 immarg)")
    head = (f"; treeflux steady-state kernel: {n_in} inputs, {n_out} outputs, "
            f"{len(fn.graph)} IR rows, {n_chunks} chunk(s), blocks of {LANES} rows\n"
            "; generated code: model predictions of a kinetic scheme\n")
    checker = _CHECK_FUNCTION.format(lanes=LANES, vec=VEC, n_in=n_in, inf=_splat(math.inf),
                                     ones="<" + ", ".join(["i1 true"] * LANES) + ">") if check else ""
    text = head + "\n".join(decls) + "\n\n" + "\n".join(parts) + "\n" + driver + checker
    return {f"{name}.ll": text}


# ------------------------------------------------------------------ JIT

_INIT_LOCK = threading.Lock()
_COMPILE_LOCK = threading.Lock()
_READY = False


def _llvm():
    """llvmlite's binding layer with the native target initialised (once)."""
    global _READY
    import llvmlite.binding as llvm

    with _INIT_LOCK:
        if not _READY:
            llvm.initialize_native_target()
            llvm.initialize_native_asmprinter()
            libm = ctypes.util.find_library("m")
            if libm:  # exp, log, pow of the lowered intrinsics resolve here
                llvm.load_library_permanently(libm)
            _READY = True
    return llvm


def _target_machine(llvm):
    target = llvm.Target.from_default_triple()
    return target.create_target_machine(cpu=llvm.get_host_cpu_name(),
                                        features=llvm.get_host_cpu_features().flatten(),
                                        opt=SPEED_LEVEL, codemodel="jitdefault", jit=True)


def compile_text(text: str, n_inputs: int, n_outputs: int) -> Kernel:
    """JIT-compile IR text from :func:`emit` into a :class:`Kernel`.

    Parses and verifies the module, sets the host triple and data layout,
    optimises it with the new pass manager (loop and SLP vectorisers off:
    the code is already written in vectors) and compiles it with MCJIT. The
    kernel's recipe rebuilds it from the same text (pickling for workers).
    """
    llvm = _llvm()
    with _COMPILE_LOCK:  # llvmlite shares one LLVM context per process
        mod = llvm.parse_assembly(text)
        mod.verify()
        tm = _target_machine(llvm)
        mod.triple = tm.triple
        mod.data_layout = str(tm.target_data)
        pto = llvm.create_pipeline_tuning_options(speed_level=SPEED_LEVEL)
        pto.loop_vectorization = False
        pto.slp_vectorization = False
        pto.loop_unrolling = False
        pb = llvm.create_pass_builder(tm, pto)
        pb.getModulePassManager().run(mod, pb)
        engine = llvm.create_mcjit_compiler(mod, tm)  # takes ownership of tm
        engine.finalize_object()
        address = engine.get_function_address(ENTRY)
        checked_address = engine.get_function_address(CHECKED_ENTRY) if CHECKED_ENTRY in text else 0
    proto = ctypes.CFUNCTYPE(ctypes.c_int32, ctypes.c_void_p, ctypes.c_void_p,
                             ctypes.c_int64, ctypes.c_int64)
    cfunc = proto(address)

    def run(X, out, start, stop):
        return cfunc(X.ctypes.data, out.ctypes.data, int(start), int(stop))

    checked = cchecked = None
    if checked_address:
        cchecked = ctypes.CFUNCTYPE(ctypes.c_int64, ctypes.c_void_p, ctypes.c_void_p, ctypes.c_void_p,
                                    ctypes.c_int64, ctypes.c_int64)(checked_address)

        def checked(X, out, status, start, stop):
            return cchecked(data_address(X), data_address(out), data_address(status), start, stop)

    return Kernel(run, n_inputs, n_outputs, backend="llvm",
                  recipe=(compile_text, (text, n_inputs, n_outputs)),
                  keepalive=(engine, cfunc, cchecked), checked=checked,
                  native=(address, checked_address))


def build(fn: Function, *, name: str = "treeflux_model", check_inputs: bool = False,
          checks=None) -> Kernel:
    """Emit ``fn`` (see :func:`emit`) and JIT-compile it in this process."""
    (text,) = emit(fn, name=name, check_inputs=check_inputs, checks=checks).values()
    with progress("native compilation (LLVM)", total=1, unit="module") as bar:
        kernel = compile_text(text, fn.n_inputs, len(fn.outputs))
        bar.update(1)
    return kernel

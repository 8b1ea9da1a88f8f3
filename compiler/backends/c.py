"""C back end: C99 source and header over blocks of eight parameter sets.

The emitted function evaluates a compacted :class:`~treeflux.compiler.ir.Function`
for many rows of inputs. Rows are taken eight at a time and laid out side by
side: input ``j`` of the block is one *row* ``in[j]`` holding its value for
the eight lanes. With GNU C (gcc, clang) a row is a vector of eight doubles
and each sum, product, quotient or negation of the IR is one vector statement
(``TF_ROW``); libm calls and helpers run lane by lane (``TF_LANEWISE``).
Elsewhere, or with ``-DTF_PORTABLE``, a row is ``double[8]`` and every
statement is a loop over the lanes: the same operations in the same order,
hence the same bits. The last, partial block is padded with a copy of its
last row and only its real rows are written back.

Why vector statements: written as one lane loop per IR row, the optimiser
analyses every loop (induction variables, dependences, SLP); measured here
the Q4 Jacobian body (10,649 rows) took 200-590 s and a 400-state chain 35 s
and 1.4 GB under gcc -O3. As vector statements they take about 3 s and 0.5 s
(``benches/bench_compile.py``).

Temporaries live in one workspace ``w[S]`` of rows; a slot is reused as soon
as the value it holds has had its last use (linear-scan allocation over the
topological row order, lowest free slot first). The body, and the copies of
the outputs into the result rows, are split into non-inlined functions of
:data:`CHUNK_ROWS` statements that share the workspace: gcc's alias walk is
quadratic in the memory accesses of one function. Bodies above
:data:`O1_ROWS` rows compile at ``-O1`` (:func:`flags_for`).

The ABI is written into the header; :func:`emit` is deterministic (same
Function and name, same bytes). Inputs and outputs are positions; emitted for
a model (an :class:`~.naming.Interface`), the header also declares the
model's names as escaped string literals, index constants derived from them,
the default values and the output layout, and every row is checked (rates
positive and finite, results probability vectors) before it is written.
User text enters the code only through :mod:`.naming`.
"""

from __future__ import annotations

import ctypes
import hashlib
import heapq
import re
from fractions import Fraction

from treeflux.runtime.cache import NATIVE_FLAGS
from treeflux.runtime.kernel import Kernel, data_address
from treeflux.runtime.progress import progress

from ..ir import Function
from .naming import (Interface, c_constants, c_string, check_c_names, probability_blocks,
                     probability_tolerance)

LANES = 8
#: Rows per non-inlined part function when a body is split.
CHUNK_ROWS = 150
#: Integer exponents up to this magnitude become multiplications.
POWI_LIMIT = 64
#: Most operands of one emitted sum, product or maximum; longer ones are split.
MAX_OPERANDS = 32

BASE_FLAGS = ("-std=c99", *NATIVE_FLAGS, "-fno-math-errno")
#: Bodies with more computed rows than this compile at -O1 (see :func:`flags_for`).
O1_ROWS = 5_000


def c_identifier(name: str) -> str:
    """``name`` made into a C identifier: other characters become ``_``; a
    leading digit or underscore gets the prefix ``tf_``.

    >>> c_identifier("my-model.v2")
    'my_model_v2'
    """
    ident = re.sub(r"[^A-Za-z0-9_]", "_", str(name))
    if not ident or not ident[0].isalpha():
        ident = "tf_" + ident
    return ident


def flags_for(fn: Function | None) -> tuple[str, ...]:
    """Compiler flags for the body of ``fn`` (shared with the Cython back end).

    ``-O3`` up to :data:`O1_ROWS` computed rows, ``-O1`` above. The body is
    explicit vector statements, so ``-O1`` keeps it vectorised; what it gives
    up is the driver's loop tuning, measured here (one run, loaded machine,
    N = 200,000): Q3 47 → 60 ns, Q4 130 → 158 ns per set at ``-O1``, while the
    Q4 Jacobian body (10,649 rows) runs the same at both (2.3 µs) and the
    128-state body compiles in 20 s of CPU at ``-O1`` against 31 s at
    ``-O3``. Both levels give the same bits (no contraction under
    ``-std=c99``, no value-changing options)."""
    big = fn is not None and computed_rows(fn) > O1_ROWS
    return ("-O1" if big else "-O3", *BASE_FLAGS)


def computed_rows(fn: Function) -> int:
    return sum(op not in ("const", "input") for op in fn.graph.ops)


# ------------------------------------------------------------------ shared lowering

def literal(value: Fraction) -> str:
    """A double literal that reads back as the nearest double to ``value``
    (``repr`` is the shortest round-tripping decimal; C and Python parse it
    correctly rounded). Negative literals come parenthesised."""
    try:
        x = float(value)
    except OverflowError:
        raise ValueError(f"constant {value} does not fit in a double") from None
    text = repr(x)
    if "e" not in text and "." not in text:
        text += ".0"
    return f"({text})" if x < 0 or text.startswith("-") else text


def integer_exponent(fn: Function, node: int) -> int | None:
    """The exponent of a ``pow`` row when it is a small integer constant, else None."""
    g = fn.graph
    e = g.args[node][1]
    if g.ops[e] == "const" and g.data[e].denominator == 1 and abs(g.data[e]) <= POWI_LIMIT:
        return int(g.data[e])
    return None


def powi_text(base: str, n: int, helper: str) -> str:
    """``base ** n`` for a small integer ``n``: products up to n = 4, else the
    square-and-multiply helper; a negative exponent is one division."""
    m = abs(n)
    if m == 0:
        return "1.0"
    body = " * ".join([base] * m) if m <= 4 else f"{helper}({base}, {m})"
    return f"1.0 / ({body})" if n < 0 else body


def expression(fn: Function, i: int, ref, *, max2: str, powi: str) -> str:
    """Right-hand side of IR row ``i``; ``ref(node)`` spells an operand.

    n-ary sums and products fold left to right (the order of the reference
    evaluator); ``max`` nests the two-operand helper ``max2``."""
    g = fn.graph
    op, args = g.ops[i], g.args[i]
    xs = [ref(a) for a in args]
    if op == "add":
        return " + ".join(xs)
    if op == "mul":
        return " * ".join(xs)
    if op == "div":
        return f"{xs[0]} / {xs[1]}"
    if op == "sub":
        return f"{xs[0]} - {xs[1]}"
    if op == "neg":
        return f"-{xs[0]}"
    if op in ("exp", "log", "sqrt"):
        return f"{op}({xs[0]})"
    if op == "max":
        text = xs[0]
        for x in xs[1:]:
            text = f"{max2}({text}, {x})"
        return text
    if op == "pow":
        n = integer_exponent(fn, i)
        return f"pow({xs[0]}, {xs[1]})" if n is None else powi_text(xs[0], n, powi)
    raise ValueError(f"IR row {i}: op {op!r} has no lowering")


def expression_parts(fn: Function, i: int, ref, *, acc: str, max2: str, powi: str) -> list[str]:
    """Right-hand sides that compute IR row ``i`` in statements of bounded
    depth: the first starts the value, each further one continues from the
    accumulator ``acc``. Only sums, products and maxima of more than
    :data:`MAX_OPERANDS` operands take several (folded left to right, so the
    rounding is that of one long expression); parsers such as Cython's
    recurse once per operand of a long expression."""
    g = fn.graph
    op, args = g.ops[i], g.args[i]
    if op not in ("add", "mul", "max") or len(args) <= MAX_OPERANDS:
        return [expression(fn, i, ref, max2=max2, powi=powi)]
    xs = [ref(a) for a in args]
    if op == "max":
        first = xs[0]
        for x in xs[1:MAX_OPERANDS]:
            first = f"{max2}({first}, {x})"
        return [first, *(f"{max2}({acc}, {x})" for x in xs[MAX_OPERANDS:])]
    sign = " + " if op == "add" else " * "
    step = MAX_OPERANDS - 1
    return [sign.join(xs[:MAX_OPERANDS]),
            *(sign.join([acc, *xs[k:k + step]]) for k in range(MAX_OPERANDS, len(xs), step))]


def allocate_slots(fn: Function) -> tuple[dict[int, int], int]:
    """Workspace slot of every computed row, reusing slots after a value's last use.

    Outputs stay live to the end. Deterministic: the lowest free slot is taken."""
    g = fn.graph
    n = len(g)
    last = [-1] * n
    for i, args in enumerate(g.args):
        for a in args:
            last[a] = i
    for o in fn.outputs:
        last[o] = n
    dying: dict[int, list[int]] = {}
    for node, t in enumerate(last):
        dying.setdefault(t, []).append(node)
    slot: dict[int, int] = {}
    free: list[int] = []
    top = 0
    for i, op in enumerate(g.ops):
        if op in ("const", "input"):
            continue
        for a in dying.get(i, ()):  # operands whose last use is this row
            if a in slot:
                heapq.heappush(free, slot[a])
        if free:
            slot[i] = heapq.heappop(free)
        else:
            slot[i] = top
            top += 1
    return slot, top


# ------------------------------------------------------------------ emission

_HEADER = """\
/* {name}.h -- generated by treeflux (C back end). Do not edit.
   Outputs are model predictions of a kinetic scheme, not measurements.

   ABI
   ---
   int {name}_eval(const double *x, double *out, long n_rows);
   int {name}_eval_range(const double *x, double *out, long start, long stop);

   x   is row-major (n_rows, {name}_n_inputs): row r holds one parameter set,
       x[r*{name}_n_inputs + j] is input j (the order of the model's symbols).
   out is row-major (n_rows, {name}_n_outputs): out[r*{name}_n_outputs + k]
       receives output k of row r.
   _eval_range evaluates rows start .. stop-1 of the same full arrays (disjoint
   ranges may run in different threads: the functions keep no state).

{returns}
   {name}_version is "sha256:" and the SHA-256 of the text of {name}.c up to
   the line that defines it.
   Needs only the C standard library and libm (link with -lm).
*/
#ifndef {guard}
#define {guard}

#ifdef __cplusplus
extern "C" {{
#endif

#define {upper}_N_INPUTS {n_in}
#define {upper}_N_OUTPUTS {n_out}
{names}
extern const int {name}_n_inputs;
extern const int {name}_n_outputs;
extern const char {name}_version[];

int {name}_eval(const double *x, double *out, long n_rows);
int {name}_eval_range(const double *x, double *out, long start, long stop);

#ifdef __cplusplus
}}
#endif

#endif
"""

_PRELUDE = """\
/* {name}.c -- generated by treeflux (C back end). Do not edit; see {name}.h. */
#include <limits.h>
#include <math.h>
#include "{name}.h"

{rows}#define TF_NI {n_in_dim}
#define TF_NO {n_out}
#define TF_NR {n_res}
#define TF_NW {n_slots}

const int {name}_n_inputs = {n_in};
const int {name}_n_outputs = {n_out};
"""

_ROWS = """\
#define TF_LANES 8

/* A row holds one value for each of the TF_LANES parameter sets of a block.
   With GNU C (gcc, clang) it is a vector of doubles and a body row is one
   vector statement: no loops for the optimiser to analyse, so big bodies
   compile in seconds. Elsewhere (or with -DTF_PORTABLE) it is an array and
   every row is a loop over the lanes. Same operations in the same order,
   correctly rounded either way: the same bits. */
#if defined(__GNUC__) && !defined(TF_PORTABLE)
#define TF_NOINLINE __attribute__((noinline))
#define TF_ALIGNED __attribute__((aligned(TF_LANES * sizeof(double))))
typedef double tf_row __attribute__((vector_size(TF_LANES * sizeof(double))));
#define TF_ROW(...) do { __VA_ARGS__; } while (0)
#define TF_V(r) (r)
#define TF_T tf_row
#else
#define TF_NOINLINE
#define TF_ALIGNED
typedef double tf_row[TF_LANES];
#define TF_ROW(...) for (b = 0; b < TF_LANES; b++) { __VA_ARGS__; }
#define TF_V(r) (r)[b]
#define TF_T double
#endif
/* One lane of a row, in either form (lane b), and a loop over the lanes. */
#define TF_L(r) (r)[b]
#define TF_LANEWISE(...) for (b = 0; b < TF_LANES; b++) { __VA_ARGS__; }
"""

#: Helpers, each emitted only when the body calls it.
_HELPERS = {
    "tf_max2": "static double tf_max2(double a, double b) { return a > b ? a : b; }\n",
    "tf_powi": """\
static double tf_powi(double a, int m)
{
    double r = 1.0;
    while (m) {
        if (m & 1) r *= a;
        a *= a;
        m >>= 1;
    }
    return r;
}
""",
}

_DRIVER = """\
int {name}_eval_range(const double *x, double *out, long start, long stop)
{{
    TF_ALIGNED double in[TF_NI][TF_LANES];
    TF_ALIGNED double res[TF_NR][TF_LANES];
    long r0;
    for (r0 = start; r0 < stop; r0 += TF_LANES) {{
        int n = stop - r0 < TF_LANES ? (int)(stop - r0) : TF_LANES;
        int b, j, k, bad = n;
        for (b = 0; b < TF_LANES; b++) {{
            const double *row = x + (r0 + (b < n ? b : n - 1)) * (long){n_in};
            for (j = 0; j < {n_in}; j++) in[j][b] = row[j];
        }}
        for (b = 0; b < n && bad == n; b++)
            for (j = 0; j < {n_in}; j++)
                if (!isfinite(in[j][b])) {{ bad = b; break; }}
        tf_block((const tf_row *)in, (tf_row *)res);
{validate}        for (b = 0; b < bad; b++) {{
            double *row = out + (r0 + b) * (long)TF_NO;
            for (k = 0; k < TF_NO; k++) row[k] = res[k][b];
        }}
        if (bad < n) {{
            long r = r0 + bad + 1;
            return r > INT_MAX ? INT_MAX : (int)r;
        }}
    }}
    return 0;
}}

int {name}_eval(const double *x, double *out, long n_rows)
{{
    return {name}_eval_range(x, out, 0, n_rows);
}}
"""


_RETURNS_INPUTS = """\
   Returns 0 when every row was evaluated, else r+1 where r is the first row
   holding a non-finite input (NaN or +-inf); rows before r are written, rows
   from r on are not (the value is capped at INT_MAX). This is the only check:
   rates must also be positive, which the caller validates (treeflux's Python
   runtime does); non-positive inputs are evaluated as given.
"""

_RETURNS_CHECKED = """\
   Returns 0 when every row was evaluated, else r+1 where r is the first row
   refused (the value is capped at INT_MAX): a non-finite input (NaN or
   +-inf), a rate (edge label) at that row that is not positive and finite --
   a zero concentration removes an edge, which this straight-line code cannot
   do: solve such rows with treeflux itself -- or a result that is not finite
   or not a probability vector (entries in [0, 1] summing to 1 within
   rounding). Rows before r are written, rows from r on are not.
"""

_VALIDATE = """\
static int tf_valid(const double (*res)[TF_LANES], int b)
{{
    int k;
    double s;
    (void)s;
    for (k = TF_NO; k < TF_NR; k++)
        if (!(res[k][b] > 0.0) || !isfinite(res[k][b])) return 0;
    for (k = 0; k < TF_NO; k++)
        if (!isfinite(res[k][b])) return 0;
{blocks}    return 1;
}}

"""

_VALIDATE_BLOCK = """\
    s = 0.0;
    for (k = {a}; k < {b}; k++) {{
        if (!(res[k][b] >= 0.0 && res[k][b] <= 1.0)) return 0;
        s += res[k][b];
    }}
    if (fabs(s - 1.0) > {tol}) return 0;
"""


#: IR ops that are one arithmetic expression over whole rows (vector
#: statements in GNU C); the others (libm calls, helpers) run lane by lane.
ROW_OPS = frozenset({"add", "mul", "div", "sub", "neg"})


def _row_statement(fn: Function, i: int, ref_row, ref_lane, target: int) -> str:
    """The statement of IR row ``i`` writing workspace slot ``target``.

    Sums, products, quotients and negations are whole-row expressions
    (``TF_ROW``, operands ``TF_V(...)``); everything else runs lane by lane
    (``TF_LANEWISE``, operands ``TF_L(...)``), as does a row of constants
    only (a scalar cannot be assigned to a vector). A long row accumulates in a
    local ``t`` (a row, or a lane)."""
    g = fn.graph
    row = g.ops[i] in ROW_OPS and any(g.ops[a] != "const" for a in g.args[i])
    ref = ref_row if row else ref_lane
    wrap, acc, kind = ("TF_ROW", "t", "tf_row") if row else ("TF_LANEWISE", "t", "double")
    dest = f"TF_V(w[{target}])" if row else f"TF_L(w[{target}])"
    parts = expression_parts(fn, i, ref, acc=acc, max2="tf_max2", powi="tf_powi")
    if len(parts) == 1:
        return f"    {wrap}({dest} = {parts[0]});\n"
    if row:  # portable form: t is one lane; GNU form: t is a row
        kind = "TF_T"
    body = "".join([f"        {kind} t = {parts[0]};\n", *(f"        t = {p};\n" for p in parts[1:]),
                    f"        {dest} = t;\n"])
    return f"    {wrap}(\n{body}    );\n"


def block_layout(fn: Function, *, input_ref, slot_ref):
    """What every block-of-lanes emitter (C, Cython) needs: the workspace slot
    of each computed row, the slot count, ``ref(node)`` naming a node's lane
    value (``input_ref(column)``, ``slot_ref(slot)``, or a literal), and the
    computed rows split into parts of at most :data:`CHUNK_ROWS`."""
    g = fn.graph
    slot, n_slots = allocate_slots(fn)

    def ref(node: int) -> str:
        op = g.ops[node]
        if op == "const":
            return literal(g.data[node])
        if op == "input":
            return input_ref(g.data[node])
        return slot_ref(slot[node])

    rows = [i for i, op in enumerate(g.ops) if op not in ("const", "input")]
    parts = [rows[k:k + CHUNK_ROWS] for k in range(0, len(rows), CHUNK_ROWS)]
    return slot, n_slots, ref, parts


def _body(fn: Function) -> str:
    """The block function(s): input rows ``in[j]``, workspace ``w``, results ``res``.

    Both the IR rows and the copies of the outputs into ``res`` go into
    non-inlined parts of at most :data:`CHUNK_ROWS` statements that share
    the workspace: gcc's alias walk and SLP vectoriser are quadratic in the
    memory accesses of one function (one function of a thousand output
    copies cost 24 s and 1.3 GB on a 400-state chain)."""
    slot, n_slots, ref_row, parts = block_layout(fn, input_ref=lambda j: f"TF_V(in[{j}])",
                                                 slot_ref=lambda k: f"TF_V(w[{k}])")
    _, _, ref_lane, _ = block_layout(fn, input_ref=lambda j: f"TF_L(in[{j}])",
                                     slot_ref=lambda k: f"TF_L(w[{k}])")
    g = fn.graph
    parts = parts or [[]]
    out = []
    sig = "const tf_row *restrict in, tf_row *restrict w"
    for p, chunk in enumerate(parts):
        out.append(f"static TF_NOINLINE void tf_part{p}({sig})\n{{\n    int b;\n")
        out.append("    (void)in; (void)w; (void)b;\n")
        out.extend(_row_statement(fn, i, ref_row, ref_lane, slot[i]) for i in chunk)
        out.append("}\n\n")
    stores = list(enumerate(fn.outputs))
    store_parts = [stores[k:k + CHUNK_ROWS] for k in range(0, len(stores), CHUNK_ROWS)]
    sig = "const tf_row *restrict in, const tf_row *restrict w, tf_row *restrict res"
    for p, chunk in enumerate(store_parts):
        out.append(f"static TF_NOINLINE void tf_store{p}({sig})\n{{\n    int b;\n")
        out.append("    (void)in; (void)w; (void)b;\n")
        for k, o in chunk:
            if g.ops[o] == "const":  # a scalar: lane by lane
                out.append(f"    TF_LANEWISE(TF_L(res[{k}]) = {ref_lane(o)});\n")
            else:
                out.append(f"    TF_ROW(TF_V(res[{k}]) = {ref_row(o)});\n")
        out.append("}\n\n")
    out.append("static void tf_block(const tf_row *restrict in, tf_row *restrict res)\n{\n")
    out.append("    tf_row w[TF_NW];\n")
    for p in range(len(parts)):
        out.append(f"    tf_part{p}(in, w);\n")
    for p in range(len(store_parts)):
        out.append(f"    tf_store{p}(in, (const tf_row *)w, res);\n")
    out.append("}\n\n")
    return "".join(out), n_slots


def block_source(fn: Function) -> tuple[str, int]:
    """The C text that evaluates ``fn`` on one block of lanes, shared by the
    C and Cython back ends: the row type and its macros, the helpers the body
    calls, the parts, and ``tf_block(in, res)`` (input rows in, output rows
    res). Needs ``TF_NI``, ``TF_NR`` and ``TF_NW`` defined before it (the
    slot count is returned) and ``<math.h>``."""
    body, n_slots = _body(fn)
    helpers = "".join("\n" + text for h, text in _HELPERS.items() if h + "(" in body)
    return _ROWS + helpers + "\n" + body, n_slots


def floor_runs(floors) -> list[tuple[int, int, float, bool]]:
    """Contiguous runs ``(start, stop, low, inclusive)`` of inputs sharing a floor."""
    runs: list = []
    for j, (low, inclusive) in enumerate(floors):
        if runs and runs[-1][2:] == (low, inclusive):
            runs[-1] = (runs[-1][0], j + 1, low, inclusive)
        else:
            runs.append((j, j + 1, low, inclusive))
    return runs


def check_source(checks) -> str:
    """``tf_check(in, res, st)``: the fused row checks of one block (see
    :class:`~treeflux.runtime.kernel.RowChecks`), shared by the C and Cython
    back ends. ``in[j][b]`` is input j of lane b, ``res[k][b]`` output k; the
    status byte of lane b goes to ``st[b]``. Lane loops of fixed length that
    gcc vectorises; comparisons are false on NaN, sums fold left to right."""
    lines = ["static void tf_check(const double (*restrict in)[TF_LANES], "
             "const double (*restrict res)[TF_LANES], unsigned char *restrict st)",
             "{", "    int b, k;", "    double s[TF_LANES];", "    unsigned char bad[TF_LANES];",
             "    unsigned long long top[TF_LANES];", "    (void)k; (void)s; (void)top;",
             "    for (b = 0; b < TF_LANES; b++) bad[b] = 0;"]
    for a, z, low, inclusive in floor_runs(checks.floors):
        if low == 0 and not inclusive:
            # x > 0 and finite <=> its bits are 1 .. 0x7FEFFFFFFFFFFFFF (NaN, +-inf,
            # +-0 and negatives are not): two integer operations per value
            lines.append("    for (b = 0; b < TF_LANES; b++) top[b] = 0;")
            lines.append(f"    for (k = {a}; k < {z}; k++)")
            lines.append("        for (b = 0; b < TF_LANES; b++) {")
            lines.append("            unsigned long long u;")
            lines.append("            memcpy(&u, &in[k][b], sizeof u);")
            lines.append("            u -= 1;")
            lines.append("            top[b] = u > top[b] ? u : top[b];")
            lines.append("        }")
            lines.append("    for (b = 0; b < TF_LANES; b++) bad[b] |= top[b] > 0x7FEFFFFFFFFFFFFEULL;")
            continue
        if low == float("-inf"):
            test = "fabs(in[k][b]) < HUGE_VAL"
        else:
            test = f"(in[k][b] {'>=' if inclusive else '>'} {literal(Fraction(low))}) & (in[k][b] < HUGE_VAL)"
        lines.append(f"    for (k = {a}; k < {z}; k++)")
        lines.append(f"        for (b = 0; b < TF_LANES; b++) bad[b] |= !({test});")
    for a, z in checks.blocks:
        lines.append(f"    for (b = 0; b < TF_LANES; b++) s[b] = res[{a}][b];")
        if z - a > 1:
            lines.append(f"    for (k = {a + 1}; k < {z}; k++)")
            lines.append("        for (b = 0; b < TF_LANES; b++) s[b] += res[k][b];")
        lines.append(f"    for (b = 0; b < TF_LANES; b++) bad[b] |= (!(fabs(s[b] - 1.0) <= "
                     f"{literal(Fraction(checks.tol))})) << 1;")
    a, z = checks.finite
    if z > a:
        lines.append(f"    for (k = {a}; k < {z}; k++)")
        lines.append("        for (b = 0; b < TF_LANES; b++) bad[b] |= (!(fabs(res[k][b]) < HUGE_VAL)) << 2;")
    lines += ["    for (b = 0; b < TF_LANES; b++) st[b] = bad[b];", "}", ""]
    return "#include <string.h>\n" + "\n".join(lines) + "\n"


_CHECKED_DRIVER = """\
long {name}_eval_checked(const double *x, double *out, unsigned char *status, long start, long stop)
{{
    TF_ALIGNED double in[TF_NI][TF_LANES];
    TF_ALIGNED double res[TF_NR][TF_LANES];
    unsigned char st[TF_LANES];
    long r0, count = 0;
    for (r0 = start; r0 < stop; r0 += TF_LANES) {{
        int n = stop - r0 < TF_LANES ? (int)(stop - r0) : TF_LANES;
        int b, j, k;
        for (b = 0; b < TF_LANES; b++) {{
            const double *row = x + (r0 + (b < n ? b : n - 1)) * (long){n_in};
            for (j = 0; j < {n_in}; j++) in[j][b] = row[j];
        }}
        tf_block((const tf_row *)in, (tf_row *)res);
        tf_check((const double (*)[TF_LANES])in, (const double (*)[TF_LANES])res, st);
        for (b = 0; b < n; b++) {{
            double *row = out + (r0 + b) * (long)TF_NO;
            for (k = 0; k < TF_NO; k++) row[k] = res[k][b];
            status[r0 + b] = st[b];
            count += st[b] != 0;
        }}
    }}
    return count;
}}
"""


def emit(fn: Function, *, name: str, interface: Interface | None = None,
         checks=None) -> dict[str, str]:
    """C99 source and header for ``fn``.

    Parameters
    ----------
    fn : Function
        A compacted Function (rows live and in topological order).
    name : str
        Prefix of the exported symbols, sanitised by :func:`c_identifier`.
    interface : Interface, optional
        The model's names, defaults and layout (:mod:`.naming`): the header
        then declares name arrays, index constants and defaults, and the last
        ``interface.checks`` outputs of ``fn`` are rates that every row checks
        (with its results) before it is written; see the header's ABI text.

    Returns
    -------
    dict
        ``{"<name>.c": source, "<name>.h": header}``; the ABI is in the header.

    With ``checks`` (the kernels built for the runtime; never with an
    interface) the source also defines ``long <name>_eval_checked(x, out,
    status, start, stop)``: every row evaluated and written, one status byte
    per row (:class:`~treeflux.runtime.kernel.RowChecks`), the number of
    flagged rows returned. The emitted public ABI is unchanged.
    """
    if checks is not None and interface is not None:
        raise ValueError("checks are for runtime kernels, which carry no interface")
    name = c_identifier(name)
    n_in, n_res = fn.n_inputs, len(fn.outputs)
    n_out = n_res - (interface.checks if interface else 0)
    if n_out <= 0:
        raise ValueError("a function with no outputs has nothing to emit")
    body, n_slots = _body(fn)
    fields = dict(name=name, n_in=n_in, n_in_dim=max(1, n_in), n_out=n_out, n_res=n_res,
                  n_slots=max(1, n_slots), validate="", rows=_ROWS)
    helpers = "".join("\n" + text for h, text in _HELPERS.items() if h + "(" in body)
    names_h = names_c = ""
    if interface is not None:
        names_h, names_c = _name_tables(interface, name)
        fields["validate"] = ("        for (b = 0; b < bad; b++)\n"
                              "            if (!tf_valid((const double (*)[TF_LANES])res, b)) "
                              "{ bad = b; break; }\n")
        blocks = "".join(_VALIDATE_BLOCK.format(a=a, b=b, tol=literal(probability_tolerance(b - a)))
                         for a, b in probability_blocks(interface))
        helpers += "\n" + _VALIDATE.format(blocks=blocks)
    text = (_PRELUDE.format(**fields) + names_c + helpers + "\n" + body + _DRIVER.format(**fields)
            + "\n")
    if checks is not None:
        text += check_source(checks) + "\n" + _CHECKED_DRIVER.format(**fields) + "\n"
    digest = hashlib.sha256(text.encode()).hexdigest()  # of every line above the version
    text += f'const char {name}_version[] = "sha256:{digest}";\n'
    header = _HEADER.format(name=name, guard=f"TREEFLUX_{name.upper()}_H",
                            upper=name.upper(), n_in=n_in, n_out=n_out, names=names_h,
                            returns=_RETURNS_CHECKED if interface else _RETURNS_INPUTS)
    return {f"{name}.c": text, f"{name}.h": header}


def _string_array(decl: str, names) -> str:
    items = "".join(f"    {c_string(n)},\n" for n in names)
    return f"{decl} = {{\n{items}}};\n"


def _name_tables(iface: Interface, name: str) -> tuple[str, str]:
    """Header declarations and source definitions of the model's names,
    index constants, defaults and output layout. Names appear only as escaped
    string literals; the constants are identifiers derived by
    :func:`.naming.c_constants`."""
    check_c_names([iface.model], "model")
    check_c_names(iface.states, "state")
    check_c_names(iface.symbols, "symbol")
    check_c_names(iface.observables, "observable")
    up = name.upper()
    counts = {"STATES": iface.states, "SYMBOLS": iface.symbols, "OBSERVABLES": iface.observables}
    h = ["", "/* Names (UTF-8 strings, in order) and the model's default values. */"]
    h += [f"#define {up}_N_{k} {len(v)}" for k, v in counts.items()]
    taken = {f"{up}_N_{k}" for k in (*counts, "INPUTS", "OUTPUTS")}
    for group, (a, b) in sorted(iface.groups.items(), key=lambda kv: kv[1]):
        h.append(f"#define {up}_{group.upper()}_OFFSET {a}  /* outputs {a}..{b - 1} */")
        taken.add(f"{up}_{group.upper()}_OFFSET")
    for kind, names in (("STATE", iface.states), ("SYMBOL", iface.symbols),
                        ("OBS", iface.observables)):
        if names:
            h.append(f"/* index constants: {name}_{kind.lower()}_names[{up}_{kind}_x] is the name */"
                     if kind != "OBS" else
                     f"/* index constants: {name}_observable_names[{up}_OBS_x] is the name */")
        for k, ident in enumerate(c_constants(f"{up}_{kind}", names, taken)):
            h.append(f"#define {ident} {k}")
    h.append("")
    h.append(f"extern const char {name}_model_name[];")
    c = ["", f"const char {name}_model_name[] = {c_string(iface.model)};"]
    arrays = [("state_names", iface.states, "STATES"), ("symbol_names", iface.symbols, "SYMBOLS"),
              ("observable_names", iface.observables, "OBSERVABLES")]
    for suffix, names, count in arrays:
        if names:
            decl = f"const char *const {name}_{suffix}[{up}_N_{count}]"
            h.append(f"extern {decl};")
            c.append(_string_array(decl, names).rstrip("\n"))
    decl = f"const char *const {name}_output_names[{up}_N_OUTPUTS]"
    h.append(f"extern {decl};")
    c.append(_string_array(decl, iface.outputs).rstrip("\n"))
    if iface.symbols:
        h.append("/* default value of each symbol (NaN: the model gives none) */")
        decl = f"const double {name}_defaults[{up}_N_SYMBOLS]"
        h.append(f"extern {decl};")
        vals = "".join(f"    {literal(v) if iface.has_default(j) else 'NAN'},\n"
                       for j, v in enumerate(iface.defaults))
        c.append(f"{decl} = {{\n{vals}}};")
    return "\n".join(h) + "\n", "\n".join(c) + "\n"


def embed_example(fn: Function, name: str, interface: Interface | None = None) -> dict[str, str]:
    """A ``main.c`` that evaluates one row and prints every output, and a
    ``BUILD.txt`` with the gcc command lines.

    The program reads the inputs from its arguments; missing ones take the
    model's default values (with an ``interface``; without one they are
    1.0). It prints one output per line with ``%.17g`` (enough digits to
    round-trip a double), followed by a tab and the output's name, and exits
    with status 1 when the function refuses the row."""
    name = c_identifier(name)
    fill = "j + 1 < argc ? strtod(argv[j + 1], NULL) : 1.0"
    missing, missing_doc = "", "missing ones are 1.0"
    label = '"%.17g\\n", out[k]'
    if interface is not None:
        label = f'"%.17g\\t%s\\n", out[k], {name}_output_names[k]'
    if interface is not None and interface.symbols:
        fill = f"j + 1 < argc ? strtod(argv[j + 1], NULL) : {name}_defaults[j]"
        missing = f"""\
        if (isnan(x[j])) {{
            fprintf(stderr, "{name}: symbol %s has no default value; give it as argument %d\\n",
                    {name}_symbol_names[j], j + 1);
            return 2;
        }}
"""
        missing_doc = "missing ones take the model's default values"
    n_pub = len(fn.outputs) - (interface.checks if interface else 0)
    math_h = "#include <math.h>\n" if interface is not None else ""
    main = f"""\
/* Example: evaluate {name} on one parameter set given on the command
   line ({missing_doc}). Prints each output
   and its name; outputs are model predictions, not measurements. */
#include <stdio.h>
#include <stdlib.h>
{math_h}#include "{name}.h"

int main(int argc, char **argv)
{{
    double x[{max(1, fn.n_inputs)}];
    double out[{n_pub}];
    int j, k, status;
    for (j = 0; j < {name}_n_inputs; j++) {{
        x[j] = {fill};
{missing}    }}
    status = {name}_eval(x, out, 1);
    if (status != 0) {{
        fprintf(stderr, "{name}: row %d refused (see {name}.h)\\n", status - 1);
        return 1;
    }}
    for (k = 0; k < {name}_n_outputs; k++)
        printf({label});
    return 0;
}}
"""
    flags = " ".join(flags_for(fn))
    build = f"""\
Build the example program (C99, standard library and libm only):

    gcc {flags} -o {name}_example main.c {name}.c -lm
    ./{name}_example X0 X1 ...    # {fn.n_inputs} inputs; {missing_doc}

Build a shared library for another codebase:

    gcc {flags} -fPIC -shared -o lib{name}.so {name}.c -lm

-march=native targets the building machine; drop it (or name a target with
-march=...) for a library that moves to other machines. The ABI is described
at the top of {name}.h.
"""
    return {"main.c": main, "BUILD.txt": build}


# ------------------------------------------------------------------ building

def single_source(sources: dict[str, str], name: str) -> str:
    """The ``.c`` file with its header pasted in place of the ``#include``."""
    name = c_identifier(name)
    return sources[f"{name}.c"].replace(f'#include "{name}.h"\n', sources[f"{name}.h"], 1)


def build_from_source(sources: dict[str, str], name: str, n_inputs: int, n_outputs: int,
                      flags: tuple[str, ...]) -> Kernel:
    """Compile emitted sources through the cache and wrap them in a :class:`Kernel`.

    This is the pickling recipe: another process rebuilds (or finds in the
    cache) the same library from the same text."""
    from treeflux.runtime.cache import shared_library

    name = c_identifier(name)
    path = shared_library(single_source(sources, name), flags=tuple(flags), name=name)
    lib = ctypes.CDLL(str(path))
    got = (ctypes.c_int.in_dll(lib, f"{name}_n_inputs").value,
           ctypes.c_int.in_dll(lib, f"{name}_n_outputs").value)
    if got != (n_inputs, n_outputs):
        raise RuntimeError(f"library {path} has shape {got}, expected {(n_inputs, n_outputs)}")
    func = getattr(lib, f"{name}_eval_range")
    func.argtypes = [ctypes.c_void_p, ctypes.c_void_p, ctypes.c_long, ctypes.c_long]
    func.restype = ctypes.c_int

    def run(X, out, start, stop):  # ctypes releases the GIL during the call
        return func(X.ctypes.data, out.ctypes.data, start, stop)

    checked, checked_address = None, 0
    if f"{name}_eval_checked(" in sources[f"{name}.c"]:
        cfunc = getattr(lib, f"{name}_eval_checked")
        checked_address = ctypes.cast(cfunc, ctypes.c_void_p).value
        cfunc.argtypes = [ctypes.c_void_p, ctypes.c_void_p, ctypes.c_void_p, ctypes.c_long, ctypes.c_long]
        cfunc.restype = ctypes.c_long

        def checked(X, out, status, start, stop):
            return cfunc(data_address(X), data_address(out), data_address(status), start, stop)

    recipe = (build_from_source, (dict(sources), name, n_inputs, n_outputs, tuple(flags)))
    kernel = Kernel(run, n_inputs, n_outputs, backend="c", recipe=recipe, keepalive=lib,
                    checked=checked, native=(ctypes.cast(func, ctypes.c_void_p).value, checked_address))
    first = ctypes.c_char.in_dll(lib, f"{name}_version")
    kernel.version = ctypes.cast(ctypes.addressof(first), ctypes.c_char_p).value.decode()
    return kernel


def build(fn: Function, *, name: str = "treeflux_model", checks=None) -> Kernel:
    """Emit, compile (``cc``, cached by content hash) and load ``fn``
    (with the checked entry of ``checks``, see :func:`emit`).

    Returns a :class:`~treeflux.runtime.kernel.Kernel` whose row-range
    function is ``<name>_eval_range`` called through ctypes (GIL released).
    The kernel carries ``version`` (the ``sha256:`` digest of the body)."""
    sources = emit(fn, name=name, checks=checks)
    with progress("native compilation (C)", total=1, unit="module") as bar:
        kernel = build_from_source(sources, name, fn.n_inputs, len(fn.outputs), flags_for(fn))
        bar.update(1)
    return kernel

/* One native kernel call from Python without ctypes (built through the cache
 * by treeflux/runtime/kernel.py, loaded as the extension module
 * _treeflux_native_call).
 *
 * ctypes cost about 2 us per call here: a data address per array (0.3 us
 * each) and the foreign call itself. This module takes the arrays as Python
 * objects, reads their addresses through the buffer protocol, releases the
 * GIL and hands the call to the native pool's tf_pool_run (thread_pool.c),
 * which runs one range in the caller or splits the rows over its workers.
 *
 *   call(kind, n, ranges, fn, *args) -> tuple of one status per range
 *
 * kind and fn as in thread_pool.c; `ranges` is a count r (the rows [0, n)
 * cut into [n i / r, n (i + 1) / r)) or a tuple of bounds (then n is not
 * read); each of args is an int (passed as int64) or a C-contiguous buffer
 * (passed as its address). The caller
 * (kernel.py) has checked shapes, dtypes and writability: this module only
 * refuses what it cannot pass at all.
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>
#include <stdint.h>

#define MAX_ARGS 8
#define MAX_RANGES 64

typedef void (*pool_fn)(int64_t, const int64_t *, const int64_t *, int64_t, int64_t *);

static pool_fn pool_run = NULL;
static PyObject *ndarray = NULL;        /* numpy.ndarray: checked() takes exactly it */

static PyObject *set_pool(PyObject *self, PyObject *args)
{
    PyObject *address, *type;
    if (!PyArg_ParseTuple(args, "OO", &address, &type))
        return NULL;
    void *p = PyLong_AsVoidPtr(address);
    if (p == NULL && PyErr_Occurred())
        return NULL;
    pool_run = (pool_fn)p;
    Py_XSETREF(ndarray, Py_NewRef(type));
    Py_RETURN_NONE;
}

/* view of a C-contiguous 2-d float64 ndarray with `cols` columns (and `rows`
 * rows unless rows < 0): 1, or 0 with no error set when `a` is anything else */
static int matrix(PyObject *a, Py_buffer *v, int flags, Py_ssize_t rows, Py_ssize_t cols)
{
    if (Py_TYPE(a) != (PyTypeObject *)ndarray)
        return 0;
    if (PyObject_GetBuffer(a, v, flags | PyBUF_C_CONTIGUOUS | PyBUF_FORMAT) != 0) {
        PyErr_Clear();
        return 0;
    }
    if (v->ndim == 2 && v->itemsize == 8 && v->format != NULL && v->format[0] == 'd' && v->format[1] == 0
        && v->shape[1] == cols && (rows < 0 || v->shape[0] == rows))
        return 1;
    PyBuffer_Release(v);
    return 0;
}

/* checked(fn, ranges, n_in, n_out, X, out) -> None, 0 or bytes
 *
 * The checked entry `fn` (kind 1) over every row of X into out, the rows cut
 * into `ranges` ranges, when X is a C-contiguous float64 ndarray (N, n_in)
 * and out a writable one (N, n_out) that does not overlap it; else None, and
 * the caller takes its validating path, which names what is wrong. Returns 0
 * when no row was flagged, else the status bytes of every row. The status
 * buffer is this call's own. */
static PyObject *checked(PyObject *self, PyObject *const *argv, Py_ssize_t argc)
{
    if (argc != 6) {
        PyErr_SetString(PyExc_TypeError, "checked(fn, ranges, n_in, n_out, X, out): wrong number of arguments");
        return NULL;
    }
    if (pool_run == NULL || ndarray == NULL) {
        PyErr_SetString(PyExc_RuntimeError, "checked: no native pool set");
        return NULL;
    }
    int64_t fn = PyLong_AsLongLong(argv[0]);
    int64_t ranges = PyLong_AsLongLong(argv[1]);
    Py_ssize_t n_in = PyLong_AsSsize_t(argv[2]), n_out = PyLong_AsSsize_t(argv[3]);
    if (PyErr_Occurred())
        return NULL;
    if (ranges < 1 || ranges > MAX_RANGES) {
        PyErr_SetString(PyExc_ValueError, "checked: 1 to 64 ranges");
        return NULL;
    }
    Py_buffer vx, vo;
    if (!matrix(argv[4], &vx, PyBUF_SIMPLE, -1, n_in))
        Py_RETURN_NONE;
    int64_t n = vx.shape[0];
    if (!matrix(argv[5], &vo, PyBUF_WRITABLE, n, n_out)) {
        PyBuffer_Release(&vx);
        Py_RETURN_NONE;
    }
    char *x0 = vx.buf, *o0 = vo.buf;
    if (vx.len > 0 && vo.len > 0 && x0 < o0 + vo.len && o0 < x0 + vx.len) {
        PyBuffer_Release(&vx);
        PyBuffer_Release(&vo);
        Py_RETURN_NONE;
    }
    PyObject *result = NULL;
    char *status = PyMem_Malloc(n > 0 ? (size_t)n : 1);
    if (status == NULL) {
        PyErr_NoMemory();
        goto done;
    }
    int64_t args[4] = {fn, (int64_t)(intptr_t)vx.buf, (int64_t)(intptr_t)vo.buf, (int64_t)(intptr_t)status};
    int64_t bounds[MAX_RANGES + 1], results[MAX_RANGES], flagged = 0;
    for (int64_t i = 0; i <= ranges; i++)
        bounds[i] = n * i / ranges;
    Py_BEGIN_ALLOW_THREADS
    pool_run(1, args, bounds, ranges, results);
    Py_END_ALLOW_THREADS
    for (int64_t i = 0; i < ranges; i++)
        flagged += results[i];
    result = flagged ? PyBytes_FromStringAndSize(status, (Py_ssize_t)n) : PyLong_FromLong(0);
    PyMem_Free(status);
done:
    PyBuffer_Release(&vx);
    PyBuffer_Release(&vo);
    return result;
}

static PyObject *call(PyObject *self, PyObject *const *argv, Py_ssize_t argc)
{
    if (argc < 4 || argc - 3 > MAX_ARGS) {
        PyErr_SetString(PyExc_TypeError, "call(kind, n, ranges, fn, *args): wrong number of arguments");
        return NULL;
    }
    if (pool_run == NULL) {
        PyErr_SetString(PyExc_RuntimeError, "call: no native pool set");
        return NULL;
    }
    int64_t kind = PyLong_AsLongLong(argv[0]);
    int64_t n = PyLong_AsLongLong(argv[1]);
    int cut = PyTuple_Check(argv[2]);
    int64_t ranges = cut ? (int64_t)PyTuple_GET_SIZE(argv[2]) - 1 : PyLong_AsLongLong(argv[2]);
    if (PyErr_Occurred())
        return NULL;
    if (n < 0 || ranges < 1 || ranges > MAX_RANGES) {
        PyErr_SetString(PyExc_ValueError, "call: n must be >= 0 and 1 to 64 ranges");
        return NULL;
    }
    int64_t bounds[MAX_RANGES + 1], results[MAX_RANGES];
    for (int64_t i = 0; i <= ranges; i++) {
        bounds[i] = cut ? PyLong_AsLongLong(PyTuple_GET_ITEM(argv[2], i)) : n * i / ranges;
        if (cut && (PyErr_Occurred() || (i > 0 && bounds[i] < bounds[i - 1]))) {
            if (!PyErr_Occurred())
                PyErr_SetString(PyExc_ValueError, "call: bounds must not decrease");
            return NULL;
        }
    }
    int64_t args[MAX_ARGS];
    Py_buffer views[MAX_ARGS];
    int held = 0;
    PyObject *result = NULL;
    for (Py_ssize_t i = 3; i < argc; i++) {
        PyObject *a = argv[i];
        if (PyLong_Check(a)) {
            args[i - 3] = PyLong_AsLongLong(a);
            if (PyErr_Occurred())
                goto done;
        } else {
            if (PyObject_GetBuffer(a, &views[held], PyBUF_C_CONTIGUOUS) != 0)
                goto done;
            args[i - 3] = (int64_t)(intptr_t)views[held].buf;
            held++;
        }
    }
    Py_BEGIN_ALLOW_THREADS
    pool_run(kind, args, bounds, ranges, results);
    Py_END_ALLOW_THREADS
    result = PyTuple_New(ranges);
    if (result == NULL)
        goto done;
    for (int64_t i = 0; i < ranges; i++) {
        PyObject *v = PyLong_FromLongLong(results[i]);
        if (v == NULL) {
            Py_CLEAR(result);
            goto done;
        }
        PyTuple_SET_ITEM(result, i, v);
    }
done:
    while (held > 0)
        PyBuffer_Release(&views[--held]);
    return result;
}

static PyMethodDef methods[] = {
    {"call", (PyCFunction)(void (*)(void))call, METH_FASTCALL, "one native kernel call (see the source)"},
    {"checked", (PyCFunction)(void (*)(void))checked, METH_FASTCALL, "a checked call with its argument checks"},
    {"set_pool", set_pool, METH_VARARGS, "the address of tf_pool_run and numpy.ndarray"},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef module = {PyModuleDef_HEAD_INIT, "_treeflux_native_call", NULL, -1, methods};

PyMODINIT_FUNC PyInit__treeflux_native_call(void)
{
    return PyModule_Create(&module);
}

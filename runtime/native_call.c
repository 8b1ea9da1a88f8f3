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

static PyObject *set_pool(PyObject *self, PyObject *address)
{
    void *p = PyLong_AsVoidPtr(address);
    if (p == NULL && PyErr_Occurred())
        return NULL;
    pool_run = (pool_fn)p;
    Py_RETURN_NONE;
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
    {"set_pool", set_pool, METH_O, "the address of tf_pool_run"},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef module = {PyModuleDef_HEAD_INIT, "_treeflux_native_call", NULL, -1, methods};

PyMODINIT_FUNC PyInit__treeflux_native_call(void)
{
    return PyModule_Create(&module);
}

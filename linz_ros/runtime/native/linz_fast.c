/* The native step's fast entry from Python: core.step(x, ref, t, now=None) straight into C.

   Built only where the Python headers are (-DLINZ_MODULE names the module). The fast path
   takes exactly the common case: x and ref lists of floats (exactly float) of the right
   lengths, t and now finite floats. It converts them, runs linz_step and builds the command list and the
   StepRecord itself. Anything else (other types, lengths, non-finite stamps, keywords other
   than `now`) goes to the Python method given at bind time, which converts and refuses as
   the Python core does and calls the same C step, so both routes give the same records. */

#define PY_SSIZE_T_CLEAN
#include <Python.h>
#include <math.h>
#include <time.h>

#include "linz_step.h"

#define CONCAT2(a, b) a##b
#define CONCAT(a, b) CONCAT2(a, b)
#define STRINGIFY2(a) #a
#define STRINGIFY(a) STRINGIFY2(a)

typedef struct {
    linz_ctx *ctx;
    PyObject *record_type, *modes, *reasons, *fallback, *no_outputs, *keepalive;
    double *x, *ref;
} binding;

static double seconds_now(void) {
    struct timespec now;
    clock_gettime(CLOCK_MONOTONIC, &now);
    return (double)now.tv_sec + 1e-9 * (double)now.tv_nsec;
}

static void free_binding(binding *b) {
    Py_XDECREF(b->record_type);
    Py_XDECREF(b->modes);
    Py_XDECREF(b->reasons);
    Py_XDECREF(b->fallback);
    Py_XDECREF(b->no_outputs);
    Py_XDECREF(b->keepalive);
    PyMem_Free(b->x);
    PyMem_Free(b->ref);
    PyMem_Free(b);
}

static void release(PyObject *capsule) {
    binding *b = (binding *)PyCapsule_GetPointer(capsule, "linz_binding");
    if (b != NULL) free_binding(b);
}

/* the floats of an exact list of exact floats, or 0 */
static int take_floats(PyObject *list, Py_ssize_t size, double *out) {
    if (!PyList_CheckExact(list) || PyList_GET_SIZE(list) != size) return 0;
    for (Py_ssize_t i = 0; i < size; i++) {
        PyObject *item = PyList_GET_ITEM(list, i);
        if (!PyFloat_CheckExact(item)) return 0;   /* a subclass may convert otherwise: the careful path */
        out[i] = PyFloat_AS_DOUBLE(item);
    }
    return 1;
}

static PyObject *fast_step(PyObject *capsule, PyObject *const *args, size_t nargsf, PyObject *kwnames) {
    double start = seconds_now();
    binding *b = (binding *)PyCapsule_GetPointer(capsule, "linz_binding");
    if (b == NULL) return NULL;
    linz_ctx *c = b->ctx;
    Py_ssize_t nargs = PyVectorcall_NARGS(nargsf);
    PyObject *now_object = Py_None;
    int plain = nargs >= 3 && nargs <= 4;
    if (plain && kwnames != NULL) {
        Py_ssize_t keywords = PyTuple_GET_SIZE(kwnames);
        if (keywords == 1 && nargs == 3 && PyUnicode_CompareWithASCIIString(PyTuple_GET_ITEM(kwnames, 0), "now") == 0)
            now_object = args[3];
        else if (keywords != 0)
            plain = 0;
    } else if (plain && nargs == 4) {
        now_object = args[3];
    }
    if (plain) plain = PyFloat_CheckExact(args[2]) && (now_object == Py_None || PyFloat_CheckExact(now_object));
    double t = 0.0, now = 0.0;
    if (plain) {
        t = PyFloat_AS_DOUBLE(args[2]);
        now = now_object == Py_None ? t : PyFloat_AS_DOUBLE(now_object);
        plain = isfinite(t) && isfinite(now) && take_floats(args[0], c->n, b->x)
                && take_floats(args[1], c->ref_size, b->ref);
    }
    if (!plain) return PyObject_Vectorcall(b->fallback, args, nargsf, kwnames);

    linz_step(c, b->x, b->ref, t, now, 1);

    const double *r = c->report;
    int m = c->m, chains = c->chains;
    PyObject *u = PyList_New(m), *command = PyTuple_New(m), *saturated = PyTuple_New(m);
    PyObject *outputs = NULL, *record = NULL, *result = NULL;
    if (u == NULL || command == NULL || saturated == NULL) goto done;
    for (int i = 0; i < m; i++) {
        PyObject *value = PyFloat_FromDouble(c->u[i]);
        if (value == NULL) goto done;
        Py_INCREF(value);
        PyList_SET_ITEM(u, i, value);
        PyTuple_SET_ITEM(command, i, value);
        PyObject *cut = c->saturated[i] != 0.0 ? Py_True : Py_False;
        Py_INCREF(cut);
        PyTuple_SET_ITEM(saturated, i, cut);
    }
    if (r[LINZ_REPORT_outputs_valid] != 0.0) {
        outputs = PyTuple_New(chains);
        if (outputs == NULL) goto done;
        for (int i = 0; i < chains; i++) {
            PyObject *value = PyFloat_FromDouble(c->y[i]);
            if (value == NULL) goto done;
            PyTuple_SET_ITEM(outputs, i, value);
        }
    } else {
        outputs = b->no_outputs;
        Py_INCREF(outputs);
    }
    PyObject *mode = PyTuple_GET_ITEM(b->modes, (Py_ssize_t)r[LINZ_REPORT_mode]);
    PyObject *reason = PyTuple_GET_ITEM(b->reasons, (Py_ssize_t)r[LINZ_REPORT_reason]);
    PyObject *fields[12] = {NULL};
    fields[0] = PyFloat_FromDouble(t);
    fields[1] = command;
    fields[2] = mode;
    fields[3] = reason;
    fields[4] = PyFloat_FromDouble(r[LINZ_REPORT_sigma_min]);
    fields[5] = PyFloat_FromDouble(r[LINZ_REPORT_condition]);
    fields[6] = r[LINZ_REPORT_warn] != 0.0 ? Py_True : Py_False;
    fields[7] = PyFloat_FromDouble(r[LINZ_REPORT_damping]);
    fields[8] = saturated;
    fields[10] = outputs;
    fields[11] = PyLong_FromLong((long)r[LINZ_REPORT_alarms]);
    fields[9] = PyFloat_FromDouble(seconds_now() - start);
    if (fields[0] && fields[4] && fields[5] && fields[7] && fields[9] && fields[11])
        record = PyObject_Vectorcall(b->record_type, fields, 12, NULL);
    Py_XDECREF(fields[0]);
    Py_XDECREF(fields[4]);
    Py_XDECREF(fields[5]);
    Py_XDECREF(fields[7]);
    Py_XDECREF(fields[9]);
    Py_XDECREF(fields[11]);
    if (record != NULL) result = PyTuple_Pack(2, u, record);
done:
    Py_XDECREF(u);
    Py_XDECREF(command);
    Py_XDECREF(saturated);
    Py_XDECREF(outputs);
    Py_XDECREF(record);
    return result;
}

static PyMethodDef step_method = {"step", (PyCFunction)(void (*)(void))fast_step, METH_FASTCALL | METH_KEYWORDS,
                                  "step(x, ref, t, now=None) -> (command, record)"};

/* bind(ctx_address, keepalive, record_type, modes, reasons, fallback) -> the fast step of one core;
   keepalive owns the context's memory and is held as long as the step is */
static PyObject *bind(PyObject *self, PyObject *args) {
    (void)self;
    unsigned long long address;
    PyObject *keepalive, *record_type, *modes, *reasons, *fallback;
    if (!PyArg_ParseTuple(args, "KOOO!O!O", &address, &keepalive, &record_type, &PyTuple_Type, &modes, &PyTuple_Type,
                          &reasons, &fallback))
        return NULL;
    binding *b = (binding *)PyMem_Calloc(1, sizeof(binding));
    if (b == NULL) return PyErr_NoMemory();
    b->ctx = (linz_ctx *)(uintptr_t)address;
    b->x = (double *)PyMem_Calloc((size_t)(b->ctx->n > 0 ? b->ctx->n : 1), sizeof(double));
    b->ref = (double *)PyMem_Calloc((size_t)(b->ctx->ref_size > 0 ? b->ctx->ref_size : 1), sizeof(double));
    b->no_outputs = PyTuple_New(0);
    Py_INCREF(keepalive);
    b->keepalive = keepalive;
    Py_INCREF(record_type);
    Py_INCREF(modes);
    Py_INCREF(reasons);
    Py_INCREF(fallback);
    b->record_type = record_type;
    b->modes = modes;
    b->reasons = reasons;
    b->fallback = fallback;
    PyObject *capsule = PyCapsule_New(b, "linz_binding", release);
    if (capsule == NULL) {
        free_binding(b);
        return NULL;
    }
    if (b->x == NULL || b->ref == NULL || b->no_outputs == NULL) {
        Py_DECREF(capsule);
        return PyErr_NoMemory();
    }
    PyObject *function = PyCFunction_NewEx(&step_method, capsule, NULL);
    Py_DECREF(capsule);
    return function;
}

static PyMethodDef methods[] = {
    {"bind", bind, METH_VARARGS, "bind(ctx_address, keepalive, record_type, modes, reasons, fallback) -> step"},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef definition = {PyModuleDef_HEAD_INIT, STRINGIFY(LINZ_MODULE), NULL, -1, methods};

PyMODINIT_FUNC CONCAT(PyInit_, LINZ_MODULE)(void) { return PyModule_Create(&definition); }

/* thresher._scoring: the compiled fast path of Learner.score_batch.
 *
 * PURE: reads the weights it is handed, writes only its answer. It computes exactly what the
 * numpy kernels of learner_kernels.py compute -- every margin widened to float64, products
 * formed in float64 and each row summed left to right in index order, the averaged rule's
 * served weight w - u / max(c, 1) in float64 -- so both give bit-identical margins
 * (tests/test_learner.py compares them). It checks the CSR input in the same pass and answers
 * None when anything is off, and the numpy path then raises its precise InvalidInput. Built
 * with -ffp-contract=off so no multiply-add is fused.
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>

#include <math.h>
#include <stdint.h>
#include <string.h>

typedef struct {
    Py_buffer view;
    int ok;
} Held;

static int hold(PyObject *obj, Held *h, const char *format, Py_ssize_t itemsize) {
    h->ok = 0;
    if (PyObject_GetBuffer(obj, &h->view, PyBUF_C_CONTIGUOUS | PyBUF_FORMAT) < 0) {
        if (PyErr_ExceptionMatches(PyExc_MemoryError)) return -1;
        PyErr_Clear(); /* a list, a strided view...: the numpy path takes it */
        return 1;
    }
    h->ok = 1;
    /* the type letter, after any byte-order mark: "f" float32, "d" float64, "l"/"q" int64 */
    const char *f = h->view.format;
    char letter = f == NULL || f[0] == 0 ? 0 : f[strlen(f) - 1];
    if (f != NULL && (f[0] == '>' || f[0] == '!')) letter = 0; /* big-endian data */
    if (h->view.itemsize != itemsize || letter == 0 || strchr(format, letter) == NULL)
        return 1; /* another dtype: the numpy path takes it */
    return 0;
}

static void release(Held *h) {
    if (h->ok) PyBuffer_Release(&h->view);
}

/* margins(weights, accum, seen, rows, indptr, indices, values)
 *   -> (labels int64 bytes, margins float64 bytes (n, rows)), or None.
 * weights, accum: float32 (rows, dim) C-contiguous (accum None unless averaged);
 * indptr, indices: int64; values: float32 or float64. */
static PyObject *margins(PyObject *self, PyObject *args) {
    PyObject *w_obj, *u_obj, *ptr_obj, *idx_obj, *val_obj, *out = NULL;
    double seen;
    Py_ssize_t rows;
    if (!PyArg_ParseTuple(args, "OOdnOOO:margins", &w_obj, &u_obj, &seen, &rows, &ptr_obj,
                          &idx_obj, &val_obj))
        return NULL;
    Held w = {0}, u = {0}, ptr = {0}, idx = {0}, val = {0};
    int bad = 0, r;
    if ((r = hold(w_obj, &w, "f", 4)) || (u_obj != Py_None && (r = hold(u_obj, &u, "f", 4))) ||
        (r = hold(ptr_obj, &ptr, "lq", 8)) || (r = hold(idx_obj, &idx, "lq", 8))) {
        if (r < 0) goto done;
        bad = 1;
    }
    int f64 = 0;
    if (!bad) {
        r = hold(val_obj, &val, "f", 4);
        if (r == 1) {
            release(&val);
            r = hold(val_obj, &val, "d", 8);
            f64 = 1;
        }
        if (r < 0) goto done;
        if (r == 1) bad = 1;
    }
    if (bad || rows < 1 || w.view.len % (4 * rows) != 0 || (u.ok && u.view.len != w.view.len)) {
        out = Py_None;
        Py_INCREF(out);
        goto done;
    }
    const float *wp = w.view.buf, *up = u.ok ? u.view.buf : NULL;
    const int64_t *pp = ptr.view.buf, *ip = idx.view.buf;
    Py_ssize_t dim = w.view.len / 4 / rows, n = ptr.view.len / 8 - 1, nnz = idx.view.len / 8;
    if (n < 0 || val.view.len / (f64 ? 8 : 4) != nnz || pp[0] != 0 || pp[n] != nnz) {
        out = Py_None;
        Py_INCREF(out);
        goto done;
    }
    PyObject *labels = PyByteArray_FromStringAndSize(NULL, n * 8);
    PyObject *sums = PyByteArray_FromStringAndSize(NULL, n * rows * 8);
    if (labels == NULL || sums == NULL) {
        Py_XDECREF(labels);
        Py_XDECREF(sums);
        goto done;
    }
    int64_t *lp = (int64_t *)PyByteArray_AS_STRING(labels);
    double *mp = (double *)PyByteArray_AS_STRING(sums);
    double c = seen > 1.0 ? seen : 1.0; /* c = 0 only before the first example, when u = 0 */
    Py_ssize_t i, k, row;
    for (i = 0; i < n && !bad; i++) {
        int64_t lo = pp[i], hi = pp[i + 1];
        if (lo > hi || hi > nnz) {
            bad = 1;
            break;
        }
        for (k = lo; k < hi; k++) { /* in range, strictly rising, finite */
            double x = f64 ? ((const double *)val.view.buf)[k] : ((const float *)val.view.buf)[k];
            if (ip[k] < 0 || ip[k] >= dim || (k > lo && ip[k] <= ip[k - 1]) || !isfinite(x)) {
                bad = 1;
                break;
            }
        }
        for (row = 0; row < rows && !bad; row++) {
            const float *wr = wp + row * dim, *ur = up ? up + row * dim : NULL;
            double sum = 0.0;
            for (k = lo; k < hi; k++) {
                double x = f64 ? ((const double *)val.view.buf)[k] : ((const float *)val.view.buf)[k];
                double weight = (double)wr[ip[k]];
                if (ur) weight = weight - (double)ur[ip[k]] / c;
                sum += weight * x;
            }
            mp[i * rows + row] = sum;
        }
        const double *m = mp + i * rows;
        if (rows == 1) {
            lp[i] = m[0] > 0; /* a tie (and NaN) is negative */
        } else { /* np.argmax: the first maximum, and a NaN counts as the maximum */
            Py_ssize_t best = 0;
            for (row = 1; row < rows && !isnan(m[best]); row++) {
                if (m[row] > m[best] || isnan(m[row])) best = row;
            }
            lp[i] = best;
        }
    }
    if (bad) {
        Py_DECREF(labels);
        Py_DECREF(sums);
        out = Py_None;
        Py_INCREF(out);
    } else {
        out = PyTuple_Pack(2, labels, sums);
        Py_DECREF(labels);
        Py_DECREF(sums);
    }
done:
    release(&w);
    release(&u);
    release(&ptr);
    release(&idx);
    release(&val);
    return out;
}

static PyMethodDef methods[] = {
    {"margins", margins, METH_VARARGS,
     "margins(weights, accum, seen, rows, indptr, indices, values) -> (labels, margins) bytes "
     "or None when the input needs the checked numpy path"},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef module = {
    PyModuleDef_HEAD_INIT, "thresher._scoring",
    "The compiled fast path of Learner.score_batch (see the comment at the top of the source).",
    -1, methods,
};

PyMODINIT_FUNC PyInit__scoring(void) { return PyModule_Create(&module); }

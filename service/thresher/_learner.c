/* thresher._learner: the compiled fast paths of Learner.score_batch and Learner.update_batch.
 *
 * PURE: reads the arrays it is handed and writes only the weight arrays of `learn`. It computes
 * exactly what the numpy kernels of learner_kernels.py compute -- every margin widened to
 * float64, products formed in float64 and each row summed left to right in index order, the
 * averaged rule's served weight w - u / max(c, 1) in float64, an update formed in float64 and
 * rounded once to float32 per slot -- so both give bit-identical margins, labels and weights
 * (tests/test_learner_native.py compares them). The CSR input is checked in a first pass;
 * when anything is off the answer is None, nothing has been written, and the numpy path then
 * raises its precise InvalidInput. Built with -ffp-contract=off so no multiply-add is fused.
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>

#include <math.h>
#include <stdint.h>
#include <string.h>

enum { CLASSIC = 0, MARGIN = 1, AVERAGED = 2, PASSIVE_AGGRESSIVE = 3 };

typedef struct {
    Py_buffer view;
    int ok;
} Held;

/* 0 held, 1 not a C-contiguous buffer of that type (the numpy path takes it), -1 error. */
static int hold(PyObject *obj, Held *h, const char *letters, Py_ssize_t itemsize, int flags) {
    h->ok = 0;
    if (PyObject_GetBuffer(obj, &h->view, PyBUF_C_CONTIGUOUS | PyBUF_FORMAT | flags) < 0) {
        if (PyErr_ExceptionMatches(PyExc_MemoryError)) return -1;
        PyErr_Clear(); /* a list, a strided or read-only view...: the numpy path takes it */
        return 1;
    }
    h->ok = 1;
    /* the type letter after any byte-order mark: "f" float32, "d" float64, "l"/"q" int64 */
    const char *f = h->view.format;
    char letter = f == NULL || f[0] == 0 ? 0 : f[strlen(f) - 1];
    if (f != NULL && (f[0] == '>' || f[0] == '!')) letter = 0; /* big-endian data */
    if (h->view.itemsize != itemsize || letter == 0 || strchr(letters, letter) == NULL) return 1;
    return 0;
}

static void release(Held *h) {
    if (h->ok) PyBuffer_Release(&h->view);
}

/* A checked CSR batch over weights (rows, dim), and accum when averaged. */
typedef struct {
    Held w, u, ptr, idx, val, ys;
    const int64_t *pp, *ip, *yp;
    const void *vp;
    int f64;
    Py_ssize_t rows, dim, n, nnz;
} Batch;

static void batch_release(Batch *b) {
    release(&b->w);
    release(&b->u);
    release(&b->ptr);
    release(&b->idx);
    release(&b->val);
    release(&b->ys);
}

static inline double value_at(const Batch *b, Py_ssize_t k) {
    return b->f64 ? ((const double *)b->vp)[k] : (double)((const float *)b->vp)[k];
}

/* Hold and check everything: 0 ok, 1 the numpy path must take it, -1 error. */
static int batch_hold(Batch *b, PyObject *w, PyObject *u, Py_ssize_t rows, PyObject *ptr,
                      PyObject *idx, PyObject *val, PyObject *ys, int writable) {
    int flags = writable ? PyBUF_WRITABLE : 0, r;
    if ((r = hold(w, &b->w, "f", 4, flags))) return r;
    if (u != Py_None && (r = hold(u, &b->u, "f", 4, flags))) return r;
    if ((r = hold(ptr, &b->ptr, "lq", 8, 0)) || (r = hold(idx, &b->idx, "lq", 8, 0))) return r;
    if ((r = hold(val, &b->val, "f", 4, 0)) == 1) {
        release(&b->val);
        r = hold(val, &b->val, "d", 8, 0);
        b->f64 = 1;
    }
    if (r) return r;
    if (ys != NULL && (r = hold(ys, &b->ys, "lq", 8, 0))) return r;
    if (rows < 1 || b->w.view.len == 0 || b->w.view.len % (4 * rows) != 0) return 1;
    if (b->u.ok && b->u.view.len != b->w.view.len) return 1;
    b->rows = rows;
    b->dim = b->w.view.len / 4 / rows;
    b->n = b->ptr.view.len / 8 - 1;
    b->nnz = b->idx.view.len / 8;
    b->pp = b->ptr.view.buf;
    b->ip = b->idx.view.buf;
    b->vp = b->val.view.buf;
    b->yp = ys != NULL ? b->ys.view.buf : NULL;
    if (b->n < 0 || b->val.view.len / (b->f64 ? 8 : 4) != b->nnz) return 1;
    if (b->pp[0] != 0 || b->pp[b->n] != b->nnz) return 1;
    if (ys != NULL && b->ys.view.len / 8 != b->n) return 1;
    Py_ssize_t i, k, classes = rows == 1 ? 2 : rows;
    for (i = 0; i < b->n; i++) { /* rising offsets; indices in range, rising; finite values */
        int64_t lo = b->pp[i], hi = b->pp[i + 1];
        if (lo > hi || hi > b->nnz) return 1;
        for (k = lo; k < hi; k++) {
            if (b->ip[k] < 0 || b->ip[k] >= b->dim || (k > lo && b->ip[k] <= b->ip[k - 1]))
                return 1;
            if (!isfinite(value_at(b, k))) return 1;
        }
        if (b->yp != NULL && (b->yp[i] < 0 || b->yp[i] >= classes)) return 1;
    }
    return 0;
}

/* Row i's margins into m[rows]: training weights, or served ones when u is given. With kept,
 * also each weight used, at kept[r * nnz + k] (learner_kernels.served_weights' layout). */
static void row_margins(const Batch *b, Py_ssize_t i, const float *u, double c, double *m,
                        double *kept) {
    const float *w = b->w.view.buf;
    int64_t lo = b->pp[i], hi = b->pp[i + 1], k;
    Py_ssize_t r;
    for (r = 0; r < b->rows; r++) {
        const float *wr = w + r * b->dim, *ur = u ? u + r * b->dim : NULL;
        double sum = 0.0;
        for (k = lo; k < hi; k++) {
            double weight = (double)wr[b->ip[k]];
            if (ur) weight = weight - (double)ur[b->ip[k]] / c;
            if (kept) kept[r * b->nnz + k] = weight;
            sum += weight * value_at(b, k);
        }
        m[r] = sum;
    }
}

/* labels_of: positive iff > 0 for one row; else np.argmax (the first maximum; NaN ranks top). */
static int64_t label_of(const double *m, Py_ssize_t rows) {
    if (rows == 1) return m[0] > 0;
    Py_ssize_t best = 0, r;
    for (r = 1; r < rows && !isnan(m[best]); r++) {
        if (m[r] > m[best] || isnan(m[r])) best = r;
    }
    return best;
}

/* rival_one: the highest-scoring wrong class, lowest index on ties. */
static Py_ssize_t rival_of(const double *t, Py_ssize_t rows, int64_t y) {
    Py_ssize_t best = -1, r;
    for (r = 0; r < rows; r++) {
        if (r != y && (best < 0 || t[r] > t[best])) best = r;
    }
    return best;
}

static PyObject *none(void) { Py_RETURN_NONE; }

/* margins(weights, accum, seen, rows, indptr, indices, values)
 *   -> (labels int64 bytes (n,), margins float64 bytes (n, rows)), or None.
 * weights, accum: float32 (rows, dim) C-contiguous (accum None unless averaged);
 * indptr, indices: int64; values: float32 or float64. */
static PyObject *margins(PyObject *self, PyObject *args) {
    PyObject *w, *u, *ptr, *idx, *val, *out = NULL;
    double seen;
    Py_ssize_t rows, i;
    if (!PyArg_ParseTuple(args, "OOdnOOO:margins", &w, &u, &seen, &rows, &ptr, &idx, &val))
        return NULL;
    Batch b;
    memset(&b, 0, sizeof b);
    int r = batch_hold(&b, w, u, rows, ptr, idx, val, NULL, 0);
    if (r) {
        batch_release(&b);
        return r < 0 ? NULL : none();
    }
    PyObject *labels = PyByteArray_FromStringAndSize(NULL, b.n * 8);
    PyObject *sums = PyByteArray_FromStringAndSize(NULL, b.n * rows * 8);
    if (labels != NULL && sums != NULL) {
        int64_t *lp = (int64_t *)PyByteArray_AS_STRING(labels);
        double *mp = (double *)PyByteArray_AS_STRING(sums);
        double c = seen > 1.0 ? seen : 1.0; /* c = 0 only before the first example: u = 0 */
        const float *up = b.u.ok ? b.u.view.buf : NULL;
        for (i = 0; i < b.n; i++) {
            row_margins(&b, i, up, c, mp + i * rows, NULL);
            lp[i] = label_of(mp + i * rows, rows);
        }
        out = PyTuple_Pack(2, labels, sums);
    }
    Py_XDECREF(labels);
    Py_XDECREF(sums);
    batch_release(&b);
    return out;
}

/* Add step * x (and -step * x to the rival) into the weights, c times that into u. */
static void apply(Batch *b, Py_ssize_t i, Py_ssize_t row, double step, double c) {
    float *w = (float *)b->w.view.buf + row * b->dim;
    float *u = b->u.ok ? (float *)b->u.view.buf + row * b->dim : NULL;
    int64_t k;
    for (k = b->pp[i]; k < b->pp[i + 1]; k++) {
        double delta = step * value_at(b, k);
        int64_t j = b->ip[k];
        w[j] = (float)((double)w[j] + delta);
        if (u) u[j] = (float)((double)u[j] + c * delta);
    }
}

/* learn(weights, accum, rows, rule, margin, aggressiveness, seen, indptr, indices, values, ys,
 *       before=False)
 *   -> (predicted int64 bytes, margins float64 bytes, updated bool bytes, updates[, before]),
 *   or None. Learner.update_batch row by row: predict with the served weights, decide with the
 * training ones, update in place. Row i is learned with c = seen + i. With before, also the
 * served weights float64 (rows, nnz) each row was predicted with, before its own update. */
static PyObject *learn(PyObject *self, PyObject *args) {
    PyObject *w, *u, *ptr, *idx, *val, *ys, *out = NULL, *kept = NULL;
    Py_ssize_t rows, i;
    int rule, want_before = 0;
    double tau, cap, seen;
    if (!PyArg_ParseTuple(args, "OOnidddOOOO|p:learn", &w, &u, &rows, &rule, &tau, &cap, &seen,
                          &ptr, &idx, &val, &ys, &want_before))
        return NULL;
    Batch b;
    memset(&b, 0, sizeof b);
    int rc = batch_hold(&b, w, u, rows, ptr, idx, val, ys, 1);
    if (rc || rule < CLASSIC || rule > PASSIVE_AGGRESSIVE) {
        batch_release(&b);
        return rc < 0 ? NULL : none();
    }
    PyObject *predicted = PyByteArray_FromStringAndSize(NULL, b.n * 8);
    PyObject *served = PyByteArray_FromStringAndSize(NULL, b.n * rows * 8);
    PyObject *updated = PyByteArray_FromStringAndSize(NULL, b.n);
    double *train = PyMem_Malloc((size_t)rows * sizeof(double));
    if (want_before) kept = PyByteArray_FromStringAndSize(NULL, b.nnz * rows * 8);
    if (predicted == NULL || served == NULL || updated == NULL || train == NULL ||
        (want_before && kept == NULL))
        goto done;
    double *bp = want_before ? (double *)PyByteArray_AS_STRING(kept) : NULL;
    int64_t *pred = (int64_t *)PyByteArray_AS_STRING(predicted);
    double *sv = (double *)PyByteArray_AS_STRING(served);
    char *up = PyByteArray_AS_STRING(updated);
    long long updates = 0;
    for (i = 0; i < b.n; i++, seen += 1.0) {
        int64_t y = b.yp[i], lo = b.pp[i], hi = b.pp[i + 1], k;
        double *m = sv + i * rows, c = seen;
        /* bp keeps the served weights: the averaged ones, or the training ones themselves */
        row_margins(&b, i, NULL, 1.0, train, b.u.ok ? NULL : bp);
        if (b.u.ok) row_margins(&b, i, b.u.view.buf, c > 1.0 ? c : 1.0, m, bp);
        else memcpy(m, train, (size_t)rows * sizeof(double));
        pred[i] = label_of(m, rows);
        double sq = 0.0;
        if (rule == PASSIVE_AGGRESSIVE) {
            for (k = lo; k < hi; k++) sq += value_at(&b, k) * value_at(&b, k);
        }
        int fire;
        double step = 1.0;
        if (rows == 1) {
            double t = train[0], sign = y == 1 ? 1.0 : -1.0;
            if (rule == MARGIN) fire = sign * t <= tau && hi > lo;
            else if (rule == PASSIVE_AGGRESSIVE) fire = 1.0 - sign * t > 0 && sq > 0;
            else fire = (y == 1 ? t <= 0 : t > 0) && hi > lo;
            if (fire && rule == PASSIVE_AGGRESSIVE) {
                double v = (1.0 - sign * t) / sq;
                step = v < cap ? v : cap; /* min(C, v) */
            }
            if (fire) apply(&b, i, 0, sign * step, c);
        } else {
            Py_ssize_t rival = rival_of(train, rows, y);
            double gap = train[y] - train[rival];
            if (rule == MARGIN) fire = gap <= tau && hi > lo;
            else if (rule == PASSIVE_AGGRESSIVE) fire = 1.0 - gap > 0 && sq > 0;
            else fire = label_of(train, rows) != y && hi > lo;
            if (fire && rule == PASSIVE_AGGRESSIVE) {
                double v = (1.0 - gap) / (2.0 * sq);
                step = v < cap ? v : cap;
            }
            if (fire) {
                apply(&b, i, y, step, c);
                apply(&b, i, rival, -step, c);
            }
        }
        up[i] = (char)fire;
        updates += fire;
    }
    if (want_before) out = Py_BuildValue("OOOLO", predicted, served, updated, updates, kept);
    else out = Py_BuildValue("OOOL", predicted, served, updated, updates);
done:
    PyMem_Free(train);
    Py_XDECREF(predicted);
    Py_XDECREF(served);
    Py_XDECREF(updated);
    Py_XDECREF(kept);
    batch_release(&b);
    return out;
}

static PyMethodDef methods[] = {
    {"margins", margins, METH_VARARGS,
     "margins(weights, accum, seen, rows, indptr, indices, values) -> (labels, margins) bytes, "
     "or None when the input needs the checked numpy path"},
    {"learn", learn, METH_VARARGS,
     "learn(weights, accum, rows, rule, margin, aggressiveness, seen, indptr, indices, values, "
     "ys, before=False) -> (predicted, margins, updated, updates[, before]), or None for the "
     "numpy path"},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef module = {
    PyModuleDef_HEAD_INIT, "thresher._learner",
    "The compiled fast paths of Learner (see the comment at the top of the source).",
    -1, methods,
};

PyMODINIT_FUNC PyInit__learner(void) { return PyModule_Create(&module); }

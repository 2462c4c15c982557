/* thresher._quality: the compiled fast path of the loop that counts a run (quality_runs.py).
 *
 * PURE: reads and writes only the Quality object it is handed. `record_run` counts labels
 * from `start` on exactly as the Python loop in quality_runs.py does (the same integer counters,
 * the same float64 operations in the same order, no fused multiply-adds), and stops right
 * after a label that raises a drift alarm or falls on a history sample: Python takes those
 * (the alarm's bookkeeping, `_sample`) and calls again. Every counter the Python loop keeps
 * in locals is written back before it returns. Anything not handled here -- a label that is
 * not a plain class index, a source that is not a str, state of unexpected types or shapes,
 * more than MAX_CLASSES classes -- answers None before anything is counted, and the
 * reference loop counts it. Confusion counts are read only where a run adds to them (the
 * state loader makes them ints; anything else there is a TypeError).
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>

#include <stdint.h>
#include <stdlib.h>

#define MAX_WINDOWS 16
#define MAX_CLASSES 64 /* past this the Python loop, which touches only the cells it counts */

static PyObject *not_handled(void) { Py_RETURN_NONE; }

/* An exact int as long long; 0 when it is not one (no error set). */
static int as_ll(PyObject *o, long long *out) {
    if (o == NULL || !PyLong_CheckExact(o)) return 0;
    int overflow = 0;
    *out = PyLong_AsLongLongAndOverflow(o, &overflow);
    if (overflow || (*out == -1 && PyErr_Occurred())) {
        PyErr_Clear();
        return 0;
    }
    return 1;
}

static int as_double(PyObject *o, double *out) {
    if (o == NULL || !PyFloat_CheckExact(o)) return 0;
    *out = PyFloat_AS_DOUBLE(o);
    return 1;
}

/* A number as the Python loop uses it with floats: an exact float, or a small exact int. */
static int as_number(PyObject *o, double *out) {
    long long v;
    if (as_double(o, out)) return 1;
    if (!as_ll(o, &v) || v > (1LL << 53) || v < -(1LL << 53)) return 0;
    *out = (double)v;
    return 1;
}

/* A list of `rows` lists of `cols` exact ints into `out` (row-major); 0 when it is not. */
static int read_grid(PyObject *grid, Py_ssize_t rows, Py_ssize_t cols, long long *out) {
    if (grid == NULL || !PyList_CheckExact(grid) || PyList_GET_SIZE(grid) != rows) return 0;
    for (Py_ssize_t r = 0; r < rows; r++) {
        PyObject *row = PyList_GET_ITEM(grid, r);
        if (!PyList_CheckExact(row) || PyList_GET_SIZE(row) != cols) return 0;
        for (Py_ssize_t c = 0; c < cols; c++)
            if (!as_ll(PyList_GET_ITEM(row, c), &out[r * cols + c])) return 0;
    }
    return 1;
}

/* Whether `grid` is a list of `rows` lists of `cols` items (their types are checked as they
 * are added to). */
static int grid_shaped(PyObject *grid, Py_ssize_t rows, Py_ssize_t cols) {
    if (grid == NULL || !PyList_CheckExact(grid) || PyList_GET_SIZE(grid) != rows) return 0;
    for (Py_ssize_t r = 0; r < rows; r++) {
        PyObject *row = PyList_GET_ITEM(grid, r);
        if (!PyList_CheckExact(row) || PyList_GET_SIZE(row) != cols) return 0;
    }
    return 1;
}

/* Add the nonzero `deltas` (row-major) to a grid's ints; only the cells counted are touched,
 * so a run costs the same for any number of classes. */
static int add_grid(PyObject *grid, Py_ssize_t rows, Py_ssize_t cols, const long long *deltas) {
    for (Py_ssize_t r = 0; r < rows; r++) {
        PyObject *row = PyList_GET_ITEM(grid, r);
        for (Py_ssize_t c = 0; c < cols; c++) {
            long long delta = deltas[r * cols + c], v;
            if (delta == 0) continue;
            if (!as_ll(PyList_GET_ITEM(row, c), &v)) {
                PyErr_SetString(PyExc_TypeError, "confusion counts must be ints");
                return -1;
            }
            PyObject *o = PyLong_FromLongLong(v + delta);
            if (o == NULL) return -1;
            PyList_SetItem(row, c, o); /* steals o */
        }
    }
    return 0;
}

static int write_grid(PyObject *grid, Py_ssize_t rows, Py_ssize_t cols, const long long *in) {
    for (Py_ssize_t r = 0; r < rows; r++) {
        PyObject *row = PyList_GET_ITEM(grid, r);
        for (Py_ssize_t c = 0; c < cols; c++) {
            PyObject *v = PyLong_FromLongLong(in[r * cols + c]);
            if (v == NULL) return -1;
            PyList_SetItem(row, c, v); /* steals v */
        }
    }
    return 0;
}

/* Add to a source's [labelled, mistakes] list (checked when taken). */
static int add_pair(PyObject *pair, long long labelled, long long mistakes) {
    long long a, b;
    if (!as_ll(PyList_GET_ITEM(pair, 0), &a) || !as_ll(PyList_GET_ITEM(pair, 1), &b)) {
        PyErr_SetString(PyExc_TypeError, "a source's counts must be two ints");
        return -1;
    }
    PyObject *x = PyLong_FromLongLong(a + labelled);
    if (x == NULL) return -1;
    PyObject *y = PyLong_FromLongLong(b + mistakes);
    if (y == NULL) {
        Py_DECREF(x);
        return -1;
    }
    PyList_SetItem(pair, 0, x);
    PyList_SetItem(pair, 1, y);
    return 0;
}

static int plain_pair(PyObject *pair) {
    long long v;
    return PyList_CheckExact(pair) && PyList_GET_SIZE(pair) == 2 &&
           as_ll(PyList_GET_ITEM(pair, 0), &v) && as_ll(PyList_GET_ITEM(pair, 1), &v);
}

static int set_ll(PyObject *q, const char *name, long long v) {
    PyObject *o = PyLong_FromLongLong(v);
    if (o == NULL) return -1;
    int r = PyObject_SetAttrString(q, name, o);
    Py_DECREF(o);
    return r;
}

typedef struct {
    PyObject *ring, *windows, *window_counts, *confusion, *served_confusion, *by_source;
    PyObject *decayed, *ph, *drift, *decay, *labelled, *mistakes, *served_labelled;
    PyObject *served_mistakes, *stride, *k, *binary;
} Attrs;

static const char *attr_names[] = {
    "ring", "windows", "window_counts", "confusion", "served_confusion", "by_source",
    "decayed", "ph", "drift", "_decay", "labelled", "mistakes", "served_labelled",
    "served_mistakes", "history_stride", "k", "binary",
};

static void attrs_release(Attrs *a) {
    PyObject **slot = (PyObject **)a;
    for (size_t i = 0; i < sizeof attr_names / sizeof attr_names[0]; i++) Py_CLEAR(slot[i]);
}

static int attrs_take(PyObject *q, Attrs *a) {
    PyObject **slot = (PyObject **)a;
    for (size_t i = 0; i < sizeof attr_names / sizeof attr_names[0]; i++) {
        slot[i] = PyObject_GetAttrString(q, attr_names[i]);
        if (slot[i] == NULL) {
            PyErr_Clear();
            return 0;
        }
    }
    return 1;
}

static PyObject *get_item(PyObject *o, const char *name) {
    if (!PyDict_CheckExact(o)) return NULL;
    return PyDict_GetItemString(o, name); /* borrowed */
}

/* record_run(quality, truths, predicted, served, sources, start, other, max_sources)
 *   -> (stop, alarm) or None. `stop` is the label it stopped after (alarm or history
 *   sample), or len(truths) once every label is counted. */
static PyObject *py_record_run(PyObject *self, PyObject *args) {
    PyObject *q, *truths, *predicted, *served, *sources, *other;
    Py_ssize_t start, max_sources;
    if (!PyArg_ParseTuple(args, "OOOOOnOn", &q, &truths, &predicted, &served, &sources, &start,
                          &other, &max_sources))
        return NULL;
    if (!PyList_CheckExact(truths) || !PyList_CheckExact(predicted) ||
        !PyList_CheckExact(served) || !PyList_CheckExact(sources) || !PyUnicode_CheckExact(other))
        return not_handled();
    Py_ssize_t n = PyList_GET_SIZE(truths);
    if (PyList_GET_SIZE(predicted) != n || PyList_GET_SIZE(served) != n ||
        PyList_GET_SIZE(sources) != n || start < 0 || start > n)
        return not_handled();

    Attrs a;
    memset(&a, 0, sizeof a);
    PyObject *result = NULL;
    long long *grid = NULL;
    if (!attrs_take(q, &a)) goto fallback;

    long long k, labelled, mistakes, served_labelled, served_mistakes, stride;
    if (!as_ll(a.k, &k) || k < 2 || k > MAX_CLASSES || !PyBool_Check(a.binary) ||
        !as_ll(a.labelled, &labelled) || !as_ll(a.mistakes, &mistakes) ||
        !as_ll(a.served_labelled, &served_labelled) ||
        !as_ll(a.served_mistakes, &served_mistakes) || !as_ll(a.stride, &stride) || stride < 1)
        goto fallback;
    int binary = a.binary == Py_True;
    Py_ssize_t codes = binary ? 4 : 2;
    if (binary != (k == 2)) goto fallback;

    /* The windows, the ring they share and their counts. */
    if (!PyTuple_CheckExact(a.windows) || !PyByteArray_CheckExact(a.ring)) goto fallback;
    Py_ssize_t nwin = PyTuple_GET_SIZE(a.windows);
    long long widths[MAX_WINDOWS];
    if (nwin < 1 || nwin > MAX_WINDOWS) goto fallback;
    for (Py_ssize_t w = 0; w < nwin; w++)
        if (!as_ll(PyTuple_GET_ITEM(a.windows, w), &widths[w]) || widths[w] < 1) goto fallback;
    unsigned char *ring = (unsigned char *)PyByteArray_AS_STRING(a.ring);
    long long size = (long long)PyByteArray_GET_SIZE(a.ring);
    if (size < 1) goto fallback;

    /* The confusion matrices as the counts this call adds, the window counts whole. */
    grid = calloc((size_t)(2 * k * k + nwin * codes), sizeof(long long));
    if (grid == NULL) {
        PyErr_NoMemory();
        goto done;
    }
    long long *conf = grid, *sconf = grid + k * k, *counts = grid + 2 * k * k;
    if (!grid_shaped(a.confusion, k, k) || !grid_shaped(a.served_confusion, k, k) ||
        !read_grid(a.window_counts, nwin, codes, counts))
        goto fallback;

    /* The float state: decayed rate, Page-Hinkley test and its settings. */
    double decay, dm, dn, mean, m, m_min, statistic, alpha, delta, threshold;
    long long ph_n, min_samples;
    if (!as_double(a.decay, &decay) || !PyList_CheckExact(a.decayed) ||
        PyList_GET_SIZE(a.decayed) != 2 || !as_double(PyList_GET_ITEM(a.decayed, 0), &dm) ||
        !as_double(PyList_GET_ITEM(a.decayed, 1), &dn))
        goto fallback;
    if (!as_ll(get_item(a.ph, "n"), &ph_n) || !as_double(get_item(a.ph, "mean"), &mean) ||
        !as_double(get_item(a.ph, "m"), &m) || !as_double(get_item(a.ph, "m_min"), &m_min) ||
        !as_double(get_item(a.ph, "statistic"), &statistic) || PyDict_GET_SIZE(a.ph) != 5)
        goto fallback;
    {
        PyObject *pa = PyObject_GetAttrString(a.drift, "alpha");
        PyObject *pd = PyObject_GetAttrString(a.drift, "delta");
        PyObject *pt = PyObject_GetAttrString(a.drift, "threshold");
        PyObject *pm = PyObject_GetAttrString(a.drift, "min_samples");
        int ok = pa && pd && pt && pm && as_number(pa, &alpha) && as_number(pd, &delta) &&
                 as_number(pt, &threshold) && as_ll(pm, &min_samples);
        Py_XDECREF(pa);
        Py_XDECREF(pd);
        Py_XDECREF(pt);
        Py_XDECREF(pm);
        if (!ok) {
            PyErr_Clear();
            goto fallback;
        }
    }

    /* Every label and source, and every source's counts, before anything is counted. */
    if (!PyDict_CheckExact(a.by_source)) goto fallback;
    for (Py_ssize_t i = start; i < n; i++) {
        long long t, g, s = 0;
        PyObject *shown = PyList_GET_ITEM(served, i);
        if (!as_ll(PyList_GET_ITEM(truths, i), &t) || t < 0 || t >= k ||
            !as_ll(PyList_GET_ITEM(predicted, i), &g) || g < 0 || g >= k ||
            (shown != Py_None && (!as_ll(shown, &s) || s < 0 || s >= k)) ||
            !PyUnicode_CheckExact(PyList_GET_ITEM(sources, i)))
            goto fallback;
    }
    {
        Py_ssize_t pos = 0;
        PyObject *key, *value;
        while (PyDict_Next(a.by_source, &pos, &key, &value))
            if (!plain_pair(value)) goto fallback;
    }

    PyObject *pair = NULL; /* the source counts being added to (borrowed from by_source) */
    long long pair_labelled = 0, pair_mistakes = 0;
    Py_ssize_t i = start;
    int alarm = 0;
    for (; i < n; i++) {
        long long truth = PyLong_AsLongLong(PyList_GET_ITEM(truths, i));
        long long guess = PyLong_AsLongLong(PyList_GET_ITEM(predicted, i));
        int mistake = truth != guess;
        long long t = labelled;
        labelled += 1;
        mistakes += mistake;
        conf[truth * k + guess] += 1;
        int code = binary ? (int)(2 * truth + guess) : mistake;
        for (Py_ssize_t w = 0; w < nwin; w++) {
            if (t >= widths[w]) counts[w * codes + ring[(t - widths[w]) % size]] -= 1;
            counts[w * codes + code] += 1;
        }
        ring[t % size] = (unsigned char)code;
        dm = decay * dm + (double)mistake;
        dn = decay * dn + 1.0;
        PyObject *shown = PyList_GET_ITEM(served, i);
        if (shown != Py_None) {
            long long s = PyLong_AsLongLong(shown);
            served_labelled += 1;
            served_mistakes += truth != s;
            sconf[truth * k + s] += 1;
        }
        PyObject *source = PyList_GET_ITEM(sources, i);
        PyObject *found = PyDict_GetItemWithError(a.by_source, source);
        if (found == NULL) {
            if (PyErr_Occurred()) goto done;
            PyObject *key = PyDict_GET_SIZE(a.by_source) < max_sources ? source : other;
            PyObject *fresh = Py_BuildValue("[ii]", 0, 0);
            if (fresh == NULL) goto done;
            found = PyDict_SetDefault(a.by_source, key, fresh);
            Py_DECREF(fresh);
            if (found == NULL) goto done;
            if (!plain_pair(found)) {
                PyErr_SetString(PyExc_TypeError, "a source's counts must be two ints");
                goto done;
            }
        }
        if (found != pair) {
            if (pair != NULL && add_pair(pair, pair_labelled, pair_mistakes) < 0) goto done;
            pair = found;
            pair_labelled = pair_mistakes = 0;
        }
        pair_labelled += 1;
        pair_mistakes += mistake;
        /* Page-Hinkley, as quality_runs.py computes it. */
        double x = mistake ? 1.0 : 0.0;
        ph_n += 1;
        mean += (x - mean) / (double)ph_n;
        m = alpha * m + (x - mean - delta);
        if (m < m_min) m_min = m;
        statistic = m - m_min;
        alarm = !(ph_n < min_samples || statistic <= threshold);
        if (alarm || labelled % stride == 0) break;
    }
    if (pair != NULL && add_pair(pair, pair_labelled, pair_mistakes) < 0) goto done;

    /* Write back what the Python loop keeps in locals. */
    if (add_grid(a.confusion, k, k, conf) < 0 || add_grid(a.served_confusion, k, k, sconf) < 0 ||
        write_grid(a.window_counts, nwin, codes, counts) < 0)
        goto done;
    if (set_ll(q, "labelled", labelled) < 0 || set_ll(q, "mistakes", mistakes) < 0 ||
        set_ll(q, "served_labelled", served_labelled) < 0 ||
        set_ll(q, "served_mistakes", served_mistakes) < 0)
        goto done;
    PyObject *decayed = Py_BuildValue("[dd]", dm, dn);
    if (decayed == NULL || PyObject_SetAttrString(q, "decayed", decayed) < 0) {
        Py_XDECREF(decayed);
        goto done;
    }
    Py_DECREF(decayed);
    PyObject *ph = Py_BuildValue("{s:L,s:d,s:d,s:d,s:d}", "n", ph_n, "mean", mean, "m", m,
                                 "m_min", m_min, "statistic", statistic);
    if (ph == NULL || PyObject_SetAttrString(q, "ph", ph) < 0) {
        Py_XDECREF(ph);
        goto done;
    }
    Py_DECREF(ph);
    result = Py_BuildValue("(nO)", i, alarm ? Py_True : Py_False);
    goto done;

fallback:
    PyErr_Clear();
    result = not_handled();
done:
    free(grid);
    attrs_release(&a);
    return result;
}

static PyMethodDef methods[] = {
    {"record_run", py_record_run, METH_VARARGS,
     "Count labels from start until an alarm or a history sample: (stop, alarm), or None."},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef module = {
    PyModuleDef_HEAD_INIT, "thresher._quality",
    "Compiled fast path of thresher.quality_runs (see quality_runs.py for the reference).", -1,
    methods,
};

PyMODINIT_FUNC PyInit__quality(void) { return PyModule_Create(&module); }

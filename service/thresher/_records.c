/* thresher._records: the compiled fast path of records.encode_many and segments.frame_records.
 *
 * PURE: reads the records, rows and payloads it is handed and returns new bytes objects.
 * `encode` writes each record as the version 2 msgpack array records.py documents, byte for
 * byte as msgpack-python's Packer(use_bin_type=True) writes it in the reference: the shortest
 * str and bin headers, the time as a big-endian float64, the row as little-endian uint32
 * indices and float32 values. `frame` writes each payload after its little-endian u32 length
 * and u32 CRC-32 (computed by the function it is handed, zlib.crc32, so that nothing is
 * linked beyond Python), as segments.py documents. Anything not handled here -- a record
 * that is not a plain dict of exactly typed values, a row index outside uint32, a payload
 * that is not bytes or has an impossible length, arrays of another dtype -- answers None and
 * the Python reference takes it, which then encodes it or raises the exact error.
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>

#include <math.h>
#include <stdint.h>
#include <string.h>

#if defined(__BYTE_ORDER__) && __BYTE_ORDER__ == __ORDER_LITTLE_ENDIAN__
#define ROWS_AS_STORED 1 /* host order is the stored order: rows are copied as they are */
#else
#define ROWS_AS_STORED 0 /* the reference encodes every record */
#endif

#define VERSION 2
#define STR_MAX 0xffffffffLL

static PyObject *k_id, *k_label, *k_source, *k_served, *k_time, *k_packed;

static PyObject *not_handled(void) { Py_RETURN_NONE; }

typedef struct {
    const char *p;
    Py_ssize_t n;
} Span;

/* The UTF-8 of an exact str, or 0 (its error cleared: the reference raises it again). */
static int utf8(PyObject *o, Span *s) {
    if (!PyUnicode_CheckExact(o)) return 0;
    s->p = PyUnicode_AsUTF8AndSize(o, &s->n);
    if (s->p == NULL) {
        PyErr_Clear();
        return 0;
    }
    return s->n <= STR_MAX;
}

static Py_ssize_t str_size(const Span *s) {
    return s->n + (s->n < 32 ? 1 : s->n < 256 ? 2 : s->n < 65536 ? 3 : 5);
}

static Py_ssize_t bin_size(Py_ssize_t n) { return n + (n < 256 ? 2 : n < 65536 ? 3 : 5); }

static unsigned char *put_be(unsigned char *w, uint64_t v, int bytes) {
    for (int b = bytes - 1; b >= 0; b--) *w++ = (unsigned char)(v >> (8 * b));
    return w;
}

static unsigned char *put_str(unsigned char *w, const Span *s) {
    if (s->n < 32) {
        *w++ = (unsigned char)(0xa0 | s->n);
    } else if (s->n < 256) {
        *w++ = 0xd9;
        w = put_be(w, (uint64_t)s->n, 1);
    } else if (s->n < 65536) {
        *w++ = 0xda;
        w = put_be(w, (uint64_t)s->n, 2);
    } else {
        *w++ = 0xdb;
        w = put_be(w, (uint64_t)s->n, 4);
    }
    memcpy(w, s->p, (size_t)s->n);
    return w + s->n;
}

static unsigned char *put_bin_head(unsigned char *w, Py_ssize_t n) {
    if (n < 256) {
        *w++ = 0xc4;
        return put_be(w, (uint64_t)n, 1);
    }
    if (n < 65536) {
        *w++ = 0xc5;
        return put_be(w, (uint64_t)n, 2);
    }
    *w++ = 0xc6;
    return put_be(w, (uint64_t)n, 4);
}

/* A 1-D C-contiguous buffer of `itemsize` bytes per element whose format ends in one of
 * `codes`; 1 when held (release it), 0 when not (nothing held). */
static int hold(PyObject *o, Py_buffer *view, Py_ssize_t itemsize, const char *codes) {
    if (PyObject_GetBuffer(o, view, PyBUF_C_CONTIGUOUS | PyBUF_FORMAT) != 0) {
        PyErr_Clear();
        return 0;
    }
    const char *f = view->format;
    size_t len = f == NULL ? 0 : strlen(f);
    int ok = view->ndim == 1 && view->itemsize == itemsize && len > 0 && len <= 2 &&
             (len == 1 || f[0] == '<' || f[0] == '=') && strchr(codes, f[len - 1]) != NULL;
    if (!ok) PyBuffer_Release(view);
    return ok;
}

typedef struct {
    Span id, label, source, served;
    int has_id, has_served;
    double time;
    PyObject *packed;
    Py_ssize_t a, b; /* the record's row: elements a..b of the batch */
} Record;

/* The plain record at `rec` with row `pick`; 0 when the reference must take it. */
static int read_record(PyObject *rec, PyObject *pick, const int64_t *ptr, Py_ssize_t rows,
                       Py_ssize_t nnz, Record *r) {
    if (!PyDict_CheckExact(rec) || !PyLong_CheckExact(pick)) return 0;
    PyObject *id = PyDict_GetItemWithError(rec, k_id);
    PyObject *label = PyDict_GetItemWithError(rec, k_label);
    PyObject *source = PyDict_GetItemWithError(rec, k_source);
    PyObject *served = PyDict_GetItemWithError(rec, k_served);
    PyObject *stamp = PyDict_GetItemWithError(rec, k_time);
    PyObject *packed = PyDict_GetItemWithError(rec, k_packed);
    if (PyErr_Occurred()) {
        PyErr_Clear();
        return 0;
    }
    if (!id || !label || !source || !served || !stamp || !packed) return 0;
    r->has_id = id != Py_None;
    r->has_served = served != Py_None;
    if ((r->has_id && !utf8(id, &r->id)) || !utf8(label, &r->label) ||
        !utf8(source, &r->source) || (r->has_served && !utf8(served, &r->served)))
        return 0;
    if (!PyFloat_CheckExact(stamp)) return 0;
    r->time = PyFloat_AS_DOUBLE(stamp);
    if (!isfinite(r->time) || !PyBytes_CheckExact(packed) || PyBytes_GET_SIZE(packed) > STR_MAX)
        return 0;
    r->packed = packed;
    Py_ssize_t p = PyLong_AsSsize_t(pick);
    if (p == -1 && PyErr_Occurred()) {
        PyErr_Clear();
        return 0;
    }
    if (p < 0 || p >= rows) return 0;
    r->a = (Py_ssize_t)ptr[p];
    r->b = (Py_ssize_t)ptr[p + 1];
    return 0 <= r->a && r->a <= r->b && r->b <= nnz && (r->b - r->a) * 4 <= STR_MAX;
}

static Py_ssize_t record_size(const Record *r, Py_ssize_t key_bytes) {
    Py_ssize_t rowb = (r->b - r->a) * 4;
    return 2 + (r->has_id ? str_size(&r->id) : 1) + str_size(&r->label) + str_size(&r->source) +
           (r->has_served ? str_size(&r->served) : 1) + 9 +
           bin_size(PyBytes_GET_SIZE(r->packed)) + bin_size(key_bytes) + 2 * bin_size(rowb);
}

static PyObject *write_record(const Record *r, const char *key, Py_ssize_t key_bytes,
                              const int64_t *indices, const float *values) {
    Py_ssize_t size = record_size(r, key_bytes);
    PyObject *out = PyBytes_FromStringAndSize(NULL, size);
    if (out == NULL) return NULL;
    unsigned char *w = (unsigned char *)PyBytes_AS_STRING(out);
    *w++ = 0x9a; /* an array of 10 */
    *w++ = VERSION;
    if (r->has_id)
        w = put_str(w, &r->id);
    else
        *w++ = 0xc0;
    w = put_str(w, &r->label);
    w = put_str(w, &r->source);
    if (r->has_served)
        w = put_str(w, &r->served);
    else
        *w++ = 0xc0;
    uint64_t bits;
    memcpy(&bits, &r->time, 8);
    *w++ = 0xcb;
    w = put_be(w, bits, 8);
    Py_ssize_t packed_bytes = PyBytes_GET_SIZE(r->packed);
    w = put_bin_head(w, packed_bytes);
    memcpy(w, PyBytes_AS_STRING(r->packed), (size_t)packed_bytes);
    w += packed_bytes;
    w = put_bin_head(w, key_bytes);
    memcpy(w, key, (size_t)key_bytes);
    w += key_bytes;
    Py_ssize_t count = r->b - r->a;
    w = put_bin_head(w, count * 4);
    for (Py_ssize_t j = r->a; j < r->b; j++) {
        uint32_t index = (uint32_t)indices[j];
        memcpy(w, &index, 4);
        w += 4;
    }
    w = put_bin_head(w, count * 4);
    memcpy(w, values + r->a, (size_t)count * 4);
    return out;
}

/* encode(records, key, indptr, indices, values, picks) -> list of payloads, or None.
 * indptr and indices int64, values float32, all 1-D and C-contiguous: the CSR batch. */
static PyObject *py_encode(PyObject *self, PyObject *args) {
    PyObject *recs, *key, *optr, *oidx, *oval, *picks;
    if (!PyArg_ParseTuple(args, "OOOOOO", &recs, &key, &optr, &oidx, &oval, &picks)) return NULL;
    if (!ROWS_AS_STORED || !PyList_CheckExact(recs) || !PyList_CheckExact(picks) ||
        !PyBytes_CheckExact(key) || PyList_GET_SIZE(recs) != PyList_GET_SIZE(picks))
        return not_handled();
    Py_buffer ptrv, idxv, valv;
    if (!hold(optr, &ptrv, 8, "lq")) return not_handled();
    if (!hold(oidx, &idxv, 8, "lq")) {
        PyBuffer_Release(&ptrv);
        return not_handled();
    }
    if (!hold(oval, &valv, 4, "f")) {
        PyBuffer_Release(&ptrv);
        PyBuffer_Release(&idxv);
        return not_handled();
    }
    PyObject *out = NULL;
    const int64_t *ptr = ptrv.buf, *indices = idxv.buf;
    const float *values = valv.buf;
    Py_ssize_t rows = ptrv.shape[0] - 1, nnz = idxv.shape[0];
    int ok = rows >= 0 && valv.shape[0] == nnz;
    for (Py_ssize_t j = 0; ok && j < nnz; j++) /* the reference checks the whole batch */
        ok = indices[j] >= 0 && indices[j] <= (int64_t)UINT32_MAX;
    if (!ok) {
        out = not_handled();
        goto done;
    }
    Py_ssize_t n = PyList_GET_SIZE(recs);
    out = PyList_New(n);
    if (out == NULL) goto done;
    for (Py_ssize_t k = 0; k < n; k++) {
        Record r;
        if (!read_record(PyList_GET_ITEM(recs, k), PyList_GET_ITEM(picks, k), ptr, rows, nnz,
                         &r)) {
            Py_DECREF(out);
            out = not_handled();
            goto done;
        }
        PyObject *payload =
            write_record(&r, PyBytes_AS_STRING(key), PyBytes_GET_SIZE(key), indices, values);
        if (payload == NULL) {
            Py_CLEAR(out);
            goto done;
        }
        PyList_SET_ITEM(out, k, payload);
    }
done:
    PyBuffer_Release(&ptrv);
    PyBuffer_Release(&idxv);
    PyBuffer_Release(&valv);
    return out;
}

/* frame(payloads, crc32, max_bytes) -> the payloads framed in one bytes, or None. `crc32`
 * is called with each payload and must answer its CRC-32 as an int. */
static PyObject *py_frame(PyObject *self, PyObject *args) {
    PyObject *payloads, *crc32;
    Py_ssize_t most;
    if (!PyArg_ParseTuple(args, "OOn", &payloads, &crc32, &most)) return NULL;
    if (!PyList_CheckExact(payloads) || PyList_GET_SIZE(payloads) == 0 || most > 0xffffffffLL)
        return not_handled();
    /* The payloads held in a tuple: whatever crc32 does, they stay the ones sized here. */
    PyObject *held = PyList_AsTuple(payloads);
    if (held == NULL) return NULL;
    Py_ssize_t n = PyTuple_GET_SIZE(held), total = 0;
    for (Py_ssize_t k = 0; k < n; k++) {
        PyObject *p = PyTuple_GET_ITEM(held, k);
        if (!PyBytes_CheckExact(p) || PyBytes_GET_SIZE(p) == 0 || PyBytes_GET_SIZE(p) > most ||
            total > PY_SSIZE_T_MAX - 8 - PyBytes_GET_SIZE(p)) {
            Py_DECREF(held);
            return not_handled();
        }
        total += 8 + PyBytes_GET_SIZE(p);
    }
    PyObject *out = PyBytes_FromStringAndSize(NULL, total);
    if (out == NULL) {
        Py_DECREF(held);
        return NULL;
    }
    unsigned char *w = (unsigned char *)PyBytes_AS_STRING(out);
    for (Py_ssize_t k = 0; k < n; k++) {
        PyObject *p = PyTuple_GET_ITEM(held, k);
        PyObject *made = PyObject_CallOneArg(crc32, p);
        unsigned long crc = made == NULL ? 0 : PyLong_AsUnsignedLong(made);
        Py_XDECREF(made);
        if (made == NULL || (crc == (unsigned long)-1 && PyErr_Occurred()) || crc > 0xffffffffUL) {
            Py_DECREF(held);
            Py_DECREF(out);
            if (PyErr_Occurred()) return NULL;
            return not_handled();
        }
        Py_ssize_t size = PyBytes_GET_SIZE(p);
        for (int b = 0; b < 4; b++) *w++ = (unsigned char)((uint64_t)size >> (8 * b));
        for (int b = 0; b < 4; b++) *w++ = (unsigned char)(crc >> (8 * b));
        memcpy(w, PyBytes_AS_STRING(p), (size_t)size);
        w += size;
    }
    Py_DECREF(held);
    return out;
}

static PyMethodDef methods[] = {
    {"encode", py_encode, METH_VARARGS,
     "Version 2 payloads of records with rows picked from a CSR batch, or None."},
    {"frame", py_frame, METH_VARARGS,
     "Payloads framed for a segment file (length, CRC-32, payload), or None."},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef module = {
    PyModuleDef_HEAD_INIT, "thresher._records",
    "Compiled fast path of thresher.records and segment framing (see records.py and "
    "segments.py for the reference).",
    -1, methods,
};

PyMODINIT_FUNC PyInit__records(void) {
    PyObject **keys[] = {&k_id, &k_label, &k_source, &k_served, &k_time, &k_packed};
    const char *names[] = {"id", "label", "source", "served", "time", "packed"};
    for (size_t i = 0; i < sizeof keys / sizeof keys[0]; i++) {
        *keys[i] = PyUnicode_InternFromString(names[i]);
        if (*keys[i] == NULL) return NULL;
    }
    return PyModule_Create(&module);
}

/* thresher._appliedids: the compiled fast path of appliedids.IdTable's hash, find, put, grow.
 *
 * PURE: reads the table arrays it is handed and writes them only in `put` and `rehash`. An id
 * is hashed as MurmurHash3_x64_128 (seed 0) of its UTF-8 bytes, giving (h1, h2); its home slot
 * is h1 & (capacity - 1) and collisions probe linearly. A slot is empty when its `cls` is 0,
 * otherwise it holds class index + 1. This is exactly what the Python reference in
 * appliedids.py does (with mmh3's hash64), so both leave bit-identical arrays
 * (tests/test_appliedids.py compares them). Anything not handled here -- a str subclass, an id
 * with lone surrogates (not UTF-8), arrays of another dtype or layout -- answers None and the
 * reference takes it.
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>

#include <stdint.h>
#include <string.h>

static inline uint64_t rotl64(uint64_t x, int r) { return (x << r) | (x >> (64 - r)); }

static inline uint64_t fmix64(uint64_t k) {
    k ^= k >> 33;
    k *= 0xff51afd7ed558ccdULL;
    k ^= k >> 33;
    k *= 0xc4ceb9fe1a85ec53ULL;
    k ^= k >> 33;
    return k;
}

/* MurmurHash3_x64_128 as published, seed 0; blocks read little-endian as on x86-64. */
static void murmur3_x64_128(const uint8_t *data, size_t len, uint64_t *o1, uint64_t *o2) {
    const size_t nblocks = len / 16;
    uint64_t h1 = 0, h2 = 0;
    const uint64_t c1 = 0x87c37b91114253d5ULL, c2 = 0x4cf5ad432745937fULL;
    for (size_t i = 0; i < nblocks; i++) {
        uint64_t k1, k2;
        memcpy(&k1, data + i * 16, 8);
        memcpy(&k2, data + i * 16 + 8, 8);
        k1 *= c1; k1 = rotl64(k1, 31); k1 *= c2; h1 ^= k1;
        h1 = rotl64(h1, 27); h1 += h2; h1 = h1 * 5 + 0x52dce729;
        k2 *= c2; k2 = rotl64(k2, 33); k2 *= c1; h2 ^= k2;
        h2 = rotl64(h2, 31); h2 += h1; h2 = h2 * 5 + 0x38495ab5;
    }
    const uint8_t *tail = data + nblocks * 16;
    uint64_t k1 = 0, k2 = 0;
    switch (len & 15) {
    case 15: k2 ^= (uint64_t)tail[14] << 48; /* fall through */
    case 14: k2 ^= (uint64_t)tail[13] << 40; /* fall through */
    case 13: k2 ^= (uint64_t)tail[12] << 32; /* fall through */
    case 12: k2 ^= (uint64_t)tail[11] << 24; /* fall through */
    case 11: k2 ^= (uint64_t)tail[10] << 16; /* fall through */
    case 10: k2 ^= (uint64_t)tail[9] << 8; /* fall through */
    case 9:
        k2 ^= (uint64_t)tail[8];
        k2 *= c2; k2 = rotl64(k2, 33); k2 *= c1; h2 ^= k2;
        /* fall through */
    case 8: k1 ^= (uint64_t)tail[7] << 56; /* fall through */
    case 7: k1 ^= (uint64_t)tail[6] << 48; /* fall through */
    case 6: k1 ^= (uint64_t)tail[5] << 40; /* fall through */
    case 5: k1 ^= (uint64_t)tail[4] << 32; /* fall through */
    case 4: k1 ^= (uint64_t)tail[3] << 24; /* fall through */
    case 3: k1 ^= (uint64_t)tail[2] << 16; /* fall through */
    case 2: k1 ^= (uint64_t)tail[1] << 8; /* fall through */
    case 1:
        k1 ^= (uint64_t)tail[0];
        k1 *= c1; k1 = rotl64(k1, 31); k1 *= c2; h1 ^= k1;
    }
    h1 ^= (uint64_t)len;
    h2 ^= (uint64_t)len;
    h1 += h2;
    h2 += h1;
    h1 = fmix64(h1);
    h2 = fmix64(h2);
    h1 += h2;
    h2 += h1;
    *o1 = h1;
    *o2 = h2;
}

/* The hash of an exact str; 1 when it is something else or not UTF-8 (the reference takes it). */
static int hash_key(PyObject *key, uint64_t *h1, uint64_t *h2) {
    if (!PyUnicode_CheckExact(key)) return 1;
    Py_ssize_t len;
    const char *bytes = PyUnicode_AsUTF8AndSize(key, &len);
    if (bytes == NULL) {
        PyErr_Clear(); /* lone surrogates: the reference encodes with surrogatepass */
        return 1;
    }
    murmur3_x64_128((const uint8_t *)bytes, (size_t)len, h1, h2);
    return 0;
}

typedef struct {
    Py_buffer b1, b2, bc;
    int held;
    uint64_t *h1, *h2;
    int32_t *cls;
    size_t mask;
} Table;

static int is_type(Py_buffer *v, char letter, Py_ssize_t itemsize) {
    const char *f = v->format;
    if (f == NULL || v->itemsize != itemsize || v->ndim != 1) return 0;
    if (f[0] == '>' || f[0] == '!') return 0; /* big-endian data */
    char last = f[strlen(f) - 1];
    return last == letter || (itemsize == 8 && letter == 'Q' && last == 'L');
}

static void table_release(Table *t) {
    if (t->held >= 1) PyBuffer_Release(&t->b1);
    if (t->held >= 2) PyBuffer_Release(&t->b2);
    if (t->held >= 3) PyBuffer_Release(&t->bc);
    t->held = 0;
}

/* 0 held, 1 not three writable C-contiguous uint64/uint64/int32 arrays of one power-of-two
 * length (the reference takes it), -1 error. */
static int table_hold(PyObject *a1, PyObject *a2, PyObject *ac, Table *t) {
    const int flags = PyBUF_C_CONTIGUOUS | PyBUF_FORMAT | PyBUF_WRITABLE;
    t->held = 0;
    PyObject *objs[3] = {a1, a2, ac};
    Py_buffer *views[3] = {&t->b1, &t->b2, &t->bc};
    for (int i = 0; i < 3; i++) {
        if (PyObject_GetBuffer(objs[i], views[i], flags) < 0) {
            if (PyErr_ExceptionMatches(PyExc_MemoryError)) {
                table_release(t);
                return -1;
            }
            PyErr_Clear();
            table_release(t);
            return 1;
        }
        t->held = i + 1;
    }
    Py_ssize_t n = t->b1.shape[0];
    if (!is_type(&t->b1, 'Q', 8) || !is_type(&t->b2, 'Q', 8) || !is_type(&t->bc, 'i', 4) ||
        t->b2.shape[0] != n || t->bc.shape[0] != n || n <= 0 || (n & (n - 1)) != 0) {
        table_release(t);
        return 1;
    }
    t->h1 = t->b1.buf;
    t->h2 = t->b2.buf;
    t->cls = t->bc.buf;
    t->mask = (size_t)n - 1;
    return 0;
}

/* The slot holding (h1, h2), or the empty slot where it would go; -1 when the table is full. */
static Py_ssize_t probe(const Table *t, uint64_t h1, uint64_t h2) {
    size_t i = (size_t)h1 & t->mask;
    for (size_t step = 0; step <= t->mask; step++) {
        if (t->cls[i] == 0 || (t->h1[i] == h1 && t->h2[i] == h2)) return (Py_ssize_t)i;
        i = (i + 1) & t->mask;
    }
    return -1;
}

static PyObject *full_table(void) {
    PyErr_SetString(PyExc_RuntimeError, "applied-id table is full; it must grow before a put");
    return NULL;
}

/* hash128(key) -> (h1, h2) or None */
static PyObject *py_hash128(PyObject *self, PyObject *key) {
    uint64_t h1, h2;
    if (hash_key(key, &h1, &h2)) Py_RETURN_NONE;
    return Py_BuildValue("(KK)", (unsigned long long)h1, (unsigned long long)h2);
}

/* Table(h1s, h2s, cls): one table's arrays, held for the object's life so that each find or
 * put skips taking three buffers (most of a call's cost). TypeError when they do not fit;
 * appliedids then uses the reference. */
typedef struct {
    PyObject_HEAD
    Table t;
} TableObject;

static int TableObject_init(TableObject *self, PyObject *args, PyObject *kwargs) {
    PyObject *a1, *a2, *ac;
    if (!PyArg_ParseTuple(args, "OOO", &a1, &a2, &ac)) return -1;
    table_release(&self->t);
    int held = table_hold(a1, a2, ac, &self->t);
    if (held > 0) {
        PyErr_SetString(PyExc_TypeError, "Table needs writable C-contiguous uint64, uint64 and "
                                         "int32 arrays of one power-of-two length");
    }
    return held == 0 ? 0 : -1;
}

static void TableObject_dealloc(TableObject *self) {
    table_release(&self->t);
    Py_TYPE(self)->tp_free((PyObject *)self);
}

/* find(key) -> class index, -1 when absent, or None (the reference answers) */
static PyObject *TableObject_find(TableObject *self, PyObject *key) {
    uint64_t h1, h2;
    if (!self->t.held || hash_key(key, &h1, &h2)) Py_RETURN_NONE;
    Py_ssize_t i = probe(&self->t, h1, h2);
    return PyLong_FromLong(i < 0 ? -1 : (long)self->t.cls[i] - 1);
}

/* put(key, y) -> 1 new, 0 replaced, or None (the reference answers) */
static PyObject *TableObject_put(TableObject *self, PyObject *args) {
    PyObject *key;
    int y;
    if (!PyArg_ParseTuple(args, "Oi", &key, &y)) return NULL;
    if (y < 0 || y == INT32_MAX) Py_RETURN_NONE; /* the reference raises its error */
    uint64_t h1, h2;
    if (!self->t.held || hash_key(key, &h1, &h2)) Py_RETURN_NONE;
    Py_ssize_t i = probe(&self->t, h1, h2);
    if (i < 0) return full_table();
    int fresh = self->t.cls[i] == 0;
    self->t.h1[i] = h1;
    self->t.h2[i] = h2;
    self->t.cls[i] = (int32_t)y + 1;
    return PyLong_FromLong(fresh);
}

/* Whether ``item`` is an (exact str, int in 0..INT32_MAX - 1) pair: its hash and class. */
static int pair_of(PyObject *item, uint64_t *h1, uint64_t *h2, int32_t *y) {
    if (!PyTuple_CheckExact(item) || PyTuple_GET_SIZE(item) != 2) return 0;
    PyObject *cls = PyTuple_GET_ITEM(item, 1);
    if (!PyLong_CheckExact(cls)) return 0;
    int overflow;
    long v = PyLong_AsLongAndOverflow(cls, &overflow);
    if (overflow || v < 0 || v >= INT32_MAX) return 0;
    if (hash_key(PyTuple_GET_ITEM(item, 0), h1, h2)) return 0;
    *y = (int32_t)v;
    return 1;
}

/* put_many(pairs, start, previous, count, max_count, rotate_at) -> (next, added, shadowed)
 *
 * Puts the (id, class) pairs of a list from ``start`` on, as put one by one would, and stops
 * where appliedids must act: before a new id that would take the table past ``max_count``
 * entries (it grows), after a new id that brings it to ``rotate_at`` (> 0: it rotates), or at
 * a pair it leaves to the reference. ``shadowed`` counts new ids that ``previous`` (a Table or
 * None) also holds. */
static PyObject *TableObject_put_many(TableObject *self, PyObject *args) {
    PyObject *pairs, *previous;
    Py_ssize_t start, count, max_count, rotate_at;
    if (!PyArg_ParseTuple(args, "O!nOnnn", &PyList_Type, &pairs, &start, &previous, &count,
                          &max_count, &rotate_at))
        return NULL;
    const Table *prev = NULL;
    if (previous != Py_None) {
        if (!PyObject_TypeCheck(previous, Py_TYPE(self))) {
            PyErr_SetString(PyExc_TypeError, "previous must be a Table or None");
            return NULL;
        }
        prev = ((TableObject *)previous)->t.held ? &((TableObject *)previous)->t : NULL;
        if (prev == NULL) Py_RETURN_NONE;
    }
    if (!self->t.held) Py_RETURN_NONE;
    Py_ssize_t n = PyList_GET_SIZE(pairs), i = start < 0 ? 0 : start, added = 0, shadowed = 0;
    for (; i < n; i++) {
        uint64_t h1, h2;
        int32_t y;
        if (!pair_of(PyList_GET_ITEM(pairs, i), &h1, &h2, &y)) break;
        Py_ssize_t slot = probe(&self->t, h1, h2);
        if (slot < 0) return full_table();
        if (self->t.cls[slot] != 0) {
            self->t.cls[slot] = y + 1;
            continue;
        }
        if (count + added >= max_count) break;
        self->t.h1[slot] = h1;
        self->t.h2[slot] = h2;
        self->t.cls[slot] = y + 1;
        added++;
        if (prev != NULL) {
            Py_ssize_t there = probe(prev, h1, h2);
            shadowed += there >= 0 && prev->cls[there] != 0;
        }
        if (rotate_at > 0 && count + added >= rotate_at) {
            i++;
            break;
        }
    }
    return Py_BuildValue("(nnn)", i, added, shadowed);
}

static PyMethodDef table_methods[] = {
    {"find", (PyCFunction)TableObject_find, METH_O, "The class index stored for an id, or -1."},
    {"put", (PyCFunction)TableObject_put, METH_VARARGS,
     "Store an id's class index; 1 when the id is new."},
    {"put_many", (PyCFunction)TableObject_put_many, METH_VARARGS,
     "Put (id, class) pairs until appliedids must grow or rotate the table."},
    {NULL, NULL, 0, NULL},
};

static PyTypeObject TableType = {
    PyVarObject_HEAD_INIT(NULL, 0).tp_name = "thresher._appliedids.Table",
    .tp_basicsize = sizeof(TableObject),
    .tp_flags = Py_TPFLAGS_DEFAULT,
    .tp_doc = "One applied-id table's arrays, held for fast find and put.",
    .tp_new = PyType_GenericNew,
    .tp_init = (initproc)TableObject_init,
    .tp_dealloc = (destructor)TableObject_dealloc,
    .tp_methods = table_methods,
};

/* rehash(old h1s, h2s, cls, new h1s, h2s, cls) -> True, or None (the reference moves them).
 * Moves every entry of the old table to the new one in slot order, as the reference does. */
static PyObject *py_rehash(PyObject *self, PyObject *args) {
    PyObject *o1, *o2, *oc, *n1, *n2, *nc;
    if (!PyArg_ParseTuple(args, "OOOOOO", &o1, &o2, &oc, &n1, &n2, &nc)) return NULL;
    Table from, to;
    int held = table_hold(o1, o2, oc, &from);
    if (held != 0) return held < 0 ? NULL : (Py_INCREF(Py_None), Py_None);
    held = table_hold(n1, n2, nc, &to);
    if (held != 0) {
        table_release(&from);
        return held < 0 ? NULL : (Py_INCREF(Py_None), Py_None);
    }
    for (size_t k = 0; k <= from.mask; k++) {
        if (from.cls[k] == 0) continue;
        Py_ssize_t i = probe(&to, from.h1[k], from.h2[k]);
        if (i < 0) {
            table_release(&from);
            table_release(&to);
            return full_table();
        }
        to.h1[i] = from.h1[k];
        to.h2[i] = from.h2[k];
        to.cls[i] = from.cls[k];
    }
    table_release(&from);
    table_release(&to);
    Py_RETURN_TRUE;
}

/* gather(h1s, h2s, cls, used h1s, used h2s, small cls) -> True, or None (the reference takes
 * the state). Fills the used slots' hashes in slot order and `cls` as uint8, as IdTable.state
 * does, in one pass without the GIL: a snapshot takes it in a worker thread beside the event
 * loop. None when the used slots are not exactly as many as the outputs hold or a class does
 * not fit a byte. */
static PyObject *py_gather(PyObject *self, PyObject *args) {
    PyObject *o1, *o2, *oc, *u1, *u2, *us;
    if (!PyArg_ParseTuple(args, "OOOOOO", &o1, &o2, &oc, &u1, &u2, &us)) return NULL;
    Table from;
    int held = table_hold(o1, o2, oc, &from);
    if (held != 0) return held < 0 ? NULL : (Py_INCREF(Py_None), Py_None);
    const int flags = PyBUF_C_CONTIGUOUS | PyBUF_FORMAT | PyBUF_WRITABLE;
    Py_buffer v1, v2, vs;
    int got = 0;
    if (PyObject_GetBuffer(u1, &v1, flags) == 0) {
        got = 1;
        if (PyObject_GetBuffer(u2, &v2, flags) == 0) {
            got = 2;
            if (PyObject_GetBuffer(us, &vs, flags) == 0) got = 3;
        }
    }
    PyObject *out = NULL;
    if (got < 3) {
        PyErr_Clear();
    } else if (is_type(&v1, 'Q', 8) && is_type(&v2, 'Q', 8) && is_type(&vs, 'B', 1) &&
               v2.shape[0] == v1.shape[0] && vs.shape[0] == (Py_ssize_t)from.mask + 1) {
        uint64_t *h1 = v1.buf, *h2 = v2.buf;
        uint8_t *small = vs.buf;
        size_t room = (size_t)v1.shape[0], used = 0;
        int fits = 1;
        Py_BEGIN_ALLOW_THREADS
        for (size_t k = 0; k <= from.mask; k++) {
            int32_t c = from.cls[k];
            if (c < 0 || c > 255) {
                fits = 0;
                break;
            }
            small[k] = (uint8_t)c;
            if (c == 0) continue;
            if (used == room) {
                fits = 0;
                break;
            }
            h1[used] = from.h1[k];
            h2[used] = from.h2[k];
            used++;
        }
        Py_END_ALLOW_THREADS
        if (fits && used == room) out = Py_True;
    }
    if (got >= 1) PyBuffer_Release(&v1);
    if (got >= 2) PyBuffer_Release(&v2);
    if (got >= 3) PyBuffer_Release(&vs);
    table_release(&from);
    out = out == NULL ? Py_None : out;
    Py_INCREF(out);
    return out;
}

static PyMethodDef methods[] = {
    {"hash128", py_hash128, METH_O, "MurmurHash3_x64_128 (seed 0) of a str's UTF-8: (h1, h2)."},
    {"rehash", py_rehash, METH_VARARGS, "Move every entry of one table into another."},
    {"gather", py_gather, METH_VARARGS, "A table's snapshot arrays, in one pass; or None."},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef module = {
    PyModuleDef_HEAD_INIT, "thresher._appliedids",
    "Compiled fast path of thresher.appliedids (see appliedids.py for the reference).", -1,
    methods,
};

PyMODINIT_FUNC PyInit__appliedids(void) {
    if (PyType_Ready(&TableType) < 0) return NULL;
    PyObject *m = PyModule_Create(&module);
    if (m == NULL) return NULL;
    Py_INCREF(&TableType);
    if (PyModule_AddObject(m, "Table", (PyObject *)&TableType) < 0) {
        Py_DECREF(&TableType);
        Py_DECREF(m);
        return NULL;
    }
    return m;
}

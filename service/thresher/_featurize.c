/* thresher._featurize: the compiled fast path of thresher.features.Featurizer.
 *
 * PURE: no I/O, no clocks, no globals. A Plan is made once per model from its feature spec
 * (thresher.features builds the arguments) and turns events' field dicts straight into hashed
 * sparse rows: tokens are built as UTF-8 bytes in a scratch buffer and hashed with
 * MurmurHash3_x86_32 (Appleby) without ever becoming Python strings, which is where the pure
 * Python path spends its time.
 *
 * The Python path in features.py / field_tokens.py is the reference: this file follows it
 * token for token, in the same order, and sums repeats in the same order, so both give
 * bit-identical rows (tests/test_featurize_native.py holds them together on generated events).
 * Whatever this file does not handle the same way -- any value that is an error, a type that is
 * not exactly str/int/float/bool/list/tuple/dict, a string over the size limit, an event over
 * the token limit -- makes it hand the whole event back to the Python path ("fallback"), which
 * raises the precise InvalidEvent or makes the row. A fast path therefore never changes an
 * answer, only how quickly it is found.
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>

#include <math.h>
#include <stdint.h>
#include <stdio.h>
#include <stdlib.h>
#include <string.h>

#define OK 0
#define FALLBACK 1
#define FAILED (-1) /* a Python exception is set (only MemoryError in practice) */

#define CROSS_CAP 64 /* as features.CROSS_CAP */
#define VALUE_MAX 1e30 /* as field_tokens._VALUE_MAX */
#define TWO_53 9007199254740992.0

enum { K_CATEGORICAL = 0, K_TEXT = 1, K_NUMERIC = 2, K_BUCKET = 3, K_SET = 4 };

/* -- MurmurHash3_x86_32 ------------------------------------------------------------------ */

static inline uint32_t rotl32(uint32_t x, int r) { return (x << r) | (x >> (32 - r)); }

static uint32_t murmur3_32(const unsigned char *data, Py_ssize_t len, uint32_t seed) {
    const uint32_t c1 = 0xcc9e2d51u, c2 = 0x1b873593u;
    uint32_t h = seed, k;
    Py_ssize_t blocks = len / 4, i;
    for (i = 0; i < blocks; i++) {
        const unsigned char *b = data + 4 * i; /* little-endian reads on any machine */
        k = (uint32_t)b[0] | (uint32_t)b[1] << 8 | (uint32_t)b[2] << 16 | (uint32_t)b[3] << 24;
        k *= c1;
        k = rotl32(k, 15);
        k *= c2;
        h ^= k;
        h = rotl32(h, 13);
        h = h * 5 + 0xe6546b64u;
    }
    const unsigned char *tail = data + 4 * blocks;
    k = 0;
    switch (len & 3) {
    case 3:
        k ^= (uint32_t)tail[2] << 16;
        /* fall through */
    case 2:
        k ^= (uint32_t)tail[1] << 8;
        /* fall through */
    case 1:
        k ^= tail[0];
        k *= c1;
        k = rotl32(k, 15);
        k *= c2;
        h ^= k;
    }
    h ^= (uint32_t)len;
    h ^= h >> 16;
    h *= 0x85ebca6bu;
    h ^= h >> 13;
    h *= 0xc2b2ae35u;
    h ^= h >> 16;
    return h;
}

/* -- growable buffers --------------------------------------------------------------------- */

typedef struct {
    char *p;
    Py_ssize_t len, cap;
} Buf;

static int grow(void **p, Py_ssize_t *cap, Py_ssize_t need, size_t item) {
    if (need <= *cap) return OK;
    Py_ssize_t cap2 = *cap ? *cap : 64;
    while (cap2 < need) cap2 *= 2;
    void *q = PyMem_Realloc(*p, (size_t)cap2 * item);
    if (q == NULL) {
        PyErr_NoMemory();
        return FAILED;
    }
    *p = q;
    *cap = cap2;
    return OK;
}

static inline int buf_add(Buf *b, const void *src, Py_ssize_t n) {
    if (b->len + n > b->cap && grow((void **)&b->p, &b->cap, b->len + n, 1)) return FAILED;
    memcpy(b->p + b->len, src, (size_t)n);
    b->len += n;
    return OK;
}

static inline int buf_byte(Buf *b, char c) { return buf_add(b, &c, 1); }

/* -- UTF-8 ---------------------------------------------------------------------------------- */

/* Append one code point; FALLBACK for a lone surrogate, which Python's encode refuses. */
static inline int utf8_char(Buf *b, Py_UCS4 c) {
    char s[4];
    Py_ssize_t n;
    if (c < 0x80) {
        s[0] = (char)c;
        n = 1;
    } else if (c < 0x800) {
        s[0] = (char)(0xC0 | (c >> 6));
        s[1] = (char)(0x80 | (c & 0x3F));
        n = 2;
    } else if (c < 0x10000) {
        if (c >= 0xD800 && c <= 0xDFFF) return FALLBACK;
        s[0] = (char)(0xE0 | (c >> 12));
        s[1] = (char)(0x80 | ((c >> 6) & 0x3F));
        s[2] = (char)(0x80 | (c & 0x3F));
        n = 3;
    } else {
        s[0] = (char)(0xF0 | (c >> 18));
        s[1] = (char)(0x80 | ((c >> 12) & 0x3F));
        s[2] = (char)(0x80 | ((c >> 6) & 0x3F));
        s[3] = (char)(0x80 | (c & 0x3F));
        n = 4;
    }
    return buf_add(b, s, n);
}

/* Append a str's UTF-8 bytes. */
static int utf8_str(Buf *b, PyObject *s) {
    if (PyUnicode_IS_ASCII(s)) return buf_add(b, PyUnicode_DATA(s), PyUnicode_GET_LENGTH(s));
    int kind = PyUnicode_KIND(s);
    const void *data = PyUnicode_DATA(s);
    Py_ssize_t n = PyUnicode_GET_LENGTH(s), i;
    for (i = 0; i < n; i++) {
        int r = utf8_char(b, PyUnicode_READ(kind, data, i));
        if (r) return r;
    }
    return OK;
}

/* str(value) of an exact int, as Python prints it. */
static int int_text(Buf *b, PyObject *value) {
    int overflow = 0;
    long long v = PyLong_AsLongLongAndOverflow(value, &overflow);
    if (overflow == 0) {
        if (v == -1 && PyErr_Occurred()) return FAILED;
        char s[32];
        int n = snprintf(s, sizeof s, "%lld", v);
        return buf_add(b, s, n);
    }
    PyObject *text = PyObject_Str(value);
    if (text == NULL) return FAILED;
    int r = utf8_str(b, text);
    Py_DECREF(text);
    return r;
}

/* -- the plan ------------------------------------------------------------------------------- */

typedef struct {
    PyObject *name;      /* str */
    int kind, cross;     /* cross: 0 not crossed, 1 by its tokens, 2 by its raw number */
    int slot;            /* index among crossed fields, or -1 */
    Buf prefix;          /* "name=" (categorical, set), "name:" (text); "name" (numeric) */
    Buf char_prefix;     /* "name#" (text) */
    Buf name_utf8;       /* "name" */
    int ngrams, char_k, log1p, has_clip;
    double clip_lo, clip_hi;
    double *edges;
    Py_ssize_t n_edges;
    int64_t code;        /* numeric: the code of the token "name" */
    int64_t *bucket;     /* bucket: the code of "name@i", i = 0..n_edges */
} Field;

typedef struct {
    Py_ssize_t off, len; /* into the arena */
} Part;

typedef struct {
    Py_ssize_t first, count; /* into parts; count -1 means the field was absent */
} Slot;

typedef struct {
    int64_t index;
    Py_ssize_t pos;
    double value;
} Entry;

typedef struct {
    PyObject_HEAD
    Field *fields;
    Py_ssize_t n_fields;
    PyObject *declared; /* frozenset of declared names */
    int (*crosses)[3];
    int *cross_len;
    Py_ssize_t n_crosses, n_slots;
    int strict, signed_;
    Py_ssize_t max_tokens, short_chars;
    uint32_t seed;
    int64_t mask, bias;
    /* per-event scratch, reset at each event */
    Buf tok, arena, words;
    int64_t *codes;
    double *values;
    Py_ssize_t n, cap;
    Part *parts;
    Py_ssize_t n_parts, parts_cap;
    Slot *slots;
    Py_ssize_t *cpos; /* byte offset of each char of the text's words, in words */
    Py_ssize_t cpos_cap;
    Py_ssize_t *wfirst; /* per word: index of its first char in cpos */
    Py_ssize_t wcap;
    Entry *entries;
    Py_ssize_t ecap;
} Plan;

static inline int64_t code_of(const Plan *p, const char *bytes, Py_ssize_t len) {
    int32_t h = (int32_t)murmur3_32((const unsigned char *)bytes, len, p->seed);
    int64_t index = (h < 0 ? -(int64_t)h : (int64_t)h) & p->mask;
    return (h < 0 && p->signed_) ? ~index : index;
}

static inline int push(Plan *p, int64_t code, double value) {
    if (p->n >= p->cap) {
        Py_ssize_t cap = p->cap;
        if (grow((void **)&p->codes, &cap, p->n + 1, sizeof(int64_t))) return FAILED;
        cap = p->cap;
        if (grow((void **)&p->values, &cap, p->n + 1, sizeof(double))) return FAILED;
        p->cap = cap;
    }
    p->codes[p->n] = code;
    p->values[p->n] = value;
    p->n++;
    return p->n > p->max_tokens ? FALLBACK : OK; /* Python refuses the event */
}

/* Hash the token in p->tok and push it with value 1. */
static inline int push_tok(Plan *p) { return push(p, code_of(p, p->tok.p, p->tok.len), 1.0); }

static inline int tok_begin(Plan *p, const Buf *prefix) {
    p->tok.len = 0;
    return buf_add(&p->tok, prefix->p, prefix->len);
}

/* Remember the token now in p->tok as a cross part of the current slot. */
static int keep_part(Plan *p, const char *bytes, Py_ssize_t len) {
    if (grow((void **)&p->parts, &p->parts_cap, p->n_parts + 1, sizeof(Part))) return FAILED;
    Part *part = &p->parts[p->n_parts++];
    part->off = p->arena.len;
    part->len = len;
    return buf_add(&p->arena, bytes, len);
}

/* -- values ----------------------------------------------------------------------------- */

/* field_tokens.FieldTokens.number: the value as a finite float after log1p, then clip. */
static int number(const Field *f, PyObject *value, double *out) {
    double x;
    if (PyFloat_CheckExact(value)) {
        x = PyFloat_AS_DOUBLE(value);
    } else if (PyLong_CheckExact(value)) {
        x = PyLong_AsDouble(value);
        if (x == -1.0 && PyErr_Occurred()) {
            PyErr_Clear();
            return FALLBACK; /* too large for a float: Python names it */
        }
    } else {
        return FALLBACK;
    }
    if (!isfinite(x)) return FALLBACK;
    if (f != NULL && f->log1p) {
        if (x < 0) return FALLBACK;
        x = log1p(x);
    }
    if (f != NULL && f->has_clip) {
        if (f->clip_lo > x) x = f->clip_lo; /* max(x, lo): x unless lo is larger */
        if (f->clip_hi < x) x = f->clip_hi; /* min(x, hi): x unless hi is smaller */
    }
    *out = x;
    return OK;
}

/* The categorical text of a value, appended to p->tok: FALLBACK for what Python refuses. */
static int categorical_text(Plan *p, PyObject *value) {
    if (PyUnicode_CheckExact(value)) {
        if (PyUnicode_GET_LENGTH(value) > p->short_chars) return FALLBACK;
        return utf8_str(&p->tok, value);
    }
    if (PyBool_Check(value)) {
        return value == Py_True ? buf_add(&p->tok, "true", 4) : buf_add(&p->tok, "false", 5);
    }
    if (PyLong_CheckExact(value)) return int_text(&p->tok, value);
    if (PyFloat_CheckExact(value)) {
        double x = PyFloat_AS_DOUBLE(value);
        if (isfinite(x) && floor(x) == x && fabs(x) < TWO_53) {
            char s[32];
            int n = snprintf(s, sizeof s, "%lld", (long long)x);
            return buf_add(&p->tok, s, n);
        }
    }
    return FALLBACK;
}

/* features._number_text: a crossed plain numeric's raw value. */
static int number_text(Plan *p, PyObject *value) {
    if (PyFloat_CheckExact(value)) {
        double x = PyFloat_AS_DOUBLE(value);
        if (floor(x) == x && fabs(x) < TWO_53) {
            char s[32];
            int n = snprintf(s, sizeof s, "%lld", (long long)x);
            return buf_add(&p->tok, s, n);
        }
        PyObject *text = PyObject_Repr(value);
        if (text == NULL) return FAILED;
        int r = utf8_str(&p->tok, text);
        Py_DECREF(text);
        return r;
    }
    return int_text(&p->tok, value); /* number() accepted it: an exact int */
}

/* -- kinds ---------------------------------------------------------------------------------- */

static int emit_categorical(Plan *p, const Buf *prefix, PyObject *value, int keep) {
    int r = tok_begin(p, prefix);
    if (r || (r = categorical_text(p, value))) return r;
    if (keep && (r = keep_part(p, p->tok.p, p->tok.len))) return r;
    return push_tok(p);
}

typedef struct {
    const char *p;
    Py_ssize_t len;
} Member;

/* By UTF-8 bytes, which orders strings as Python does (by code point). */
static int compare_members(const void *a, const void *b) {
    const Member *x = a, *y = b;
    Py_ssize_t n = x->len < y->len ? x->len : y->len;
    int c = memcmp(x->p, y->p, (size_t)n);
    if (c) return c;
    return (x->len > y->len) - (x->len < y->len);
}

/* One token per distinct member, in sorted order (field_tokens.emit_set). */
static int emit_set(Plan *p, const Buf *prefix, PyObject *value, int keep) {
    if (!PyList_CheckExact(value) && !PyTuple_CheckExact(value)) return FALLBACK;
    Py_ssize_t n = PySequence_Fast_GET_SIZE(value), i, cap = 0;
    PyObject **items = PySequence_Fast_ITEMS(value);
    Buf *words = &p->words;
    Member *members = NULL;
    int r = OK;
    if (n == 0) return OK;
    if (grow((void **)&members, &cap, n + 1, sizeof(Member))) return FAILED;
    words->len = 0;
    for (i = 0; i < n && r == OK; i++) {
        PyObject *m = items[i];
        if (!PyUnicode_CheckExact(m) || PyUnicode_GET_LENGTH(m) > p->short_chars) r = FALLBACK;
        else {
            members[i].len = words->len; /* the start, until the buffer stops moving */
            r = utf8_str(words, m);
        }
    }
    if (r == OK) {
        for (i = 0; i < n; i++) {
            Py_ssize_t start = members[i].len;
            Py_ssize_t end = i + 1 < n ? members[i + 1].len : words->len;
            members[i].p = words->p + start;
            members[i].len = end - start;
        }
        if (n > 1) qsort(members, (size_t)n, sizeof(Member), compare_members);
    }
    for (i = 0; i < n && r == OK; i++) {
        if (i && compare_members(&members[i - 1], &members[i]) == 0) continue;
        if ((r = tok_begin(p, prefix))) break;
        if ((r = buf_add(&p->tok, members[i].p, members[i].len))) break;
        if (keep && (r = keep_part(p, p->tok.p, p->tok.len))) break;
        r = push_tok(p);
    }
    PyMem_Free(members);
    return r;
}

static inline int is_word(Py_UCS4 c) {
    if (c < 128) {
        return (c >= 'a' && c <= 'z') || (c >= 'A' && c <= 'Z') || (c >= '0' && c <= '9') ||
               c == '_';
    }
    return Py_UNICODE_ISALNUM(c); /* re's \w for str patterns: alphanumeric or '_' */
}

/* The words of a text: lower-cased \w+ runs, as UTF-8 in p->words, chars indexed by cpos. */
static int split_words(Plan *p, PyObject *value, Py_ssize_t *n_words) {
    PyObject *low = NULL;
    int ascii = PyUnicode_IS_ASCII(value);
    if (!ascii && (low = PyObject_CallMethod(value, "lower", NULL)) == NULL) return FAILED;
    PyObject *src = ascii ? value : low;
    int kind = PyUnicode_KIND(src);
    const void *data = PyUnicode_DATA(src);
    Py_ssize_t len = PyUnicode_GET_LENGTH(src), i, nw = 0, nc = 0;
    int in_word = 0, rc = OK;
    p->words.len = 0;
    for (i = 0; i < len; i++) {
        Py_UCS4 c = PyUnicode_READ(kind, data, i);
        if (ascii && c >= 'A' && c <= 'Z') c += 'a' - 'A';
        if (!is_word(c)) {
            in_word = 0;
            continue;
        }
        if (!in_word) {
            if (grow((void **)&p->wfirst, &p->wcap, nw + 2, sizeof(Py_ssize_t))) goto fail;
            p->wfirst[nw++] = nc;
            in_word = 1;
        }
        if (grow((void **)&p->cpos, &p->cpos_cap, nc + 2, sizeof(Py_ssize_t))) goto fail;
        p->cpos[nc++] = p->words.len;
        if ((rc = utf8_char(&p->words, c))) goto done; /* word chars are never surrogates */
    }
    if (grow((void **)&p->wfirst, &p->wcap, nw + 1, sizeof(Py_ssize_t))) goto fail;
    if (grow((void **)&p->cpos, &p->cpos_cap, nc + 1, sizeof(Py_ssize_t))) goto fail;
    p->wfirst[nw] = nc;
    p->cpos[nc] = p->words.len;
    *n_words = nw;
done:
    Py_XDECREF(low);
    return rc;
fail:
    Py_XDECREF(low);
    return FAILED;
}

/* Bytes of word w in p->words. */
#define WORD_OFF(p, w) ((p)->cpos[(p)->wfirst[w]])
#define WORD_END(p, w) ((p)->cpos[(p)->wfirst[(w) + 1]])

static int emit_text(Plan *p, const Field *f, PyObject *value) {
    if (!PyUnicode_CheckExact(value) || PyUnicode_GET_LENGTH(value) > p->short_chars) {
        return FALLBACK;
    }
    Py_ssize_t nw, w, g, n, i;
    int r = split_words(p, value, &nw);
    if (r) return r;
    const char *bytes = p->words.p;
    for (n = 1; n <= f->ngrams; n++) { /* words, then word pairs, ... as field_tokens */
        for (w = 0; w + n <= nw; w++) {
            if ((r = tok_begin(p, &f->prefix))) return r;
            for (g = w; g < w + n; g++) {
                if (g > w && (r = buf_byte(&p->tok, ' '))) return r;
                if ((r = buf_add(&p->tok, bytes + WORD_OFF(p, g), WORD_END(p, g) - WORD_OFF(p, g))))
                    return r;
            }
            if ((r = push_tok(p))) return r;
        }
    }
    int k = f->char_k;
    if (!k) return OK;
    for (w = 0; w < nw; w++) {
        Py_ssize_t first = p->wfirst[w], chars = p->wfirst[w + 1] - first;
        Py_ssize_t padded = chars + 2; /* "<" word ">" */
        if (padded < k) {
            if ((r = tok_begin(p, &f->char_prefix)) || (r = buf_byte(&p->tok, '<'))) return r;
            if ((r = buf_add(&p->tok, bytes + WORD_OFF(p, w), WORD_END(p, w) - WORD_OFF(p, w))))
                return r;
            if ((r = buf_byte(&p->tok, '>')) || (r = push_tok(p))) return r;
            continue;
        }
        for (i = 0; i + k <= padded; i++) { /* chars i .. i+k-1 of the padded word */
            if ((r = tok_begin(p, &f->char_prefix))) return r;
            Py_ssize_t lo = i, hi = i + k; /* padded positions; 0 is '<', padded-1 is '>' */
            if (lo == 0 && (r = buf_byte(&p->tok, '<'))) return r;
            Py_ssize_t a = lo == 0 ? 0 : lo - 1, b = hi == padded ? chars : hi - 1;
            if (b > a) {
                Py_ssize_t from = p->cpos[first + a], to = p->cpos[first + b];
                if ((r = buf_add(&p->tok, bytes + from, to - from))) return r;
            }
            if (hi == padded && (r = buf_byte(&p->tok, '>'))) return r;
            if ((r = push_tok(p))) return r;
        }
    }
    return OK;
}

/* -- one event ------------------------------------------------------------------------------ */

static int emit_declared(Plan *p, Field *f, PyObject *value) {
    int keep = f->cross == 1, r;
    double x;
    if (f->slot >= 0) {
        p->slots[f->slot].first = p->n_parts;
        p->slots[f->slot].count = 0;
    }
    switch (f->kind) {
    case K_CATEGORICAL:
        r = emit_categorical(p, &f->prefix, value, keep);
        break;
    case K_SET:
        r = emit_set(p, &f->prefix, value, keep);
        break;
    case K_TEXT:
        r = emit_text(p, f, value);
        break;
    case K_NUMERIC:
        if ((r = number(f, value, &x))) return r;
        if (fabs(x) > VALUE_MAX) return FALLBACK;
        r = push(p, f->code, x);
        if (r == OK && f->cross == 2) { /* crossed by "name=<raw number>" */
            p->tok.len = 0;
            if ((r = buf_add(&p->tok, f->name_utf8.p, f->name_utf8.len)) ||
                (r = buf_byte(&p->tok, '=')) || (r = number_text(p, value)))
                return r;
            r = keep_part(p, p->tok.p, p->tok.len);
        }
        break;
    default: { /* K_BUCKET */
        if ((r = number(f, value, &x))) return r;
        Py_ssize_t lo = 0, hi = f->n_edges; /* bisect_right: edges <= x */
        while (lo < hi) {
            Py_ssize_t mid = (lo + hi) / 2;
            if (x < f->edges[mid]) hi = mid;
            else lo = mid + 1;
        }
        r = push(p, f->bucket[lo], 1.0);
        if (r == OK && keep) {
            char s[32];
            int n = snprintf(s, sizeof s, "@%zd", lo);
            p->tok.len = 0;
            if ((r = buf_add(&p->tok, f->name_utf8.p, f->name_utf8.len)) ||
                (r = buf_add(&p->tok, s, n)))
                return r;
            r = keep_part(p, p->tok.p, p->tok.len);
        }
    }
    }
    if (r == OK && f->slot >= 0) p->slots[f->slot].count = p->n_parts - p->slots[f->slot].first;
    return r;
}

/* One undeclared field with its inferred kind, its name's UTF-8 in prefix. */
static int emit_inferred(Plan *p, Buf *prefix, PyObject *value) {
    int r;
    if (PyUnicode_CheckExact(value) || PyBool_Check(value)) {
        if ((r = buf_byte(prefix, '='))) return r;
        return emit_categorical(p, prefix, value, 0);
    }
    if (PyLong_CheckExact(value) || PyFloat_CheckExact(value)) {
        double x;
        if ((r = number(NULL, value, &x))) return r;
        if (fabs(x) > VALUE_MAX) return FALLBACK;
        return push(p, code_of(p, prefix->p, prefix->len), x);
    }
    if (PyList_CheckExact(value) || PyTuple_CheckExact(value)) {
        if ((r = buf_byte(prefix, '='))) return r;
        return emit_set(p, prefix, value, 0);
    }
    return FALLBACK; /* an object, or a type JSON does not make: Python names it */
}

/* Fields the spec does not declare, by name, with inferred kinds (features._undeclared). */
static int emit_undeclared(Plan *p, PyObject *fields) {
    PyObject *names = PyList_New(0), *key, *value;
    Py_ssize_t pos = 0, i;
    Buf prefix = {NULL, 0, 0};
    int r = OK;
    if (names == NULL) return FAILED;
    while (r == OK && PyDict_Next(fields, &pos, &key, &value)) {
        if (!PyUnicode_CheckExact(key)) r = FALLBACK;
        else {
            int known = PySet_Contains(p->declared, key);
            if (known < 0 || (!known && PyList_Append(names, key))) r = FAILED;
        }
    }
    if (r == OK && p->strict) r = FALLBACK; /* Python names the unknown field */
    if (r == OK && PyList_Sort(names)) r = FAILED;
    for (i = 0; r == OK && i < PyList_GET_SIZE(names); i++) {
        key = PyList_GET_ITEM(names, i);
        value = PyDict_GetItemWithError(fields, key);
        if (value == NULL) r = PyErr_Occurred() ? FAILED : FALLBACK;
        else if (value == Py_None) continue;
        else if (PyUnicode_GET_LENGTH(key) > p->short_chars) r = FALLBACK;
        else {
            prefix.len = 0;
            if ((r = utf8_str(&prefix, key)) == OK) r = emit_inferred(p, &prefix, value);
        }
    }
    PyMem_Free(prefix.p);
    Py_DECREF(names);
    return r;
}

static int emit_crosses(Plan *p) {
    Py_ssize_t c;
    int r;
    for (c = 0; c < p->n_crosses; c++) {
        int len = p->cross_len[c], j;
        Slot *s[3];
        for (j = 0; j < len; j++) {
            s[j] = &p->slots[p->crosses[c][j]];
            if (s[j]->count <= 0) break; /* absent, or an empty set: no cross */
        }
        if (j < len) continue;
        Py_ssize_t at[3] = {0, 0, 0}, made;
        for (made = 0; made < CROSS_CAP; made++) { /* itertools.product order */
            p->tok.len = 0;
            for (j = 0; j < len; j++) {
                Part *part = &p->parts[s[j]->first + at[j]];
                if (j && (r = buf_byte(&p->tok, '&'))) return r;
                if ((r = buf_add(&p->tok, p->arena.p + part->off, part->len))) return r;
            }
            if ((r = push_tok(p))) return r;
            for (j = len - 1; j >= 0; j--) {
                if (++at[j] < s[j]->count) break;
                at[j] = 0;
            }
            if (j < 0) break;
        }
    }
    return OK;
}

/* Tokens of one event into p->codes / p->values (features.Featurizer._collect + codes). */
static int collect(Plan *p, PyObject *fields) {
    if (!PyDict_CheckExact(fields)) return FALLBACK;
    Py_ssize_t i, seen = 0;
    int r;
    p->n = 0;
    p->n_parts = 0;
    p->arena.len = 0;
    for (i = 0; i < p->n_slots; i++) p->slots[i].count = -1;
    if ((r = push(p, p->bias, 1.0))) return r;
    for (i = 0; i < p->n_fields; i++) {
        Field *f = &p->fields[i];
        PyObject *value = PyDict_GetItemWithError(fields, f->name);
        if (value == NULL) {
            if (PyErr_Occurred()) return FAILED;
            continue;
        }
        seen++;
        if (value == Py_None) continue;
        if ((r = emit_declared(p, f, value))) return r;
    }
    if (seen < PyDict_GET_SIZE(fields) && (r = emit_undeclared(p, fields))) return r;
    if (p->n_crosses && (r = emit_crosses(p))) return r;
    return OK;
}

/* -- rows ----------------------------------------------------------------------------------- */

static int compare_entries(const void *a, const void *b) {
    const Entry *x = a, *y = b;
    if (x->index != y->index) return x->index < y->index ? -1 : 1;
    return (x->pos > y->pos) - (x->pos < y->pos);
}

/* Sum repeats in input order, drop zeros, sort by index (hashing.to_csr / to_row), append. */
static int finish_row(Plan *p, Buf *indices, Buf *values, Py_ssize_t *nnz) {
    Py_ssize_t n = p->n, i, j;
    if (grow((void **)&p->entries, &p->ecap, n, sizeof(Entry))) return FAILED;
    Entry *e = p->entries;
    for (i = 0; i < n; i++) {
        int64_t code = p->codes[i];
        e[i].index = code < 0 ? ~code : code;
        e[i].value = code < 0 ? -p->values[i] : p->values[i];
        e[i].pos = i;
    }
    if (n > 48) {
        qsort(e, (size_t)n, sizeof(Entry), compare_entries);
    } else {
        for (i = 1; i < n; i++) { /* insertion sort: stable, keeps input order of repeats */
            Entry t = e[i];
            for (j = i; j > 0 && e[j - 1].index > t.index; j--) e[j] = e[j - 1];
            e[j] = t;
        }
    }
    Py_ssize_t kept = 0;
    for (i = 0; i < n; i = j) {
        double sum = 0.0;
        for (j = i; j < n && e[j].index == e[i].index; j++) sum += e[j].value;
        float f = (float)sum;
        if (f == 0.0f) continue;
        if (buf_add(indices, &e[i].index, sizeof(int64_t)) || buf_add(values, &f, sizeof f))
            return FAILED;
        kept++;
    }
    *nnz = kept;
    return OK;
}

static PyObject *bytes_of(Buf *b) { return PyByteArray_FromStringAndSize(b->p, b->len); }

/* Plan.row(fields) -> (indices bytes, values bytes), or None when Python must do it. */
static PyObject *Plan_row(Plan *p, PyObject *fields) {
    int r = collect(p, fields);
    if (r == FAILED) return NULL;
    if (r == FALLBACK) Py_RETURN_NONE;
    Buf indices = {NULL, 0, 0}, values = {NULL, 0, 0};
    Py_ssize_t nnz;
    PyObject *out = NULL;
    if (finish_row(p, &indices, &values, &nnz) == OK) {
        PyObject *a = bytes_of(&indices), *b = bytes_of(&values);
        if (a && b) out = PyTuple_Pack(2, a, b);
        Py_XDECREF(a);
        Py_XDECREF(b);
    }
    PyMem_Free(indices.p);
    PyMem_Free(values.p);
    return out;
}

/* Plan.batch(events, fallback) -> (indptr, indices, values) as bytes. ``fallback(i)`` returns
 * the (codes, values) lists of event i from the Python path, or raises its InvalidEvent. */
static PyObject *Plan_batch(Plan *p, PyObject *args) {
    PyObject *events, *fallback, *seq, *out = NULL;
    if (!PyArg_ParseTuple(args, "OO:batch", &events, &fallback)) return NULL;
    if ((seq = PySequence_Fast(events, "events must be a sequence")) == NULL) return NULL;
    Py_ssize_t n = PySequence_Fast_GET_SIZE(seq), i, nnz, total = 0;
    Buf indptr = {NULL, 0, 0}, indices = {NULL, 0, 0}, values = {NULL, 0, 0};
    int64_t zero = 0;
    if (buf_add(&indptr, &zero, sizeof zero)) goto done;
    for (i = 0; i < n; i++) {
        int r = collect(p, PySequence_Fast_GET_ITEM(seq, i));
        if (r == FAILED) goto done;
        if (r == FALLBACK) { /* the Python path makes this event's codes, or its error */
            PyObject *got = PyObject_CallFunction(fallback, "n", i), *codes, *vals;
            if (got == NULL) goto done;
            if (!PyArg_ParseTuple(got, "OO", &codes, &vals) || !PyList_Check(codes) ||
                !PyList_Check(vals) || PyList_GET_SIZE(codes) != PyList_GET_SIZE(vals)) {
                Py_DECREF(got);
                if (!PyErr_Occurred()) PyErr_SetString(PyExc_TypeError, "bad fallback result");
                goto done;
            }
            p->n = 0;
            Py_ssize_t k, m = PyList_GET_SIZE(codes);
            for (k = 0; k < m; k++) {
                long long c = PyLong_AsLongLong(PyList_GET_ITEM(codes, k));
                double v = PyFloat_AsDouble(PyList_GET_ITEM(vals, k));
                if (PyErr_Occurred() || push(p, c, v) == FAILED) {
                    Py_DECREF(got);
                    goto done;
                }
            }
            Py_DECREF(got);
        }
        if (finish_row(p, &indices, &values, &nnz)) goto done;
        total += nnz;
        int64_t end = total;
        if (buf_add(&indptr, &end, sizeof end)) goto done;
    }
    PyObject *a = bytes_of(&indptr), *b = bytes_of(&indices), *c = bytes_of(&values);
    if (a && b && c) out = PyTuple_Pack(3, a, b, c);
    Py_XDECREF(a);
    Py_XDECREF(b);
    Py_XDECREF(c);
done:
    PyMem_Free(indptr.p);
    PyMem_Free(indices.p);
    PyMem_Free(values.p);
    Py_DECREF(seq);
    return out;
}

/* -- construction ----------------------------------------------------------------------------- */

static int set_buf(Buf *b, PyObject *name, const char *suffix) {
    b->len = 0;
    int r = utf8_str(b, name);
    if (r == FALLBACK) PyErr_SetString(PyExc_ValueError, "field name is not valid Unicode");
    if (r) return FAILED;
    return buf_add(b, suffix, (Py_ssize_t)strlen(suffix));
}

static void Plan_dealloc(Plan *p) {
    Py_ssize_t i;
    for (i = 0; i < p->n_fields; i++) {
        Field *f = &p->fields[i];
        Py_XDECREF(f->name);
        PyMem_Free(f->prefix.p);
        PyMem_Free(f->char_prefix.p);
        PyMem_Free(f->name_utf8.p);
        PyMem_Free(f->edges);
        PyMem_Free(f->bucket);
    }
    PyMem_Free(p->fields);
    Py_XDECREF(p->declared);
    PyMem_Free(p->crosses);
    PyMem_Free(p->cross_len);
    PyMem_Free(p->tok.p);
    PyMem_Free(p->arena.p);
    PyMem_Free(p->words.p);
    PyMem_Free(p->codes);
    PyMem_Free(p->values);
    PyMem_Free(p->parts);
    PyMem_Free(p->slots);
    PyMem_Free(p->cpos);
    PyMem_Free(p->wfirst);
    PyMem_Free(p->entries);
    Py_TYPE(p)->tp_free((PyObject *)p);
}

/* Plan(fields, crosses, strict, max_tokens, short_chars, seed, bits, signed)
 * fields: [(name, kind, cross, ngrams, char_k, log1p, clip or None, edges or None)], with
 * kind 0 categorical, 1 text, 2 numeric, 3 bucketed numeric, 4 set; crosses: [(i, j[, k])]
 * as indices into fields. thresher.features makes these from a FeatureSpec. */
static int Plan_init(Plan *p, PyObject *args, PyObject *kwds) {
    PyObject *fields, *crosses;
    int strict, signed_, bits;
    Py_ssize_t max_tokens, short_chars;
    unsigned long seed;
    if (!PyArg_ParseTuple(args, "O!O!pnnkip:Plan", &PyList_Type, &fields, &PyList_Type, &crosses,
                          &strict, &max_tokens, &short_chars, &seed, &bits, &signed_))
        return -1;
    if (p->fields != NULL) {
        PyErr_SetString(PyExc_RuntimeError, "a Plan is initialised once");
        return -1;
    }
    if (bits < 1 || bits > 30 || seed > 0xFFFFFFFFul) {
        PyErr_SetString(PyExc_ValueError, "bits must be 1..30 and seed 0..2**32-1");
        return -1;
    }
    p->strict = strict;
    p->signed_ = signed_;
    p->max_tokens = max_tokens;
    p->short_chars = short_chars;
    p->seed = (uint32_t)seed;
    p->mask = ((int64_t)1 << bits) - 1;
    p->bias = code_of(p, "^bias", 5);
    Py_ssize_t n = PyList_GET_SIZE(fields), i, j;
    p->fields = PyMem_Calloc((size_t)(n ? n : 1), sizeof(Field));
    p->slots = PyMem_Calloc((size_t)(n ? n : 1), sizeof(Slot));
    if ((p->declared = PySet_New(NULL)) == NULL) return -1;
    if (p->fields == NULL || p->slots == NULL) {
        PyErr_NoMemory();
        return -1;
    }
    for (i = 0; i < n; i++) {
        Field *f = &p->fields[i];
        PyObject *clip, *edges;
        p->n_fields = i + 1;
        if (!PyArg_ParseTuple(PyList_GET_ITEM(fields, i), "UiiiipOO", &f->name, &f->kind,
                              &f->cross, &f->ngrams, &f->char_k, &f->log1p, &clip, &edges))
            return -1;
        Py_INCREF(f->name);
        if (PySet_Add(p->declared, f->name)) return -1;
        f->slot = f->cross ? (int)p->n_slots++ : -1;
        if (set_buf(&f->name_utf8, f->name, "")) return -1;
        const char *sep = f->kind == K_TEXT ? ":" : f->kind == K_NUMERIC ? "" : "=";
        if (set_buf(&f->prefix, f->name, sep) || set_buf(&f->char_prefix, f->name, "#")) return -1;
        f->code = code_of(p, f->name_utf8.p, f->name_utf8.len);
        if (clip != Py_None) {
            if (!PyArg_ParseTuple(clip, "dd", &f->clip_lo, &f->clip_hi)) return -1;
            f->has_clip = 1;
        }
        if (edges != Py_None) {
            PyObject *fast = PySequence_Fast(edges, "edges must be a sequence");
            if (fast == NULL) return -1;
            f->n_edges = PySequence_Fast_GET_SIZE(fast);
            f->edges = PyMem_Calloc((size_t)f->n_edges + 1, sizeof(double));
            f->bucket = PyMem_Calloc((size_t)f->n_edges + 1, sizeof(int64_t));
            if (f->edges == NULL || f->bucket == NULL) {
                Py_DECREF(fast);
                PyErr_NoMemory();
                return -1;
            }
            for (j = 0; j < f->n_edges; j++) f->edges[j] = PyFloat_AsDouble(PySequence_Fast_GET_ITEM(fast, j));
            Py_DECREF(fast);
            if (PyErr_Occurred()) return -1;
            for (j = 0; j <= f->n_edges; j++) {
                char s[32];
                int len = snprintf(s, sizeof s, "@%zd", j);
                p->tok.len = 0;
                if (buf_add(&p->tok, f->name_utf8.p, f->name_utf8.len) || buf_add(&p->tok, s, len))
                    return -1;
                f->bucket[j] = code_of(p, p->tok.p, p->tok.len);
            }
        }
    }
    Py_ssize_t nc = PyList_GET_SIZE(crosses);
    p->crosses = PyMem_Calloc((size_t)(nc ? nc : 1), sizeof(int[3]));
    p->cross_len = PyMem_Calloc((size_t)(nc ? nc : 1), sizeof(int));
    if (p->crosses == NULL || p->cross_len == NULL) {
        PyErr_NoMemory();
        return -1;
    }
    for (i = 0; i < nc; i++) {
        PyObject *cross = PyList_GET_ITEM(crosses, i);
        if (!PyTuple_Check(cross) || PyTuple_GET_SIZE(cross) < 2 || PyTuple_GET_SIZE(cross) > 3) {
            PyErr_SetString(PyExc_ValueError, "a cross is a tuple of 2 or 3 field indices");
            return -1;
        }
        p->cross_len[i] = (int)PyTuple_GET_SIZE(cross);
        for (j = 0; j < p->cross_len[i]; j++) {
            Py_ssize_t k = PyLong_AsSsize_t(PyTuple_GET_ITEM(cross, j));
            if (k < 0 || k >= n || p->fields[k].slot < 0) {
                if (!PyErr_Occurred())
                    PyErr_SetString(PyExc_ValueError, "a cross names a field not marked crossed");
                return -1;
            }
            p->crosses[i][j] = p->fields[k].slot;
        }
        p->n_crosses = i + 1;
    }
    return 0;
}

static PyMethodDef Plan_methods[] = {
    {"row", (PyCFunction)Plan_row, METH_O,
     "row(fields) -> (indices, values) bytes of one event, or None for the Python path"},
    {"batch", (PyCFunction)Plan_batch, METH_VARARGS,
     "batch(events, fallback) -> (indptr, indices, values) bytes of a CSR batch"},
    {NULL, NULL, 0, NULL},
};

static PyTypeObject PlanType = {
    PyVarObject_HEAD_INIT(NULL, 0).tp_name = "thresher._featurize.Plan",
    .tp_basicsize = sizeof(Plan),
    .tp_flags = Py_TPFLAGS_DEFAULT,
    .tp_doc = "A feature spec compiled for fast featurizing (see thresher.features).",
    .tp_new = PyType_GenericNew,
    .tp_init = (initproc)Plan_init,
    .tp_dealloc = (destructor)Plan_dealloc,
    .tp_methods = Plan_methods,
};

static PyObject *hash32(PyObject *self, PyObject *args) {
    Py_buffer data;
    unsigned long seed = 0;
    if (!PyArg_ParseTuple(args, "y*|k:murmur3_32", &data, &seed)) return NULL;
    uint32_t h = murmur3_32(data.buf, data.len, (uint32_t)seed);
    PyBuffer_Release(&data);
    return PyLong_FromUnsignedLong(h);
}

static PyMethodDef module_methods[] = {
    {"murmur3_32", hash32, METH_VARARGS,
     "murmur3_32(data, seed=0) -> unsigned MurmurHash3_x86_32 of bytes"},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef module = {
    PyModuleDef_HEAD_INIT, "thresher._featurize",
    "The compiled fast path of thresher.features (see the comment at the top of the source).",
    -1, module_methods,
};

PyMODINIT_FUNC PyInit__featurize(void) {
    if (PyType_Ready(&PlanType) < 0) return NULL;
    PyObject *m = PyModule_Create(&module);
    if (m == NULL) return NULL;
    Py_INCREF(&PlanType);
    if (PyModule_AddObject(m, "Plan", (PyObject *)&PlanType) < 0) {
        Py_DECREF(&PlanType);
        Py_DECREF(m);
        return NULL;
    }
    return m;
}

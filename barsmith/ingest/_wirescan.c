/* The record scanner: msgpack bytes of a tick (or an array of ticks) -> Tick objects.
 *
 * This is the decoder of the usual record, written in C because it runs once per
 * tick and decides the service's throughput. It accepts a record only when every
 * field passes exactly the checks of barsmith.ingest.ticks.decode_tick; anything
 * else (an unknown key, an unusual encoding, a bad value) makes it answer
 * NOT_SIMPLE, and the caller decodes that record the general way, which gives the
 * same answer and a precise reject reason. A record that runs past the end of the
 * buffer answers INCOMPLETE. So this can only be faster than the general path,
 * never different; tests/ingest/test_fastwire.py pins that with generated records.
 *
 * The Python-facing API is described in _wirescan.pyi.
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>
#include <structmember.h>
#include <math.h>
#include <stdint.h>
#include <string.h>

#define NOT_SIMPLE (-1)
#define INCOMPLETE (-2)
#define PY_FAILED (-3) /* internal: a Python exception is set */

#define MAX_SYMBOL_CHARS 64

/* Tick.present bits (barsmith.ingest.ticks). */
#define BID_PX 1
#define BID_QTY 2
#define ASK_PX 4
#define ASK_QTY 8

enum field {
    F_UNKNOWN = 0, F_SYM, F_TS, F_SEQ, F_KIND,
    F_BID_PX, F_BID_QTY, F_ASK_PX, F_ASK_QTY, F_TRADE_PX, F_TRADE_QTY,
    F_BIDS, F_ASKS
};

/* Depth levels of one side taken here: up to MAX_SCANNED_LEVELS (more go to the general
 * path, which checks each price once with a set); up to STACK_LEVELS without a heap
 * buffer; up to SORT_CHECKED_LEVELS checked for a repeated price pair by pair. */
#define MAX_SCANNED_LEVELS 4096
#define STACK_LEVELS 64
#define SORT_CHECKED_LEVELS 16

enum value_kind { V_NIL, V_INT, V_FLOAT, V_STR };

/* Integers above this are not converted to a float here: (double)u could round
 * differently from Python's float(int) only beyond 2**53; the general path decides. */
#define EXACT_INT_LIMIT (((uint64_t)1) << 53)

static PyObject *new_tick = NULL; /* barsmith.ingest.ticks.new_tick: Tick(...) by position */

#define CACHE_SLOTS 256

typedef struct {
    PyObject_HEAD
    PyObject *tick;  /* the last scanned tick, or None */
    PyObject *batch; /* the last scanned batch (a list of ticks), or None */
    /* Symbols repeat: a direct-mapped cache of decoded, validated symbols, checked
     * in place, saves decoding the same bytes for nearly every message. */
    PyObject *slot_raw[CACHE_SLOTS];  /* bytes or NULL */
    PyObject *slot_text[CACHE_SLOTS]; /* str or NULL */
} Scanner;

typedef struct {
    int kind;
    uint64_t u;         /* V_INT */
    double d;           /* V_FLOAT */
    const uint8_t *str; /* V_STR: the bytes, not decoded */
    Py_ssize_t str_len;
} Value;

static uint64_t
be_uint(const uint8_t *p, int size)
{
    uint64_t v = 0;
    for (int i = 0; i < size; i++) {
        v = (v << 8) | p[i];
    }
    return v;
}

/* One scalar at data[pos]; returns the position after it, NOT_SIMPLE or INCOMPLETE. */
static Py_ssize_t
read_value(const uint8_t *data, Py_ssize_t pos, Py_ssize_t end, Value *out)
{
    if (pos >= end) {
        return INCOMPLETE;
    }
    uint8_t code = data[pos];
    if (code <= 0x7F) {
        out->kind = V_INT;
        out->u = code;
        return pos + 1;
    }
    if (code >= 0xA0 && code <= 0xBF) {
        Py_ssize_t size = code - 0xA0;
        if (pos + 1 + size > end) {
            return INCOMPLETE;
        }
        out->kind = V_STR;
        out->str = data + pos + 1;
        out->str_len = size;
        return pos + 1 + size;
    }
    if (code == 0xCB) {
        if (pos + 9 > end) {
            return INCOMPLETE;
        }
        uint64_t bits = be_uint(data + pos + 1, 8);
        double d;
        memcpy(&d, &bits, sizeof d);
        out->kind = V_FLOAT;
        out->d = d;
        return pos + 9;
    }
    if (code == 0xC0) {
        out->kind = V_NIL;
        return pos + 1;
    }
    if (code >= 0xCC && code <= 0xCF) {
        int size = 1 << (code - 0xCC);
        if (pos + 1 + size > end) {
            return INCOMPLETE;
        }
        out->kind = V_INT;
        out->u = be_uint(data + pos + 1, size);
        return pos + 1 + size;
    }
    if (code == 0xCA) {
        if (pos + 5 > end) {
            return INCOMPLETE;
        }
        uint32_t bits = (uint32_t)be_uint(data + pos + 1, 4);
        float f;
        memcpy(&f, &bits, sizeof f);
        out->kind = V_FLOAT;
        out->d = (double)f;
        return pos + 5;
    }
    if (code == 0xD9) {
        if (pos + 2 > end) {
            return INCOMPLETE;
        }
        Py_ssize_t size = data[pos + 1];
        if (pos + 2 + size > end) {
            return INCOMPLETE;
        }
        out->kind = V_STR;
        out->str = data + pos + 2;
        out->str_len = size;
        return pos + 2 + size;
    }
    return NOT_SIMPLE; /* negative ints, bools, bin, arrays, maps, ext: the general path */
}

static int
key_is(const uint8_t *key, Py_ssize_t size, const char *word, Py_ssize_t word_len)
{
    return size == word_len && memcmp(key, word, (size_t)word_len) == 0;
}

static enum field
field_of(const uint8_t *key, Py_ssize_t size)
{
    switch (size) {
    case 2:
        return key_is(key, size, "ts", 2) ? F_TS : F_UNKNOWN;
    case 3:
        if (key_is(key, size, "sym", 3)) return F_SYM;
        if (key_is(key, size, "seq", 3)) return F_SEQ;
        return F_UNKNOWN;
    case 4:
        if (key_is(key, size, "kind", 4)) return F_KIND;
        if (key_is(key, size, "bids", 4)) return F_BIDS;
        if (key_is(key, size, "asks", 4)) return F_ASKS;
        return F_UNKNOWN;
    case 6:
        if (key_is(key, size, "bid_px", 6)) return F_BID_PX;
        if (key_is(key, size, "ask_px", 6)) return F_ASK_PX;
        return F_UNKNOWN;
    case 7:
        if (key_is(key, size, "bid_qty", 7)) return F_BID_QTY;
        if (key_is(key, size, "ask_qty", 7)) return F_ASK_QTY;
        return F_UNKNOWN;
    case 8:
        return key_is(key, size, "trade_px", 8) ? F_TRADE_PX : F_UNKNOWN;
    case 9:
        return key_is(key, size, "trade_qty", 9) ? F_TRADE_QTY : F_UNKNOWN;
    default:
        return F_UNKNOWN;
    }
}

/* The symbol for these bytes as a new reference; NULL with no error set when it is
 * not a valid symbol (bad UTF-8, empty, too long, not printable); NULL with an
 * error set on a Python error. */
static PyObject *
symbol_of(Scanner *self, const uint8_t *raw, Py_ssize_t size)
{
    if (size == 0) {
        return NULL;
    }
    unsigned slot = (unsigned)(size * 31 + raw[0] * 7 + raw[size - 1] * 13 + raw[size >> 1]) & (CACHE_SLOTS - 1);
    PyObject *cached = self->slot_raw[slot];
    if (cached != NULL && PyBytes_GET_SIZE(cached) == size && memcmp(PyBytes_AS_STRING(cached), raw, (size_t)size) == 0) {
        PyObject *text = self->slot_text[slot];
        Py_INCREF(text);
        return text;
    }
    PyObject *text = PyUnicode_DecodeUTF8((const char *)raw, size, "strict");
    if (text == NULL) {
        if (PyErr_ExceptionMatches(PyExc_UnicodeDecodeError)) {
            PyErr_Clear();
        }
        return NULL;
    }
    Py_ssize_t chars = PyUnicode_GET_LENGTH(text);
    int ok = chars > 0 && chars <= MAX_SYMBOL_CHARS;
    if (ok) {
        /* str.isprintable(), as the validator checks it. */
        PyObject *printable = PyObject_CallMethod(text, "isprintable", NULL);
        if (printable == NULL) {
            Py_DECREF(text);
            return NULL;
        }
        ok = printable == Py_True;
        Py_DECREF(printable);
    }
    if (!ok) {
        Py_DECREF(text);
        return NULL;
    }
    PyObject *key = PyBytes_FromStringAndSize((const char *)raw, size);
    if (key == NULL) {
        Py_DECREF(text);
        return NULL;
    }
    Py_XSETREF(self->slot_raw[slot], key);
    Py_INCREF(text);
    Py_XSETREF(self->slot_text[slot], text);
    return text;
}

static PyObject *
float_or_none(int has, double value)
{
    if (!has) {
        Py_RETURN_NONE;
    }
    return PyFloat_FromDouble(value);
}

/* Depth levels at data[pos]: an array (fixarray or array 16) of [px, qty] pairs,
 * numbers with px > 0 and qty >= 0, each price once, into *out (a new list of
 * (px, qty) float tuples); *zero is set when a level has qty 0 (refused in a snapshot).
 * Returns the position after them, NOT_SIMPLE, INCOMPLETE or PY_FAILED. */
static int
compare_doubles(const void *a, const void *b)
{
    double x = *(const double *)a;
    double y = *(const double *)b;
    return (x > y) - (x < y);
}

static Py_ssize_t
scan_level_pairs(const uint8_t *data, Py_ssize_t pos, Py_ssize_t end, Py_ssize_t count, double *prices,
                 double *quantities, int *zero)
{
    for (Py_ssize_t i = 0; i < count; i++) {
        if (pos >= end) {
            return INCOMPLETE;
        }
        if (data[pos] != 0x92) {
            return NOT_SIMPLE;
        }
        pos += 1;
        double pair[2];
        for (int j = 0; j < 2; j++) {
            Value v = {V_NIL, 0, 0.0, NULL, 0};
            Py_ssize_t next = read_value(data, pos, end, &v);
            if (next < 0) {
                return next;
            }
            if (v.kind == V_INT) {
                if (v.u > EXACT_INT_LIMIT) {
                    return NOT_SIMPLE;
                }
                pair[j] = (double)v.u;
            } else if (v.kind == V_FLOAT) {
                pair[j] = v.d;
            } else {
                return NOT_SIMPLE;
            }
            if (!isfinite(pair[j])) {
                return NOT_SIMPLE;
            }
            pos = next;
        }
        if (!(pair[0] > 0.0) || !(pair[1] >= 0.0)) {
            return NOT_SIMPLE;
        }
        if (count <= SORT_CHECKED_LEVELS) {
            for (Py_ssize_t k = 0; k < i; k++) {
                if (prices[k] == pair[0]) {
                    return NOT_SIMPLE; /* a price listed twice: the general path rejects it */
                }
            }
        }
        if (pair[1] == 0.0) {
            *zero = 1;
        }
        prices[i] = pair[0];
        quantities[i] = pair[1];
    }
    return pos;
}

/* Whether a price is listed twice, for long lists: sorted copy, neighbours compared
 * (O(n log n), where comparing every pair would be O(n²)). -1: out of memory. */
static int
has_repeated_price(const double *prices, Py_ssize_t count)
{
    double *sorted = PyMem_Malloc((size_t)count * sizeof(double));
    if (sorted == NULL) {
        PyErr_NoMemory();
        return -1;
    }
    memcpy(sorted, prices, (size_t)count * sizeof(double));
    qsort(sorted, (size_t)count, sizeof(double), compare_doubles);
    int repeated = 0;
    for (Py_ssize_t i = 1; i < count; i++) {
        if (sorted[i] == sorted[i - 1]) {
            repeated = 1;
            break;
        }
    }
    PyMem_Free(sorted);
    return repeated;
}

static Py_ssize_t
scan_levels(const uint8_t *data, Py_ssize_t pos, Py_ssize_t end, PyObject **out, int *zero)
{
    if (pos >= end) {
        return INCOMPLETE;
    }
    uint8_t header = data[pos];
    Py_ssize_t count;
    if (header >= 0x90 && header <= 0x9F) {
        count = header - 0x90;
        pos += 1;
    } else if (header == 0xDC) {
        if (pos + 3 > end) {
            return INCOMPLETE;
        }
        count = ((Py_ssize_t)data[pos + 1] << 8) | data[pos + 2];
        if (count > MAX_SCANNED_LEVELS) {
            return NOT_SIMPLE; /* longer lists: the general path */
        }
        pos += 3;
    } else {
        return NOT_SIMPLE; /* array 32, or not an array: the general path */
    }
    double stack_prices[STACK_LEVELS];
    double stack_quantities[STACK_LEVELS];
    double *prices = stack_prices;
    double *quantities = stack_quantities;
    if (count > STACK_LEVELS) {
        prices = PyMem_Malloc(2 * (size_t)count * sizeof(double));
        if (prices == NULL) {
            PyErr_NoMemory();
            return PY_FAILED;
        }
        quantities = prices + count;
    }
    Py_ssize_t result = scan_level_pairs(data, pos, end, count, prices, quantities, zero);
    if (result >= 0 && count > SORT_CHECKED_LEVELS) {
        int repeated = has_repeated_price(prices, count);
        if (repeated != 0) {
            result = repeated < 0 ? PY_FAILED : NOT_SIMPLE; /* a repeated price: the general path rejects it */
        }
    }
    PyObject *list = NULL;
    if (result >= 0) {
        list = PyList_New(count);
        if (list == NULL) {
            result = PY_FAILED;
        }
    }
    for (Py_ssize_t i = 0; result >= 0 && i < count; i++) {
        PyObject *level = Py_BuildValue("(dd)", prices[i], quantities[i]);
        if (level == NULL) {
            Py_CLEAR(list);
            result = PY_FAILED;
            break;
        }
        PyList_SET_ITEM(list, i, level);
    }
    if (prices != stack_prices) {
        PyMem_Free(prices);
    }
    if (result >= 0) {
        *out = list;
    }
    return result;
}

static Py_ssize_t scan_tick_fields(Scanner *self, const uint8_t *data, Py_ssize_t pos, Py_ssize_t end,
                                   PyObject **tick, PyObject **levels);

/* Decode one tick map at data[pos] into *tick (a new reference). Returns the position
 * after it, NOT_SIMPLE, INCOMPLETE, or PY_FAILED. */
static Py_ssize_t
scan_tick(Scanner *self, const uint8_t *data, Py_ssize_t pos, Py_ssize_t end, PyObject **tick)
{
    PyObject *levels[2] = {NULL, NULL}; /* bids, asks: owned here, whatever happens */
    Py_ssize_t result = scan_tick_fields(self, data, pos, end, tick, levels);
    Py_XDECREF(levels[0]);
    Py_XDECREF(levels[1]);
    return result;
}

static Py_ssize_t
scan_tick_fields(Scanner *self, const uint8_t *data, Py_ssize_t pos, Py_ssize_t end, PyObject **tick,
                 PyObject **levels)
{
    if (pos >= end) {
        return INCOMPLETE;
    }
    uint8_t header = data[pos];
    if (header < 0x80 || header > 0x8F) {
        return NOT_SIMPLE; /* not a fixmap (a batch, a big map, or not a map at all) */
    }
    int count = header - 0x80;
    pos += 1;

    const uint8_t *sym_raw = NULL;
    Py_ssize_t sym_len = 0;
    int64_t ts = -1, seq = -1;
    int is_snapshot = 0, kind_seen = 0, present = 0;
    /* Fields seen so far: a repeated key goes to the general path, where msgpack
     * checks every occurrence (an overwritten sym could hold invalid UTF-8). */
    unsigned int seen = 0;
    /* has[i]: the field carried a number (not nil); num[i]: that number. */
    int has[F_TRADE_QTY + 1] = {0};
    double num[F_TRADE_QTY + 1] = {0};
    int zero_qty = 0; /* a depth level with qty 0 (only a delta may have one) */

    for (int i = 0; i < count; i++) {
        if (pos >= end) {
            return INCOMPLETE;
        }
        uint8_t key_header = data[pos];
        if (key_header < 0xA0 || key_header > 0xBF) {
            return NOT_SIMPLE;
        }
        Py_ssize_t key_len = key_header - 0xA0;
        Py_ssize_t key_end = pos + 1 + key_len;
        if (key_end > end) {
            return INCOMPLETE;
        }
        enum field field = field_of(data + pos + 1, key_len);
        if (field == F_UNKNOWN) {
            return NOT_SIMPLE; /* an unknown key: let the general path skip it */
        }
        if (seen & (1u << field)) {
            return NOT_SIMPLE;
        }
        seen |= 1u << field;
        if (field == F_BIDS || field == F_ASKS) {
            pos = scan_levels(data, key_end, end, &levels[field == F_ASKS], &zero_qty);
            if (pos < 0) {
                return pos;
            }
            continue;
        }
        Value v = {V_NIL, 0, 0.0, NULL, 0};
        pos = read_value(data, key_end, end, &v);
        if (pos < 0) {
            return pos;
        }
        switch (field) {
        case F_SYM:
            if (v.kind != V_STR) {
                return NOT_SIMPLE;
            }
            sym_raw = v.str; /* decoded once the record is known to be whole */
            sym_len = v.str_len;
            break;
        case F_TS:
            if (v.kind != V_INT || v.u == 0 || v.u > (uint64_t)INT64_MAX) {
                return NOT_SIMPLE;
            }
            ts = (int64_t)v.u;
            break;
        case F_SEQ:
            if (v.kind != V_INT || v.u > (uint64_t)INT64_MAX) {
                return NOT_SIMPLE;
            }
            seq = (int64_t)v.u;
            break;
        case F_KIND:
            if (v.kind != V_STR) {
                return NOT_SIMPLE;
            }
            if (v.str_len == 5 && memcmp(v.str, "delta", 5) == 0) {
                is_snapshot = 0;
            } else if (v.str_len == 8 && memcmp(v.str, "snapshot", 8) == 0) {
                is_snapshot = 1;
            } else {
                return NOT_SIMPLE;
            }
            kind_seen = 1;
            break;
        default: {
            /* Prices > 0, quantities >= 0 (trade quantity > 0), finite; nil allowed for
             * the quote fields. A trade's nil means "no trade field". */
            double value = 0.0;
            int number = 0;
            if (v.kind == V_NIL) {
                number = 0;
            } else if (v.kind == V_FLOAT || v.kind == V_INT) {
                if (v.kind == V_INT) {
                    if (v.u > EXACT_INT_LIMIT) {
                        return NOT_SIMPLE;
                    }
                    value = (double)v.u;
                } else {
                    value = v.d;
                }
                if (!isfinite(value)) {
                    return NOT_SIMPLE;
                }
                int strictly_positive = field == F_BID_PX || field == F_ASK_PX || field == F_TRADE_PX
                                        || field == F_TRADE_QTY;
                if (!(strictly_positive ? value > 0.0 : value >= 0.0)) {
                    return NOT_SIMPLE;
                }
                number = 1;
            } else {
                return NOT_SIMPLE;
            }
            has[field] = number;
            num[field] = value;
            switch (field) {
            case F_BID_PX: present |= BID_PX; break;
            case F_BID_QTY: present |= BID_QTY; break;
            case F_ASK_PX: present |= ASK_PX; break;
            case F_ASK_QTY: present |= ASK_QTY; break;
            default: break;
            }
            break;
        }
        }
    }
    if (ts < 0 || seq < 0 || !kind_seen || sym_raw == NULL) {
        return NOT_SIMPLE;
    }
    if (has[F_TRADE_PX] != has[F_TRADE_QTY]) {
        return NOT_SIMPLE;
    }
    if ((levels[0] != NULL || levels[1] != NULL) && (present || (is_snapshot && zero_qty))) {
        return NOT_SIMPLE; /* mixed book forms, or a snapshot level without quantity: rejected there */
    }
    PyObject *sym = symbol_of(self, sym_raw, sym_len);
    if (sym == NULL) {
        return PyErr_Occurred() ? PY_FAILED : NOT_SIMPLE;
    }
    PyObject *args[13];
    args[0] = sym;
    args[1] = PyLong_FromLongLong(ts);
    args[2] = PyLong_FromLongLong(seq);
    args[3] = is_snapshot ? Py_True : Py_False;
    Py_INCREF(args[3]);
    args[4] = PyLong_FromLong(present);
    args[5] = float_or_none(has[F_BID_PX], num[F_BID_PX]);
    args[6] = float_or_none(has[F_BID_QTY], num[F_BID_QTY]);
    args[7] = float_or_none(has[F_ASK_PX], num[F_ASK_PX]);
    args[8] = float_or_none(has[F_ASK_QTY], num[F_ASK_QTY]);
    args[9] = float_or_none(has[F_TRADE_PX], num[F_TRADE_PX]);
    args[10] = float_or_none(has[F_TRADE_QTY], num[F_TRADE_QTY]);
    args[11] = levels[0] != NULL ? levels[0] : Py_None;
    args[12] = levels[1] != NULL ? levels[1] : Py_None;
    Py_INCREF(args[11]);
    Py_INCREF(args[12]);
    PyObject *result = NULL;
    int complete = 1;
    for (int i = 0; i < 13; i++) {
        if (args[i] == NULL) {
            complete = 0;
        }
    }
    if (complete) {
        /* Without levels, the usual 11 arguments (the depth ones default to None). */
        Py_ssize_t nargs = (levels[0] != NULL || levels[1] != NULL) ? 13 : 11;
        result = PyObject_Vectorcall(new_tick, args, nargs, NULL);
    }
    if (result != NULL && PyObject_GC_IsTracked(result)) {
        /* A tick holds a str, ints, floats, a bool, Nones and its levels (fresh lists of
         * number pairs): nothing it holds can refer back to it, so it can never be part
         * of a reference cycle and the cyclic collector need not visit it (each young
         * collection would visit every tick made since the last one). */
        PyObject_GC_UnTrack(result);
    }
    for (int i = 0; i < 13; i++) {
        Py_XDECREF(args[i]);
    }
    if (result == NULL) {
        return PY_FAILED;
    }
    *tick = result;
    return pos;
}

static int
parse_args(PyObject *const *args, Py_ssize_t nargs, const char *name, Py_buffer *view, Py_ssize_t *pos)
{
    if (nargs != 2) {
        PyErr_Format(PyExc_TypeError, "%s() takes 2 arguments (data, pos)", name);
        return -1;
    }
    *pos = PyLong_AsSsize_t(args[1]);
    if (*pos == -1 && PyErr_Occurred()) {
        return -1;
    }
    if (*pos < 0) {
        PyErr_SetString(PyExc_ValueError, "pos must be >= 0");
        return -1;
    }
    return PyObject_GetBuffer(args[0], view, PyBUF_SIMPLE);
}

/* A tick map or an array of them at data[pos]: *out is a Tick or a list of ticks. */
static Py_ssize_t
scan_any(Scanner *self, const uint8_t *data, Py_ssize_t pos, Py_ssize_t end, PyObject **out)
{
    uint8_t header = pos < end ? data[pos] : 0;
    if (!((header >= 0x90 && header <= 0x9F) || header == 0xDC)) {
        return scan_tick(self, data, pos, end, out);
    }
    Py_ssize_t count;
    if (header == 0xDC) {
        if (pos + 3 > end) {
            return INCOMPLETE;
        }
        count = ((Py_ssize_t)data[pos + 1] << 8) | data[pos + 2];
        pos += 3;
    } else {
        count = header - 0x90;
        pos += 1;
    }
    if (count == 0) {
        return NOT_SIMPLE;
    }
    PyObject *ticks = PyList_New(count);
    if (ticks == NULL) {
        return PY_FAILED;
    }
    for (Py_ssize_t i = 0; i < count; i++) {
        PyObject *tick = NULL;
        pos = scan_tick(self, data, pos, end, &tick);
        if (pos < 0) {
            /* Unfilled slots are NULL, which list deallocation allows. */
            Py_DECREF(ticks);
            return pos;
        }
        PyList_SET_ITEM(ticks, i, tick);
    }
    *out = ticks;
    return pos;
}

static PyObject *
Scanner_scan_record(Scanner *self, PyObject *const *args, Py_ssize_t nargs)
{
    Py_buffer view;
    Py_ssize_t pos;
    if (parse_args(args, nargs, "scan_record", &view, &pos) < 0) {
        return NULL;
    }
    PyObject *obj = NULL;
    Py_ssize_t result = scan_any(self, (const uint8_t *)view.buf, pos, view.len, &obj);
    PyBuffer_Release(&view);
    if (result == PY_FAILED) {
        return NULL;
    }
    if (result >= 0) {
        if (PyList_CheckExact(obj)) {
            Py_XSETREF(self->batch, obj);
            Py_CLEAR(self->tick);
        } else {
            Py_XSETREF(self->tick, obj);
            Py_CLEAR(self->batch);
        }
    } else {
        Py_CLEAR(self->batch);
    }
    return PyLong_FromSsize_t(result);
}

static int
as_ssize(PyObject *obj, Py_ssize_t *out)
{
    *out = PyLong_AsSsize_t(obj);
    return *out == -1 && PyErr_Occurred() ? -1 : 0;
}

/* scan_records(data, pos, count, max_bytes, base, records, positions): the loop of
 * scan_record calls a reader makes, in one call. Appends each record (a tick or a
 * batch) to records and base + its start to positions, up to count records, while
 * the next record scans and spans at most max_bytes. Returns (pos, result, last):
 * where scanning stopped, the answer there (NOT_SIMPLE, INCOMPLETE, or the end of a
 * record too large to take; INCOMPLETE when data[pos:] is empty or count is 0) and
 * the start of the last record taken (-1: none). .tick and .batch are left alone. */
static PyObject *
Scanner_scan_records(Scanner *self, PyObject *const *args, Py_ssize_t nargs)
{
    if (nargs != 7 || !PyList_CheckExact(args[5]) || !PyList_CheckExact(args[6])) {
        PyErr_SetString(PyExc_TypeError,
                        "scan_records(data, pos, count, max_bytes, base, records: list, positions: list)");
        return NULL;
    }
    Py_ssize_t count, max_bytes, base;
    if (as_ssize(args[2], &count) < 0 || as_ssize(args[3], &max_bytes) < 0 || as_ssize(args[4], &base) < 0) {
        return NULL;
    }
    Py_buffer view;
    Py_ssize_t pos;
    if (parse_args(args, 2, "scan_records", &view, &pos) < 0) {
        return NULL;
    }
    PyObject *records = args[5];
    PyObject *positions = args[6];
    const uint8_t *data = (const uint8_t *)view.buf;
    Py_ssize_t end = view.len;
    Py_ssize_t result = INCOMPLETE;
    Py_ssize_t last = -1;
    int failed = 0;
    for (Py_ssize_t taken = 0; taken < count && pos < end; taken++) {
        PyObject *obj = NULL;
        result = scan_any(self, data, pos, end, &obj);
        if (result == PY_FAILED) {
            failed = 1;
            break;
        }
        if (result < 0) {
            break;
        }
        if (result - pos > max_bytes) {
            Py_DECREF(obj); /* the reader rejects it as too large */
            break;
        }
        PyObject *at = PyLong_FromSsize_t(base + pos);
        int appended = at != NULL && PyList_Append(records, obj) == 0 && PyList_Append(positions, at) == 0;
        Py_DECREF(obj);
        Py_XDECREF(at);
        if (!appended) {
            failed = 1;
            break;
        }
        last = pos;
        pos = result;
    }
    PyBuffer_Release(&view);
    if (failed) {
        return NULL;
    }
    return Py_BuildValue("(nnn)", pos, result, last);
}

static PyObject *
Scanner_scan_value(Scanner *self, PyObject *value)
{
    Py_buffer view;
    if (PyObject_GetBuffer(value, &view, PyBUF_SIMPLE) < 0) {
        return NULL;
    }
    PyObject *obj = NULL;
    Py_ssize_t result = scan_any(self, (const uint8_t *)view.buf, 0, view.len, &obj);
    Py_ssize_t len = view.len;
    PyBuffer_Release(&view);
    if (result == PY_FAILED) {
        return NULL;
    }
    if (result < 0) {
        Py_RETURN_NONE;
    }
    if (result != len) {
        Py_DECREF(obj); /* bytes after the record: the general path explains them */
        Py_RETURN_NONE;
    }
    return obj;
}

static PyObject *
Scanner_new(PyTypeObject *type, PyObject *args, PyObject *kwds)
{
    if (PyTuple_GET_SIZE(args) != 0 || (kwds != NULL && PyDict_GET_SIZE(kwds) != 0)) {
        PyErr_SetString(PyExc_TypeError, "WireScanner() takes no arguments");
        return NULL;
    }
    Scanner *self = (Scanner *)type->tp_alloc(type, 0);
    if (self == NULL) {
        return NULL;
    }
    /* tp_alloc zero-fills: no tick, no batch, an empty cache. */
    return (PyObject *)self;
}

static void
Scanner_dealloc(Scanner *self)
{
    Py_CLEAR(self->tick);
    Py_CLEAR(self->batch);
    for (int i = 0; i < CACHE_SLOTS; i++) {
        Py_CLEAR(self->slot_raw[i]);
        Py_CLEAR(self->slot_text[i]);
    }
    Py_TYPE(self)->tp_free((PyObject *)self);
}

static PyMethodDef Scanner_methods[] = {
    {"scan_record", (PyCFunction)(void (*)(void))Scanner_scan_record, METH_FASTCALL,
     "scan_record(data, pos) -> int: decode the record at data[pos], a tick map (into .tick) or an array of "
     "simple ticks (into .batch; .tick is None); returns the position after it, NOT_SIMPLE or INCOMPLETE."},
    {"scan_records", (PyCFunction)(void (*)(void))Scanner_scan_records, METH_FASTCALL,
     "scan_records(data, pos, count, max_bytes, base, records, positions) -> (pos, result, last): scan_record in "
     "a loop, appending each record and base + its start, up to count records of at most max_bytes each; stops "
     "where a record does not scan (result NOT_SIMPLE or INCOMPLETE) or is too large (result: its end)."},
    {"scan_value", (PyCFunction)Scanner_scan_value, METH_O,
     "scan_value(value) -> Tick | list[Tick] | None: the record when the whole value is one simple record, "
     "else None (decode it the general way)."},
    {NULL, NULL, 0, NULL},
};

static PyMemberDef Scanner_members[] = {
    {"tick", T_OBJECT, offsetof(Scanner, tick), READONLY, "the last scanned tick (None after a batch)"},
    {"batch", T_OBJECT, offsetof(Scanner, batch), READONLY, "the last scanned batch of ticks, or None"},
    {NULL, 0, 0, 0, NULL},
};

static PyTypeObject ScannerType = {
    PyVarObject_HEAD_INIT(NULL, 0)
    .tp_name = "barsmith.ingest._wirescan.WireScanner",
    .tp_basicsize = sizeof(Scanner),
    .tp_flags = Py_TPFLAGS_DEFAULT,
    .tp_doc = "Scans one record at a time. After a successful scan, .tick (or .batch) holds it.",
    .tp_new = Scanner_new,
    .tp_dealloc = (destructor)Scanner_dealloc,
    .tp_methods = Scanner_methods,
    .tp_members = Scanner_members,
};

static struct PyModuleDef wirescan_module = {
    PyModuleDef_HEAD_INIT,
    .m_name = "barsmith.ingest._wirescan",
    .m_doc = "The record scanner: msgpack bytes of the usual tick record -> Tick objects.",
    .m_size = -1,
};

PyMODINIT_FUNC
PyInit__wirescan(void)
{
    if (PyType_Ready(&ScannerType) < 0) {
        return NULL;
    }
    PyObject *ticks = PyImport_ImportModule("barsmith.ingest.ticks");
    if (ticks == NULL) {
        return NULL;
    }
    new_tick = PyObject_GetAttrString(ticks, "new_tick");
    Py_DECREF(ticks);
    if (new_tick == NULL) {
        return NULL;
    }
    PyObject *module = PyModule_Create(&wirescan_module);
    if (module == NULL) {
        return NULL;
    }
    Py_INCREF(&ScannerType);
    if (PyModule_AddObject(module, "WireScanner", (PyObject *)&ScannerType) < 0
        || PyModule_AddIntConstant(module, "NOT_SIMPLE", NOT_SIMPLE) < 0
        || PyModule_AddIntConstant(module, "INCOMPLETE", INCOMPLETE) < 0) {
        Py_DECREF(module);
        return NULL;
    }
    return module;
}

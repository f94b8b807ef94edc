/* The rolling windows of the windowed detectors, compiled: RunWindow for the run
 * detectors (rules/runs_stream.py), KendallWindow for Mann-Kendall (rules/trend.py).
 *
 * RunWindow(w, kind): kind 0 keeps the last w values and labels each +1 / -1 / 0 against
 * the window median (above / below / equal); kind 1 keeps the last w values and labels
 * their w - 1 successive differences by sign.  push(x) adds a value and returns None
 * until the window is full, then the summary of the zero-free label sequence:
 * (n_pos, n_neg, runs, longest run of +1, longest run of -1).  scan(x, out) pushes a
 * whole float64 array and writes each push's result into an int64 array (-1s until the
 * window is full): the vectorised scans of the detectors use it, one call per chunk.
 *
 * Same numbers as the pure-Python _MedianWindow / _DiffWindow with their ledgers (the
 * reference implementation, which tests/rules/test_runs_stream.py compares this with):
 * the median of the sorted window is the middle value, or the mean of the two middle
 * values; labels compare each value with it.  The summary is recomputed from the labels
 * on every push: O(w) simple steps, cheaper in C for the windows used here (the Python
 * side uses this type only for w <= MAX_W) than the incremental ledger is in Python.
 *
 * Median windows of at most 64 values (the default window is 50) keep their labels as two
 * bit masks in window order instead, updated as the window moves: the oldest label leaves
 * by a shift, the new one is set, and only the values between the old and the new median
 * (found in the sorted copy, which records each value's ring slot) are labelled again,
 * since no other value changes side.  The summary then comes from population counts and
 * shifts of the zero-free label word.  Same numbers as recomputing everything (the tests
 * compare both with the Python reference); about half the time per value.
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>
#include <stdint.h>
#include <string.h>

#define MAX_W 4096

typedef struct {
    PyObject_HEAD
    Py_ssize_t w;      /* window length */
    int kind;          /* 0 median, 1 differences */
    Py_ssize_t count;  /* values held (<= w) */
    Py_ssize_t head;   /* ring position of the oldest value */
    double *ring;      /* values in arrival order, ring of w */
    double *sorted;    /* kind 0: the held values, ascending */
    signed char *lab;  /* scratch: labels in window order */
    int bits;          /* kind 0 and w <= 64: labels kept as the masks below */
    Py_ssize_t *slot;  /* bits: ring slot of each sorted value */
    uint64_t pos, neg; /* bits: bit i set when the i-th oldest value is above / below the median */
    double med;        /* bits: the median the masks are relative to */
} RunWindow;

static void RunWindow_dealloc(RunWindow *self) {
    PyMem_Free(self->ring);
    PyMem_Free(self->sorted);
    PyMem_Free(self->lab);
    PyMem_Free(self->slot);
    Py_TYPE(self)->tp_free((PyObject *)self);
}

static int RunWindow_init(RunWindow *self, PyObject *args, PyObject *kwds) {
    static char *kwlist[] = {"w", "kind", NULL};
    Py_ssize_t w;
    int kind;
    if (!PyArg_ParseTupleAndKeywords(args, kwds, "ni", kwlist, &w, &kind))
        return -1;
    if (w < 2 || w > MAX_W || (kind != 0 && kind != 1)) {
        PyErr_Format(PyExc_ValueError, "RunWindow needs 2 <= w <= %d and kind 0 or 1", MAX_W);
        return -1;
    }
    self->w = w;
    self->kind = kind;
    self->count = 0;
    self->head = 0;
    self->bits = kind == 0 && w <= 64;
    self->pos = self->neg = 0;
    self->med = 0.0;
    PyMem_Free(self->ring);
    PyMem_Free(self->sorted);
    PyMem_Free(self->lab);
    PyMem_Free(self->slot);
    self->ring = PyMem_Calloc((size_t)w, sizeof(double));
    self->sorted = PyMem_Calloc((size_t)w, sizeof(double));
    self->lab = PyMem_Calloc((size_t)w, 1);
    self->slot = PyMem_Calloc((size_t)w, sizeof(Py_ssize_t));
    if (!self->ring || !self->sorted || !self->lab || !self->slot) {
        PyErr_NoMemory();
        return -1;
    }
    return 0;
}

/* first index in sorted[0:n) whose value is >= x */
static Py_ssize_t lower_bound(const double *a, Py_ssize_t n, double x) {
    Py_ssize_t lo = 0, hi = n;
    while (lo < hi) {
        Py_ssize_t mid = (lo + hi) / 2;
        if (a[mid] < x)
            lo = mid + 1;
        else
            hi = mid;
    }
    return lo;
}

/* first index in a[0:n) whose value is > x */
static Py_ssize_t upper_bound(const double *a, Py_ssize_t n, double x) {
    Py_ssize_t lo = 0, hi = n;
    while (lo < hi) {
        Py_ssize_t mid = (lo + hi) / 2;
        if (a[mid] <= x)
            lo = mid + 1;
        else
            hi = mid;
    }
    return lo;
}

/* labels of the held window, oldest first; returns how many.  The ring is read in its
 * two stretches (head..end, then start..) rather than with a modulo per value. */
static Py_ssize_t fill_labels(RunWindow *self) {
    Py_ssize_t n = self->count, w = self->w, i;
    Py_ssize_t seg = n < w - self->head ? n : w - self->head;
    const double *a = self->ring + self->head, *b = self->ring - seg; /* value i: i < seg ? a[i] : b[i] */
    signed char *lab = self->lab;
    if (self->kind == 0) {
        Py_ssize_t h = n >> 1;
        double m = (n & 1) ? self->sorted[h] : (self->sorted[h - 1] + self->sorted[h]) / 2;
        for (i = 0; i < seg; i++)
            lab[i] = (signed char)((a[i] > m) - (a[i] < m));
        for (; i < n; i++)
            lab[i] = (signed char)((b[i] > m) - (b[i] < m));
        return n;
    }
    if (n < 2)
        return 0;
    double prev = a[0];
    for (i = 1; i < n; i++) {
        double v = i < seg ? a[i] : b[i];
        lab[i - 1] = (signed char)((v > prev) - (v < prev));
        prev = v;
    }
    return n - 1;
}

static double held_median(const RunWindow *self) {
    Py_ssize_t n = self->count, h = n >> 1;
    return (n & 1) ? self->sorted[h] : (self->sorted[h - 1] + self->sorted[h]) / 2;
}

static void set_label(RunWindow *self, Py_ssize_t p, double v, double m) {
    uint64_t b = (uint64_t)1 << p;
    self->pos = (self->pos & ~b) | ((uint64_t)(v > m) << p);
    self->neg = (self->neg & ~b) | ((uint64_t)(v < m) << p);
}

/* add_value for the bit-mask labels (see the header) */
static void add_value_bits(RunWindow *self, double x) {
    Py_ssize_t w = self->w, n, k;
    if (self->count == w) { /* drop the oldest: its sorted entry is the one holding its slot */
        Py_ssize_t h = self->head;
        k = lower_bound(self->sorted, w, self->ring[h]);
        while (k < w && self->slot[k] != h)
            k++;
        if (k == w) /* only if the order was broken (a NaN pushed): the slot is there, somewhere */
            for (k = 0; self->slot[k] != h; k++)
                ;
        memmove(self->sorted + k, self->sorted + k + 1, (size_t)(w - 1 - k) * sizeof(double));
        memmove(self->slot + k, self->slot + k + 1, (size_t)(w - 1 - k) * sizeof(Py_ssize_t));
        self->head = h + 1 == w ? 0 : h + 1;
        self->count--;
        self->pos >>= 1;
        self->neg >>= 1;
    }
    Py_ssize_t s = self->head + self->count;
    s -= s >= w ? w : 0;
    self->ring[s] = x;
    n = self->count;
    k = lower_bound(self->sorted, n, x);
    memmove(self->sorted + k + 1, self->sorted + k, (size_t)(n - k) * sizeof(double));
    memmove(self->slot + k + 1, self->slot + k, (size_t)(n - k) * sizeof(Py_ssize_t));
    self->sorted[k] = x;
    self->slot[k] = s;
    n = ++self->count;
    double m_old = self->med, m = held_median(self);
    set_label(self, n - 1, x, m);
    if (n > 1 && m != m_old) { /* only values between the two medians can change side */
        double lo = m < m_old ? m : m_old, hi = m < m_old ? m_old : m;
        Py_ssize_t i = lower_bound(self->sorted, n, lo), end = upper_bound(self->sorted, n, hi);
        for (; i < end; i++) {
            Py_ssize_t p = self->slot[i] - self->head;
            p += p < 0 ? w : 0;
            set_label(self, p, self->sorted[i], m);
        }
    }
    self->med = m;
}

static long long longest_ones(uint64_t x) { /* each step shortens every run of ones by one */
    long long c = 0;
    while (x) {
        x &= x >> 1;
        c++;
    }
    return c;
}

static int popcount64(uint64_t x) {
#if defined(__GNUC__) || defined(__clang__)
    return __builtin_popcountll(x);
#else
    int c = 0;
    for (; x; x &= x - 1)
        c++;
    return c;
#endif
}

static int top_bit(uint64_t x) { /* index of the highest set bit; x != 0 */
#if defined(__GNUC__) || defined(__clang__)
    return 63 - __builtin_clzll(x);
#else
    int b = 0;
    while (x >>= 1)
        b++;
    return b;
#endif
}

/* run_summary from the masks of a full window */
static void run_summary_bits(RunWindow *self, long long out[5]) {
    Py_ssize_t n = self->count, k = n;
    uint64_t mask = n == 64 ? ~(uint64_t)0 : (((uint64_t)1 << n) - 1);
    uint64_t zeros = ~(self->pos | self->neg) & mask, seq = self->pos;
    while (zeros) { /* squeeze out each zero label, highest first, so the lower positions stay put */
        uint64_t below = ((uint64_t)1 << top_bit(zeros)) - 1;
        seq = (seq & below) | ((seq >> 1) & ~below);
        zeros &= below;
        k--;
    }
    out[0] = popcount64(self->pos);
    out[1] = popcount64(self->neg);
    if (k == 0) {
        out[2] = out[3] = out[4] = 0;
        return;
    }
    uint64_t km = k == 64 ? ~(uint64_t)0 : (((uint64_t)1 << k) - 1);
    seq &= km; /* bit i: the i-th nonzero label is +1 */
    out[2] = 1 + popcount64((seq ^ (seq >> 1)) & (km >> 1));
    out[3] = longest_ones(seq);
    out[4] = longest_ones(~seq & km);
}

static void add_value(RunWindow *self, double x) {
    Py_ssize_t w = self->w;
    if (self->bits) {
        add_value_bits(self, x);
        return;
    }
    if (self->count == w) { /* drop the oldest */
        double old = self->ring[self->head];
        if (self->kind == 0) {
            Py_ssize_t k = lower_bound(self->sorted, w, old);
            memmove(self->sorted + k, self->sorted + k + 1, (size_t)(w - 1 - k) * sizeof(double));
        }
        self->head = (self->head + 1) % w;
        self->count--;
    }
    self->ring[(self->head + self->count) % w] = x;
    if (self->kind == 0) {
        Py_ssize_t n = self->count, k = lower_bound(self->sorted, n, x);
        memmove(self->sorted + k + 1, self->sorted + k, (size_t)(n - k) * sizeof(double));
        self->sorted[k] = x;
    }
    self->count++;
}

/* summary of the zero-free labels of the full window: (n_pos, n_neg, runs, top_pos, top_neg) */
static void run_summary(RunWindow *self, long long out[5]) {
    if (self->bits) {
        run_summary_bits(self, out);
        return;
    }
    Py_ssize_t n = fill_labels(self), i;
    long long n_pos = 0, n_neg = 0, runs = 0, top_pos = 0, top_neg = 0, cur = 0;
    int prev = 0;
    /* branch-free: the labels are random, so branches on them would mostly mispredict */
    for (i = 0; i < n; i++) {
        int v = self->lab[i];
        long long nz = v != 0, same = v == prev, up = v > 0, down = v < 0;
        n_pos += up;
        n_neg += down;
        runs += nz & !same;
        cur = nz ? same * cur + 1 : cur; /* zeros are skipped: the run goes on across them */
        prev = nz ? v : prev;
        long long cp = up ? cur : 0, cn = down ? cur : 0;
        top_pos = cp > top_pos ? cp : top_pos;
        top_neg = cn > top_neg ? cn : top_neg;
    }
    out[0] = n_pos;
    out[1] = n_neg;
    out[2] = runs;
    out[3] = top_pos;
    out[4] = top_neg;
}

static PyObject *nan_refused(void) {
    PyErr_SetString(PyExc_ValueError, "RunWindow takes numbers, not NaN");
    return NULL;
}

static PyObject *RunWindow_push(RunWindow *self, PyObject *arg) {
    double x = PyFloat_AsDouble(arg);
    if (x == -1.0 && PyErr_Occurred())
        return NULL;
    if (x != x) /* a NaN has no side of the median, and would break the sorted copy's order */
        return nan_refused();
    add_value(self, x);
    if (self->count < self->w)
        Py_RETURN_NONE;
    long long r[5];
    run_summary(self, r);
    return Py_BuildValue("(LLLLL)", r[0], r[1], r[2], r[3], r[4]);
}

/* scan(x, out): push every value of the float64 buffer x; row i of the int64 buffer out
 * (``width`` columns) gets the result of push i, or -1s while the window is not full. */
static int scan_buffers(PyObject *args, Py_buffer *x, Py_buffer *out, Py_ssize_t width) {
    PyObject *xo, *oo;
    if (!PyArg_ParseTuple(args, "OO", &xo, &oo))
        return -1;
    if (PyObject_GetBuffer(xo, x, PyBUF_C_CONTIGUOUS | PyBUF_FORMAT) < 0)
        return -1;
    if (PyObject_GetBuffer(oo, out, PyBUF_C_CONTIGUOUS | PyBUF_FORMAT | PyBUF_WRITABLE) < 0) {
        PyBuffer_Release(x);
        return -1;
    }
    if (x->itemsize != 8 || !x->format || strcmp(x->format, "d") != 0 || out->itemsize != 8 || !out->format ||
        (strcmp(out->format, "q") != 0 && strcmp(out->format, "l") != 0) ||
        out->len / 8 < (x->len / 8) * width) {
        PyErr_Format(PyExc_ValueError, "scan needs a float64 buffer and an int64 buffer of %zd columns per value", width);
        PyBuffer_Release(x);
        PyBuffer_Release(out);
        return -1;
    }
    return 0;
}

static PyObject *RunWindow_scan(RunWindow *self, PyObject *args) {
    Py_buffer x, out;
    if (scan_buffers(args, &x, &out, 5) < 0)
        return NULL;
    const double *v = (const double *)x.buf;
    long long *o = (long long *)out.buf;
    Py_ssize_t n = x.len / 8, i, j;
    for (i = 0; i < n; i++)
        if (v[i] != v[i]) {
            PyBuffer_Release(&x);
            PyBuffer_Release(&out);
            return nan_refused();
        }
    for (i = 0; i < n; i++, o += 5) {
        add_value(self, v[i]);
        if (self->count < self->w) {
            for (j = 0; j < 5; j++)
                o[j] = -1;
        } else {
            run_summary(self, o);
        }
    }
    PyBuffer_Release(&x);
    PyBuffer_Release(&out);
    Py_RETURN_NONE;
}

static PyObject *RunWindow_labels(RunWindow *self, PyObject *Py_UNUSED(ignored)) {
    Py_ssize_t n = fill_labels(self), i;
    PyObject *out = PyList_New(n);
    if (!out)
        return NULL;
    for (i = 0; i < n; i++)
        PyList_SET_ITEM(out, i, PyLong_FromLong(self->lab[i]));
    return out;
}

/* the values of a ring of capacity w holding count values from head, oldest first, as a list */
static PyObject *ring_values(const double *ring, Py_ssize_t head, Py_ssize_t count, Py_ssize_t w) {
    PyObject *out = PyList_New(count);
    Py_ssize_t i;
    if (!out)
        return NULL;
    for (i = 0; i < count; i++) {
        PyObject *v = PyFloat_FromDouble(ring[(head + i) % w]);
        if (!v) {
            Py_DECREF(out);
            return NULL;
        }
        PyList_SET_ITEM(out, i, v);
    }
    return out;
}

static PyObject *RunWindow_values(RunWindow *self, PyObject *Py_UNUSED(ignored)) {
    return ring_values(self->ring, self->head, self->count, self->w);
}

static PyObject *RunWindow_full(RunWindow *self, PyObject *Py_UNUSED(ignored)) {
    return PyBool_FromLong(self->count == self->w);
}

static PyMethodDef RunWindow_methods[] = {
    {"push", (PyCFunction)RunWindow_push, METH_O, "Add a value; None until full, then (n_pos, n_neg, runs, top_pos, top_neg)."},
    {"scan", (PyCFunction)RunWindow_scan, METH_VARARGS, "scan(x, out): push each float64 of x; out (int64, 5 per value) gets each result, -1s until full."},
    {"labels", (PyCFunction)RunWindow_labels, METH_NOARGS, "The window's labels, oldest first."},
    {"values", (PyCFunction)RunWindow_values, METH_NOARGS, "The window's values, oldest first."},
    {"full", (PyCFunction)RunWindow_full, METH_NOARGS, "Whether the window holds w values."},
    {NULL, NULL, 0, NULL}};

static PyTypeObject RunWindowType = {
    PyVarObject_HEAD_INIT(NULL, 0).tp_name = "rules._windows.RunWindow",
    .tp_basicsize = sizeof(RunWindow),
    .tp_dealloc = (destructor)RunWindow_dealloc,
    .tp_flags = Py_TPFLAGS_DEFAULT,
    .tp_doc = "Rolling window of the run detectors: median labels (kind 0) or difference signs (kind 1).",
    .tp_methods = RunWindow_methods,
    .tp_init = (initproc)RunWindow_init,
    .tp_new = PyType_GenericNew,
};

/* ---------------------------------------------------------------- KendallWindow
 * KendallWindow(w): the last w values, Mann-Kendall's S over them and the tie term
 * sum t(t-1)(2t+5) of their tied groups, kept up to date as in MannKendallDetector's
 * pure-Python window (the reference): a value entering adds (#smaller - #larger) to S,
 * the oldest leaving removes (#larger - #smaller); both found by binary search in a
 * sorted copy.  push(x) returns None until the window is full, then (S, tie term);
 * scan(x, out) pushes a whole array, as RunWindow.scan does.
 */

typedef struct {
    PyObject_HEAD
    Py_ssize_t w, count, head;
    long long s, ties;
    double *ring, *sorted;
} KendallWindow;

static long long tie_increment(long long c) { /* f(c+1) - f(c), f(t) = t(t-1)(2t+5) */
    return (c + 1) * c * (2 * c + 7) - c * (c - 1) * (2 * c + 5);
}

static void KendallWindow_dealloc(KendallWindow *self) {
    PyMem_Free(self->ring);
    PyMem_Free(self->sorted);
    Py_TYPE(self)->tp_free((PyObject *)self);
}

static int KendallWindow_init(KendallWindow *self, PyObject *args, PyObject *kwds) {
    static char *kwlist[] = {"w", NULL};
    Py_ssize_t w;
    if (!PyArg_ParseTupleAndKeywords(args, kwds, "n", kwlist, &w))
        return -1;
    if (w < 2 || w > MAX_W) {
        PyErr_Format(PyExc_ValueError, "KendallWindow needs 2 <= w <= %d", MAX_W);
        return -1;
    }
    self->w = w;
    self->count = self->head = 0;
    self->s = self->ties = 0;
    PyMem_Free(self->ring);
    PyMem_Free(self->sorted);
    self->ring = PyMem_Calloc((size_t)w, sizeof(double));
    self->sorted = PyMem_Calloc((size_t)w, sizeof(double));
    if (!self->ring || !self->sorted) {
        PyErr_NoMemory();
        return -1;
    }
    return 0;
}

static void kendall_add(KendallWindow *self, double v) {
    Py_ssize_t w = self->w, n = self->count, lo, hi;
    double *sl = self->sorted;
    if (n == w) {
        double old = self->ring[self->head];
        lo = lower_bound(sl, n, old);
        hi = upper_bound(sl, n, old);
        memmove(sl + lo, sl + lo + 1, (size_t)(n - 1 - lo) * sizeof(double));
        self->s -= (long long)(n - hi) - (long long)lo;
        self->ties -= tie_increment((long long)(hi - lo - 1));
        self->head = (self->head + 1) % w;
        n--;
    }
    lo = lower_bound(sl, n, v);
    hi = upper_bound(sl, n, v);
    self->s += (long long)lo - (long long)(n - hi);
    self->ties += tie_increment((long long)(hi - lo));
    memmove(sl + hi + 1, sl + hi, (size_t)(n - hi) * sizeof(double));
    sl[hi] = v;
    self->ring[(self->head + n) % w] = v;
    self->count = n + 1;
}

static PyObject *KendallWindow_push(KendallWindow *self, PyObject *arg) {
    double v = PyFloat_AsDouble(arg);
    if (v == -1.0 && PyErr_Occurred())
        return NULL;
    kendall_add(self, v);
    if (self->count < self->w)
        Py_RETURN_NONE;
    return Py_BuildValue("(LL)", self->s, self->ties);
}

static PyObject *KendallWindow_scan(KendallWindow *self, PyObject *args) {
    Py_buffer x, out;
    if (scan_buffers(args, &x, &out, 2) < 0)
        return NULL;
    const double *v = (const double *)x.buf;
    long long *o = (long long *)out.buf;
    Py_ssize_t n = x.len / 8, i;
    for (i = 0; i < n; i++, o += 2) {
        kendall_add(self, v[i]);
        int full = self->count == self->w;
        o[0] = full ? self->s : -1;
        o[1] = full ? self->ties : -1;
    }
    PyBuffer_Release(&x);
    PyBuffer_Release(&out);
    Py_RETURN_NONE;
}

static PyObject *KendallWindow_values(KendallWindow *self, PyObject *Py_UNUSED(ignored)) {
    return ring_values(self->ring, self->head, self->count, self->w);
}

static PyObject *KendallWindow_state(KendallWindow *self, PyObject *Py_UNUSED(ignored)) {
    return Py_BuildValue("(nLL)", self->count, self->s, self->ties);
}

static PyMethodDef KendallWindow_methods[] = {
    {"push", (PyCFunction)KendallWindow_push, METH_O, "Add a value; None until full, then (S, tie term)."},
    {"scan", (PyCFunction)KendallWindow_scan, METH_VARARGS, "scan(x, out): push each float64 of x; out (int64, 2 per value) gets (S, tie term), -1s until full."},
    {"values", (PyCFunction)KendallWindow_values, METH_NOARGS, "The window's values, oldest first."},
    {"state", (PyCFunction)KendallWindow_state, METH_NOARGS, "(values held, S, tie term)."},
    {NULL, NULL, 0, NULL}};

static PyTypeObject KendallWindowType = {
    PyVarObject_HEAD_INIT(NULL, 0).tp_name = "rules._windows.KendallWindow",
    .tp_basicsize = sizeof(KendallWindow),
    .tp_dealloc = (destructor)KendallWindow_dealloc,
    .tp_flags = Py_TPFLAGS_DEFAULT,
    .tp_doc = "Rolling window of the Mann-Kendall detector: S and the tie term.",
    .tp_methods = KendallWindow_methods,
    .tp_init = (initproc)KendallWindow_init,
    .tp_new = PyType_GenericNew,
};

static struct PyModuleDef moduledef = {PyModuleDef_HEAD_INIT, "_windows",
                                       "Compiled rolling windows of the windowed detectors.", -1, NULL};

PyMODINIT_FUNC PyInit__windows(void) {
    if (PyType_Ready(&RunWindowType) < 0 || PyType_Ready(&KendallWindowType) < 0)
        return NULL;
    PyObject *m = PyModule_Create(&moduledef);
    if (!m)
        return NULL;
    Py_INCREF(&RunWindowType);
    if (PyModule_AddObject(m, "RunWindow", (PyObject *)&RunWindowType) < 0) {
        Py_DECREF(&RunWindowType);
        Py_DECREF(m);
        return NULL;
    }
    Py_INCREF(&KendallWindowType);
    if (PyModule_AddObject(m, "KendallWindow", (PyObject *)&KendallWindowType) < 0) {
        Py_DECREF(&KendallWindowType);
        Py_DECREF(m);
        return NULL;
    }
    if (PyModule_AddIntConstant(m, "MAX_W", MAX_W) < 0) {
        Py_DECREF(m);
        return NULL;
    }
    return m;
}

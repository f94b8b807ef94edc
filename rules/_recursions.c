/* The CUSUM and EWMA recursions run along an array, compiled: the loops behind
 * Cusum.resume (rules/cusum.py) and Ewma.resume (rules/ewma.py) when this is built.
 *
 * Each function takes a float64 buffer, a start position and the detector's state, runs
 * the detector's own update arithmetic (the same operations in the same order, so the
 * results are bit-identical; built with -ffp-contract=off so no multiply-add is fused)
 * until the first reading that signals or the end, and returns the position of that
 * reading (-1 at the end) with the state after it.  Python builds the signal, restarts
 * the detector and calls again from the next reading.
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>
#include <math.h>
#include <string.h>

static int float_buffer(PyObject *o, Py_buffer *b) {
    if (PyObject_GetBuffer(o, b, PyBUF_C_CONTIGUOUS | PyBUF_FORMAT) < 0)
        return -1;
    if (b->itemsize != 8 || !b->format || strcmp(b->format, "d") != 0) {
        PyErr_SetString(PyExc_ValueError, "needs a contiguous float64 buffer");
        PyBuffer_Release(b);
        return -1;
    }
    return 0;
}

/* cusum_until(x, start, k, h, sp, mp, sn, mn, zp, zn, fp, fn, t)
 *   -> (stop, sp, mp, sn, mn, zp, zn, fp, fn, t)
 * State as Cusum keeps it: running sums sp / sn and their minima mp / mn (the Lindley
 * form, C = s - min s), index of each side's last zero, whether it touched zero since the
 * restart, and the count of readings t. */
static PyObject *cusum_until(PyObject *mod, PyObject *args) {
    PyObject *xo;
    Py_ssize_t start, zp, zn, t;
    double k, h, sp, mp, sn, mn;
    int fp, fn;
    if (!PyArg_ParseTuple(args, "Onddddddnnppn", &xo, &start, &k, &h, &sp, &mp, &sn, &mn, &zp, &zn, &fp, &fn, &t))
        return NULL;
    Py_buffer b;
    if (float_buffer(xo, &b) < 0)
        return NULL;
    const double *x = (const double *)b.buf;
    Py_ssize_t n = b.len / 8, i, stop = -1;
    for (i = start < 0 ? 0 : start; i < n; i++) {
        double v = x[i], s = sp + (v - k);
        sp = s;
        if (s <= mp) {
            mp = s;
            zp = t;
            fp = 1;
        }
        s = sn + (-v - k);
        sn = s;
        if (s <= mn) {
            mn = s;
            zn = t;
            fn = 1;
        }
        t++;
        if (sp - mp > h || sn - mn > h) {
            stop = i;
            break;
        }
    }
    PyBuffer_Release(&b);
    return Py_BuildValue("(nddddnnNNn)", stop, sp, mp, sn, mn, zp, zn, PyBool_FromLong(fp), PyBool_FromLong(fn), t);
}

/* ewma_until(x, start, lam, q, L, c, q2, exact, w_inf, z, f, i, rs, rstart, rsum, t)
 *   -> (stop, z, f, i, rs, rstart, rsum, t)
 * State as Ewma keeps it: the EWMA z, (1-lam)^(2i) f, readings since the restart i, the
 * sign rs of the current stretch, its first index rstart and its sum rsum, the count t. */
static PyObject *ewma_until(PyObject *mod, PyObject *args) {
    PyObject *xo;
    Py_ssize_t start, i, rstart, t;
    double lam, q, L, c, q2, w_inf, z, f, rsum;
    int exact, rs;
    if (!PyArg_ParseTuple(args, "Ondddddpdddnindn", &xo, &start, &lam, &q, &L, &c, &q2, &exact, &w_inf, &z, &f, &i,
                          &rs, &rstart, &rsum, &t))
        return NULL;
    Py_buffer b;
    if (float_buffer(xo, &b) < 0)
        return NULL;
    const double *x = (const double *)b.buf;
    Py_ssize_t n = b.len / 8, j, stop = -1;
    for (j = start < 0 ? 0 : start; j < n; j++) {
        double v = x[j], w;
        Py_ssize_t now = t++;
        z = lam * v + q * z;
        i++;
        int sgn = z > 0.0 ? 1 : (z < 0.0 ? -1 : 0);
        if (sgn == 0 || sgn != rs) {
            rs = sgn;
            rstart = now;
            rsum = v;
        } else {
            rsum += v;
        }
        if (exact) {
            f = f * q2;
            w = L * sqrt(c * (1.0 - f));
        } else {
            w = w_inf;
        }
        if (z > w || z < -w) {
            stop = j;
            break;
        }
    }
    PyBuffer_Release(&b);
    return Py_BuildValue("(nddnindn)", stop, z, f, i, rs, rstart, rsum, t);
}

static PyMethodDef methods[] = {
    {"cusum_until", cusum_until, METH_VARARGS, "Run the tabular CUSUM along x from start to its first signal."},
    {"ewma_until", ewma_until, METH_VARARGS, "Run the EWMA chart along x from start to its first signal."},
    {NULL, NULL, 0, NULL},
};

static struct PyModuleDef moduledef = {PyModuleDef_HEAD_INIT, "_recursions",
                                       "Compiled CUSUM and EWMA recursions along an array.", -1, methods};

PyMODINIT_FUNC PyInit__recursions(void) { return PyModule_Create(&moduledef); }

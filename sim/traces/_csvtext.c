/* Compiled twin of sim/floatfmt.py: CSV text of a float64 block, each value as
 * Python's repr() writes it (the shortest string that reads back to the same
 * double), NaN as a blank cell, rows ended by CRLF.
 *
 * The digits come from the same algorithm as the numpy code, one value at a time:
 * a * 10**k as a double-double (Dekker's exact product with a double-double power
 * of ten from the table set by set_powers), the 17-digit mantissa, and the 16-
 * and 15-digit roundings kept when they lie safely inside the interval of reals
 * that read back as a.  Whatever that cannot settle (zeros, infinities,
 * subnormals, exponents beyond +-280, near-ties, exact halfway cases) is written
 * by CPython's own repr routine, PyOS_double_to_string(x, 'r', ...), so every
 * string equals repr(x).  A run of equal values (same bits) in a column is
 * formatted once.
 *
 * Build note: the double-double steps need each product rounded on its own, so
 * this file is compiled without floating-point contraction (-ffp-contract=off).
 */
#define PY_SSIZE_T_CLEAN
#include <Python.h>
#include <float.h>
#include <math.h>
#include <stdint.h>
#include <string.h>

#if defined(__FAST_MATH__) || (defined(FLT_EVAL_METHOD) && FLT_EVAL_METHOD != 0)
/* The exact-product steps need plain double rounding; without it the build fails
   on purpose, and sim/floatfmt.py falls back to its numpy code. */
#error "sim/_csvtext.c needs IEEE double arithmetic without excess precision or -ffast-math"
#endif

#define KMAX 300
#define TIE 1e-6 /* in units of the last digit; the double-double error is ~1e-14 */
#define MAXCELL 24 /* the longest repr of a double: -2.2250738585072014e-308 */
#define WIDEST 32  /* a cache slot */

static double P10_HI[2 * KMAX + 1], P10_LO[2 * KMAX + 1];
static int have_powers = 0;

static const int64_t POW10[18] = {
    1LL, 10LL, 100LL, 1000LL, 10000LL, 100000LL, 1000000LL, 10000000LL, 100000000LL,
    1000000000LL, 10000000000LL, 100000000000LL, 1000000000000LL, 10000000000000LL,
    100000000000000LL, 1000000000000000LL, 10000000000000000LL, 100000000000000000LL};

static void split(double a, double *h, double *l)
{
    double c = 134217729.0 * a; /* Veltkamp: 2**27 + 1 */
    *h = c - (c - a);
    *l = a - *h;
}

/* Shortest digits of a > 0 (finite, 1e-280 < a < 1e280): mantissa *m with *p
 * digits, value m * 10**(e - p + 1).  Returns 0 when the caller must fall back. */
static int mantissa(double a, int64_t *m, int *p, int *e)
{
    int e10 = (int)floor(log10(a)), k = 0, up = 0, down = 0;
    double ph = 0.0, frac = 0.0;
    int64_t m17 = 0;
    for (int iter = 0; iter < 2; iter++) {
        k = 16 - e10;
        if (k < -KMAX || k > KMAX)
            return 0;
        ph = P10_HI[k + KMAX];
        double pl = P10_LO[k + KMAX];
        double hi = a * ph, ah, al, bh, bl;
        split(a, &ah, &al);
        split(ph, &bh, &bl);
        double err = ((ah * bh - hi) + ah * bl + al * bh) + al * bl;
        double lo = err + a * pl;
        double r = rint(hi);
        double f = (hi - r) + lo;
        double rf = rint(f);
        m17 = (int64_t)r + (int64_t)rf;
        frac = f - rf; /* a * 10**k = m17 + frac */
        up = m17 >= POW10[17];
        down = m17 < POW10[16];
        if (!up && !down)
            break;
        e10 += up - down; /* log10 was off by one next to a power of ten */
    }
    if (up || down)
        return 0;
    double below = a - nextafter(a, 0.0), above = nextafter(a, INFINITY) - a;
    double limit = 0.499 * (below < above ? below : above) * ph; /* surely reads back as a */
    double unsure = 0.501 * (below < above ? above : below) * ph; /* repr must decide */
    if (!(fabs(frac) < limit) || fabs(fabs(frac) - 0.5) < TIE)
        return 0; /* not surely a's neighbourhood, or halfway between two 17-digit decimals */
    *m = m17;
    *p = 17;
    *e = e10;
    for (int digits = 16; digits >= 15; digits--) {
        int64_t div = POW10[17 - digits], q = m17 / div, rem = m17 % div;
        double t = ((double)rem + frac) / (double)div;
        int64_t cand = q + (t >= 0.5);
        double dist = fabs((double)(cand * div - m17) - frac);
        if (fabs((double)rem + frac - 0.5 * (double)div) < TIE)
            return 0; /* halfway between two decimals of this length: repr takes the even one */
        if (dist < limit) {
            int carry = cand >= POW10[digits]; /* 99..9.5 rounded up: one decade up */
            *m = carry ? cand / 10 : cand;
            *e = e10 + carry;
            *p = digits;
        } else if (dist < unsure) {
            return 0; /* a near-tie, or the wide side below a power of two */
        }
    }
    return 1;
}

/* repr(x) into out (at least MAXCELL bytes); returns the length, 0 for NaN, -1 on error. */
static int format_value(double x, char *out)
{
    if (isnan(x))
        return 0;
    double a = fabs(x);
    int64_t m;
    int p, e;
    if (a > 1e-280 && a < 1e280 && mantissa(a, &m, &p, &e)) {
        char dig[17];
        for (int j = p - 1; j >= 0; j--) {
            dig[j] = (char)('0' + m % 10);
            m /= 10;
        }
        int n = p;
        while (n > 1 && dig[n - 1] == '0')
            n--;
        char *o = out;
        if (x < 0)
            *o++ = '-';
        if (e >= -4 && e < 16) {
            if (e >= 0) {
                for (int j = 0; j <= e; j++)
                    *o++ = j < n ? dig[j] : '0';
                *o++ = '.';
                if (n > e + 1) {
                    memcpy(o, dig + e + 1, (size_t)(n - e - 1));
                    o += n - e - 1;
                } else {
                    *o++ = '0';
                }
            } else {
                *o++ = '0';
                *o++ = '.';
                for (int j = 0; j < -e - 1; j++)
                    *o++ = '0';
                memcpy(o, dig, (size_t)n);
                o += n;
            }
        } else {
            *o++ = dig[0];
            if (n > 1) {
                *o++ = '.';
                memcpy(o, dig + 1, (size_t)(n - 1));
                o += n - 1;
            }
            int ae = e < 0 ? -e : e;
            *o++ = 'e';
            *o++ = e < 0 ? '-' : '+';
            if (ae >= 100)
                *o++ = (char)('0' + ae / 100);
            *o++ = (char)('0' + ae / 10 % 10);
            *o++ = (char)('0' + ae % 10);
        }
        return (int)(o - out);
    }
    char *s = PyOS_double_to_string(x, 'r', 0, Py_DTSF_ADD_DOT_0, NULL);
    if (s == NULL)
        return -1;
    size_t len = strlen(s);
    if (len > MAXCELL) {
        PyMem_Free(s);
        PyErr_SetString(PyExc_RuntimeError, "unexpectedly long float text");
        return -1;
    }
    memcpy(out, s, len);
    PyMem_Free(s);
    return (int)len;
}

static PyObject *set_powers(PyObject *self, PyObject *args)
{
    Py_buffer hi, lo;
    if (!PyArg_ParseTuple(args, "y*y*", &hi, &lo))
        return NULL;
    size_t want = sizeof(P10_HI);
    if ((size_t)hi.len != want || (size_t)lo.len != want) {
        PyBuffer_Release(&hi);
        PyBuffer_Release(&lo);
        return PyErr_Format(PyExc_ValueError, "expected %d float64 powers of ten", 2 * KMAX + 1);
    }
    memcpy(P10_HI, hi.buf, want);
    memcpy(P10_LO, lo.buf, want);
    PyBuffer_Release(&hi);
    PyBuffer_Release(&lo);
    have_powers = 1;
    Py_RETURN_NONE;
}

static PyObject *format_block(PyObject *self, PyObject *arg)
{
    if (!have_powers) {
        PyErr_SetString(PyExc_RuntimeError, "set_powers() has not been called");
        return NULL;
    }
    Py_buffer view;
    if (PyObject_GetBuffer(arg, &view, PyBUF_C_CONTIGUOUS | PyBUF_FORMAT) < 0)
        return NULL;
    PyObject *result = NULL;
    char *cache = NULL;
    int *cache_len = NULL;
    uint64_t *cache_bits = NULL;
    if (view.ndim != 2 || view.itemsize != 8 || view.format == NULL ||
        !(strcmp(view.format, "d") == 0 || strcmp(view.format, "<d") == 0 || strcmp(view.format, "=d") == 0)) {
        PyErr_SetString(PyExc_TypeError, "expected a C-contiguous 2-D float64 array");
        goto done;
    }
    Py_ssize_t rows = view.shape[0], cols = view.shape[1];
    if (rows == 0 || cols == 0) {
        result = PyBytes_FromStringAndSize("", 0);
        goto done;
    }
    if (cols > (PY_SSIZE_T_MAX / rows - 1) / (MAXCELL + 1)) {
        PyErr_NoMemory();
        goto done;
    }
    cache = PyMem_Malloc((size_t)cols * WIDEST);
    cache_len = PyMem_Malloc((size_t)cols * sizeof(int));
    cache_bits = PyMem_Malloc((size_t)cols * sizeof(uint64_t));
    result = PyBytes_FromStringAndSize(NULL, rows * (cols * (MAXCELL + 1) + 1)); /* cell + separator, LF */
    if (!cache || !cache_len || !cache_bits || !result) {
        Py_CLEAR(result);
        if (!PyErr_Occurred())
            PyErr_NoMemory();
        goto done;
    }
    const double *v = (const double *)view.buf;
    char *o = PyBytes_AS_STRING(result);
    for (Py_ssize_t j = 0; j < cols; j++)
        cache_len[j] = -1;
    for (Py_ssize_t i = 0; i < rows; i++) {
        for (Py_ssize_t j = 0; j < cols; j++) {
            double x = v[i * cols + j];
            uint64_t bits;
            memcpy(&bits, &x, sizeof bits);
            char *c = cache + j * WIDEST;
            if (cache_len[j] < 0 || bits != cache_bits[j]) {
                int len = format_value(x, c);
                if (len < 0) {
                    Py_CLEAR(result);
                    goto done;
                }
                cache_len[j] = len;
                cache_bits[j] = bits;
            }
            memcpy(o, c, (size_t)cache_len[j]);
            o += cache_len[j];
            *o++ = j + 1 < cols ? ',' : '\r';
        }
        *o++ = '\n';
    }
    _PyBytes_Resize(&result, o - PyBytes_AS_STRING(result));
done:
    PyMem_Free(cache);
    PyMem_Free(cache_len);
    PyMem_Free(cache_bits);
    PyBuffer_Release(&view);
    return result;
}

static PyMethodDef methods[] = {
    {"set_powers", set_powers, METH_VARARGS,
     "set_powers(hi, lo): the double-double table of 10**k, k = -300..300 (float64 bytes)."},
    {"format_block", format_block, METH_O,
     "format_block(array) -> bytes: CSV rows (CRLF) of a C-contiguous 2-D float64 array; "
     "values as repr(), NaN blank."},
    {NULL, NULL, 0, NULL}};

static struct PyModuleDef module = {PyModuleDef_HEAD_INIT, "_csvtext",
                                    "Compiled CSV text of float blocks (see sim/floatfmt.py).", -1,
                                    methods};

PyMODINIT_FUNC PyInit__csvtext(void) { return PyModule_Create(&module); }
